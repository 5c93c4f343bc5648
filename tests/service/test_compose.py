"""docker-compose.yml agrees with the code: settings, commands, persistence, scaling.

No Docker engine runs here, so the file is read, not run.  PyYAML is present
without asking for it: uvicorn[standard], a dependency of fixq, requires it.
"""

from __future__ import annotations

import re
import shlex
from pathlib import Path
from typing import Any

import pytest
import yaml

from service.cli import _parser
from service.settings import Settings

ROOT = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def compose() -> dict[str, Any]:
    return yaml.safe_load((ROOT / "docker-compose.yml").read_text())


def command_of(service: dict[str, Any]) -> list[str]:
    command = service["command"]
    return shlex.split(command) if isinstance(command, str) else list(command)


def test_services_are_redis_api_and_worker(compose: dict[str, Any]) -> None:
    assert set(compose["services"]) == {"redis", "api", "worker"}


def test_every_fixq_variable_is_a_setting(compose: dict[str, Any]) -> None:
    fields = {f"FIXQ_{name.upper()}" for name in Settings.model_fields}
    seen = set()
    for service in compose["services"].values():
        environment = service.get("environment") or {}
        if isinstance(environment, list):
            environment = dict(item.split("=", 1) for item in environment)
        for name in environment:
            if name.startswith("FIXQ_"):
                assert name in fields, f"{name} is not a field of Settings"
                seen.add(name)
    assert "FIXQ_REDIS_URL" in seen


def test_commands_exist_in_the_cli(compose: dict[str, Any]) -> None:
    parser = _parser()
    for name in ("api", "worker"):
        argv = command_of(compose["services"][name])
        assert argv[0] == "fixq"
        assert parser.parse_args(argv[1:]).command == name
    assert command_of(compose["services"]["api"])[1:] != command_of(compose["services"]["worker"])[1:]


def test_redis_persists_to_a_volume_and_is_health_checked(compose: dict[str, Any]) -> None:
    redis = compose["services"]["redis"]
    argv = command_of(redis)
    assert argv[0] == "redis-server"
    assert argv[argv.index("--appendonly") + 1] == "yes"
    volume, _, mount = redis["volumes"][0].partition(":")
    assert volume in compose["volumes"] and mount == "/data"
    assert "redis-cli" in " ".join(redis["healthcheck"]["test"])


def test_api_waits_for_redis_and_checks_its_own_health(compose: dict[str, Any]) -> None:
    api = compose["services"]["api"]
    assert api["depends_on"]["redis"]["condition"] == "service_healthy"
    assert "/healthz" in " ".join(api["healthcheck"]["test"])
    port = int(command_of(api)[command_of(api).index("--port") + 1])
    assert any(re.fullmatch(rf"(\d+:)?{port}", str(mapping)) for mapping in api["ports"])


def test_workers_scale(compose: dict[str, Any]) -> None:
    worker = compose["services"]["worker"]
    assert "container_name" not in worker and "ports" not in worker
    assert worker["environment"]["FIXQ_REDIS_URL"].startswith("redis://redis:")
