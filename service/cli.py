"""The ``fixq`` command: run the service, or talk to one.

Exit codes: 0 success; 1 the job failed or was canceled, or the API refused the
request (unknown job, result not ready, ...); 2 usage error or an invalid
problem document (including one too large); 3 the API (or, for ``fixq keys``,
Redis) cannot be reached.  ``fixq changes`` exits 1 only when the value moved
more than ``--fail-above``, and 2 when the API refused the comparison.
The API's URL comes from ``FIXQ_URL`` (default http://127.0.0.1:8000) and the
key from ``FIXQ_KEY``; ``fixq keys`` talks to Redis directly (``FIXQ_REDIS_URL``).
"""

from __future__ import annotations

import argparse
import ipaddress
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Any, NoReturn

import httpx

from service.children import WARM_STOP_S, Stop, raise_stop, spawn, stop_child
from service.client import APIError, FixqClient
from service.job_text import fault_lines, outcome, search_answer
from service.progress import ProgressBar

__all__ = ["main"]

EXIT_OK, EXIT_FAILED, EXIT_INVALID, EXIT_UNREACHABLE = 0, 1, 2, 3

def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="fixq",
        description="Solve discounted dynamic programs as a service.",
        epilog=__doc__.split("\n\n", 1)[1],
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    commands = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    run = commands.add_parser("run", help="all in one: (embedded) Redis, the API and one worker")
    api = commands.add_parser("api", help="serve the HTTP API")
    for sub in (run, api):
        sub.add_argument("--host", help="address to listen on (default FIXQ_HOST, 127.0.0.1)")
        sub.add_argument("--port", type=int, help="port to listen on (default FIXQ_PORT, 8000)")
        sub.add_argument(
            "--allow-open-network",
            action="store_true",
            help="serve with FIXQ_AUTH=off on an address that is not loopback (or FIXQ_ALLOW_OPEN_NETWORK=yes)",
        )
    worker = commands.add_parser("worker", help="run one worker that solves queued jobs")
    worker.add_argument("--burst", action="store_true", help="exit once the queues are empty")

    submit = commands.add_parser("submit", help="queue a problem document; prints the job id")
    submit.add_argument("file", help="the problem document (JSON); - reads standard input")
    submit.add_argument("--wait", action="store_true", help="show progress and wait for the job to finish")
    submit.add_argument("--fresh", action="store_true", help="solve again even if this key already solved it")
    status = commands.add_parser("status", help="show a job")
    status.add_argument("id")
    status.add_argument("--json", action="store_true", help="print the job record as JSON")
    result = commands.add_parser("result", help="print or save a job's result")
    result.add_argument("id")
    result.add_argument("-o", "--output", help="write to this file instead of standard output")
    result.add_argument("--format", choices=("json", "csv"), default="json")
    check = commands.add_parser("check", help="validate a document and estimate its size; queues nothing")
    check.add_argument("file", help="the problem document (JSON); - reads standard input")
    cancel = commands.add_parser("cancel", help="cancel a queued or running job")
    cancel.add_argument("id")
    changes = commands.add_parser(
        "changes", help="what moved between two finished jobs; exit 1 when the value moved more than --fail-above"
    )
    changes.add_argument("id", help="the newer job (the comparison is made on its grid)")
    changes.add_argument("--since", required=True, metavar="OTHER_ID", help="the older job to compare with")
    changes.add_argument("--fail-above", type=float, metavar="X", help="exit 1 when the largest value change is > X")
    changes.add_argument("--json", action="store_true", help="print the API's answer as JSON")

    examples = commands.add_parser("examples", help="list the bundled example problems, or write one out")
    examples.add_argument("name", nargs="?", help="the example to write out (default: list them all)")
    examples.add_argument("-o", "--output", metavar="FILE", help="write the document to FILE (default: stdout)")

    keys = commands.add_parser("keys", help="manage API keys (talks to Redis directly: FIXQ_REDIS_URL)")
    key_commands = keys.add_subparsers(dest="keys_command", required=True, metavar="KEYS_COMMAND")
    add = key_commands.add_parser("add", help="make a key; prints it alone on the last line, only this once")
    add.add_argument("name", help="the owner name of the key's jobs (ASCII letters, digits, _ . @ -)")
    add.add_argument("--admin", action="store_true", help="the key sees and cancels every owner's jobs")
    add.add_argument("--max-active-jobs", type=int, metavar="N", help="its own cap on queued+running jobs")
    add.add_argument("--max-active-high-jobs", type=int, metavar="N", help="its own cap on priority-high ones")
    add.add_argument("--max-problem-mb", type=float, metavar="MB", help="its own memory cap of one job, MiB")
    add.add_argument("--max-running-jobs", type=int, metavar="N", help="its own cap on jobs run at once")
    listing = key_commands.add_parser("list", help="names, admin flags, creation times, own limits (never keys)")
    listing.add_argument("--json", action="store_true", help="print JSON")
    revoke = key_commands.add_parser("revoke", help="delete a key: its next request is refused (401)")
    revoke.add_argument("name")
    return parser


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``fixq`` console script; returns the exit code."""
    args = _parser().parse_args(argv)
    handler = _COMMANDS[args.command]
    try:
        return handler(args)
    except APIError as exc:
        _print_problem(exc)
        return EXIT_INVALID if exc.status in (413, 422) else EXIT_FAILED
    except httpx.TransportError as exc:
        print(f"fixq: cannot reach the API at {_url()}: {exc}", file=sys.stderr)
        return EXIT_UNREACHABLE
    except KeyboardInterrupt:
        return 130


def _url() -> str:
    return os.environ.get("FIXQ_URL", "http://127.0.0.1:8000")


def _print_problem(exc: APIError) -> None:
    print(f"fixq: {exc}", file=sys.stderr)
    if exc.retry_after is not None:
        print(f"fixq: the API asks to try again in {exc.retry_after:g} s (Retry-After)", file=sys.stderr)
    for error in exc.errors:
        print(f"  {error.get('path') or '(document)'}: {error.get('message')}", file=sys.stderr)


def _read_document(file: str) -> dict[str, Any]:
    try:
        text = sys.stdin.read() if file == "-" else Path(file).read_text(encoding="utf-8")
    except OSError as exc:
        _usage_error(f"cannot read {file}: {exc.strerror}")
    except UnicodeDecodeError:
        _usage_error(f"{file} is not UTF-8 text")
    try:
        document = json.loads(text, parse_constant=_refuse_constant)
    except json.JSONDecodeError as exc:
        _usage_error(f"{file} is not valid JSON: {exc.msg} at line {exc.lineno} column {exc.colno}")
    except ValueError as exc:
        _usage_error(f"{file}: {exc}")
    if not isinstance(document, dict):
        _usage_error(f"{file}: a problem document is a JSON object")
    return document


def _refuse_constant(name: str) -> NoReturn:
    raise ValueError(f"{name} is not JSON; write null where a choice is not allowed")


def _usage_error(message: str) -> NoReturn:
    print(f"fixq: {message}", file=sys.stderr)
    raise SystemExit(EXIT_INVALID)


def _cmd_submit(args: argparse.Namespace) -> int:
    document = _read_document(args.file)
    with FixqClient() as client:
        job = client.submit(document, fresh=args.fresh)
        print(job["id"], flush=True)
        if not args.wait:
            return EXIT_OK
        tolerance = float((document.get("solver") or {}).get("tolerance", 1e-6))
        bar = ProgressBar(sys.stderr, tolerance)
        record = client.wait(job["id"], on_progress=bar.update, on_outage=_say_waiting)
        bar.close()
    state = record.get("state")
    print(f"fixq: job {record['id']} {outcome(record)}", file=sys.stderr)
    _print_answer(record)
    return EXIT_OK if state == "done" else EXIT_FAILED


def _cmd_status(args: argparse.Namespace) -> int:
    with FixqClient() as client:
        record = client.status(args.id)
    if args.json:
        print(json.dumps(record, indent=2))
        return EXIT_OK
    progress = record.get("progress") or {}
    rows = [
        ("job", record.get("id")),
        ("label", record.get("label")),
        ("state", outcome(record)),
        ("search", search_answer(record.get("search"))),
        ("iterations", _recorded_or_latest(record, progress, "iterations", "iteration")),
        ("error bound", _recorded_or_latest(record, progress, "error_bound", "error_bound")),
        ("submitted", record.get("submitted_at")),
        ("started", record.get("started_at")),
        ("finished", record.get("finished_at")),
    ]
    for name, value in rows:
        if value not in (None, "", []):
            print(f"{name:<12} {value}")
    for line in fault_lines(record):
        print(line)
    return EXIT_OK


def _say_waiting(reason: str) -> None:
    print(f"\nfixq: {reason}; waiting for it (Ctrl-C stops waiting, not the job)", file=sys.stderr)


def _print_answer(record: dict[str, Any]) -> None:
    """A search's answer and a failed job's faults, under the outcome line of ``fixq submit --wait``."""
    answer = search_answer(record.get("search"))
    for line in ([f"fixq: search {answer}"] if answer else []) + fault_lines(record):
        print(line, file=sys.stderr)


def _recorded_or_latest(record: dict[str, Any], progress: dict[str, Any], key: str, progress_key: str) -> Any:
    """The job record's final ``key`` once there is one, else the latest progress entry's ``progress_key``."""
    value = record.get(key)
    return value if value is not None else progress.get(progress_key)


def _cmd_result(args: argparse.Namespace) -> int:
    with FixqClient() as client:
        result = client.result(args.id, format=args.format)
    text = result if isinstance(result, str) else json.dumps(result)
    if args.output:
        Path(args.output).write_text(text if text.endswith("\n") else text + "\n", encoding="utf-8")
    else:
        sys.stdout.write(text if text.endswith("\n") else text + "\n")
    return EXIT_OK


def _cmd_check(args: argparse.Namespace) -> int:
    document = _read_document(args.file)
    with FixqClient() as client:
        report = client.check(document)
    print(json.dumps(report, indent=2))
    return EXIT_OK


def _cmd_cancel(args: argparse.Namespace) -> int:
    with FixqClient() as client:
        record = client.cancel(args.id)
    print(f"job {record.get('id')}: {record.get('state')}")
    return EXIT_OK


def _cmd_changes(args: argparse.Namespace) -> int:
    """Exit 0, or 1 when the value moved more than --fail-above; a refusal (unknown job, not done, not
    comparable) exits 2, so a cron job tells a drift from a comparison that could not be made."""
    from service.changes_text import describe_changes

    if args.fail_above is not None and not args.fail_above >= 0:
        _usage_error(f"--fail-above must be a number >= 0, not {args.fail_above}")
    try:
        with FixqClient() as client:
            answer = client.changes(args.id, since=args.since)
    except APIError as exc:
        _print_problem(exc)
        return EXIT_INVALID
    sys.stdout.write(json.dumps(answer, indent=2) + "\n" if args.json else describe_changes(answer))
    largest = answer["value"]["sup_norm"]
    if args.fail_above is None:
        return EXIT_OK
    if largest is None:
        print("fixq: no point could be compared, so --fail-above cannot be checked", file=sys.stderr)
        return EXIT_INVALID
    if largest > args.fail_above:
        message = f"the largest value change {largest:.4g} is above --fail-above {args.fail_above:g}"
        print(f"fixq: {message}", file=sys.stderr)
        return EXIT_FAILED
    return EXIT_OK


def _cmd_api(args: argparse.Namespace) -> int:
    import uvicorn

    from service.settings import get_settings

    settings = get_settings()
    _require_redis_url(settings.redis_url, "api")
    host = args.host or settings.host
    _check_open_network(host, auth=settings.auth, allowed=args.allow_open_network or settings.allow_open_network)
    uvicorn.run(
        "service.app:create_app",
        factory=True,
        host=host,
        port=args.port or settings.port,
        timeout_graceful_shutdown=5,
        log_level="info",
        access_log=False,
    )
    return EXIT_OK


def _check_open_network(host: str, *, auth: bool, allowed: bool) -> None:
    """Refuse auth off on a non-loopback address unless confirmed a second time; warn when confirmed."""
    if auth or _is_loopback(host):
        return
    if not allowed:
        _usage_error(
            f"refusing to serve {host} with auth off (FIXQ_AUTH=off): anyone who can reach the port could submit, "
            "read and cancel every job. Listen on loopback (--host 127.0.0.1), or turn auth on (unset FIXQ_AUTH; "
            "make keys with `fixq keys add NAME`), or, on a network you trust, confirm with --allow-open-network "
            "or FIXQ_ALLOW_OPEN_NETWORK=yes"
        )
    print(f"fixq: auth is OFF on {host} (confirmed): anyone who can reach the port can use every job", file=sys.stderr)


def _cmd_keys(args: argparse.Namespace) -> int:
    import redis

    from service.keys import KeyNameError, KeyStore
    from service.settings import get_settings

    settings = get_settings()
    if not settings.redis_url:
        _usage_error("FIXQ_REDIS_URL is not set: `fixq keys` talks to the Redis server of the fixq installation")
    client = redis.Redis.from_url(settings.redis_url, socket_connect_timeout=5, socket_timeout=10)
    keys = KeyStore(client, settings.redis_prefix)
    try:
        if args.keys_command == "add":
            limits = {
                "max_active_jobs": args.max_active_jobs,
                "max_active_high_jobs": args.max_active_high_jobs,
                "max_problem_mb": args.max_problem_mb,
                "max_running_jobs": args.max_running_jobs,
            }
            key = keys.add(args.name, admin=args.admin, limits={k: v for k, v in limits.items() if v is not None})
            kind = "an admin key" if args.admin else "a key"
            print(
                f"fixq: made {kind} for {args.name!r}; it is shown only once (fixq stores only its SHA-256), so "
                "keep it now; send it as Authorization: Bearer KEY, or set FIXQ_KEY for the CLI",
                file=sys.stderr,
            )
            print(key, flush=True)
            return EXIT_OK
        if args.keys_command == "list":
            _print_keys(keys.list_keys(), as_json=args.json)
            return EXIT_OK
        if not keys.revoke(args.name):
            print(f"fixq: there is no key named {args.name!r}", file=sys.stderr)
            return EXIT_FAILED
        print(f"fixq: revoked the key of {args.name!r}; its jobs stay, and its next request is refused")
        return EXIT_OK
    except (KeyNameError, ValueError) as exc:
        _usage_error(str(exc))
    except redis.RedisError as exc:
        print(f"fixq: cannot reach Redis at {_without_password(settings.redis_url)}: {exc}", file=sys.stderr)
        return EXIT_UNREACHABLE
    finally:
        client.close()


def _print_keys(records: list[Any], *, as_json: bool) -> None:
    rows = [{"name": r.name, "admin": r.admin, "created_at": r.created_at, "limits": r.limits} for r in records]
    if as_json:
        print(json.dumps(rows, indent=2))
        return
    width = max([4, *(len(row["name"]) for row in rows)])
    print(f"{'name':<{width}}  admin  {'created':<20}  limits")
    for row in rows:
        limits = " ".join(f"{name}={value:g}" for name, value in row["limits"].items()) or "-"
        print(f"{row['name']:<{width}}  {'yes' if row['admin'] else 'no':<5}  {row['created_at'] or '?':<20}  {limits}")


def _without_password(url: str) -> str:
    """``url`` with any password replaced by ``***`` (for messages)."""
    scheme, sep, rest = url.partition("://")
    credentials, at, host = rest.rpartition("@")
    if not at or ":" not in credentials:
        return url
    return f"{scheme}{sep}{credentials.split(':', 1)[0]}:***@{host}"


def _cmd_worker(args: argparse.Namespace) -> int:
    from service.settings import get_settings

    _require_redis_url(get_settings().redis_url, "worker")
    from service.supervisor import supervise

    return supervise(burst=args.burst)


def _require_redis_url(url: str | None, command: str) -> None:
    if not url:
        _usage_error(
            f"FIXQ_REDIS_URL is not set: `fixq {command}` needs a Redis server (`fixq run` starts one of its own)"
        )


def _is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def _cmd_run(args: argparse.Namespace) -> int:
    from service.settings import get_settings

    settings = get_settings()
    host = args.host or settings.host
    port = args.port or settings.port
    env = dict(os.environ)
    auth_on = settings.auth
    if "FIXQ_AUTH" not in os.environ and _is_loopback(host):
        env["FIXQ_AUTH"] = "off"
        auth_on = False
    open_network = args.allow_open_network or settings.allow_open_network
    _check_open_network(host, auth=auth_on, allowed=open_network)
    signal.signal(signal.SIGTERM, raise_stop)
    signal.signal(signal.SIGINT, raise_stop)
    redis_server = None
    children: list[tuple[str, subprocess.Popen[bytes]]] = []
    try:
        if settings.redis_url is None:
            from service.embedded_redis import start_embedded_redis

            redis_server = start_embedded_redis(settings)
            env["FIXQ_REDIS_URL"] = redis_server.url
            print(f"fixq: embedded Redis at {redis_server.url} (data in {settings.embedded_redis_dir})", flush=True)
        else:
            print(f"fixq: Redis at {settings.redis_url}", flush=True)
        if not auth_on:
            reason = "FIXQ_AUTH=off" if "FIXQ_AUTH" in os.environ else f"{host} is loopback"
            print(f"fixq: auth is OFF ({reason}): anyone who can reach the port can submit and cancel", flush=True)
        else:
            print(
                "fixq: auth is on: requests need Authorization: Bearer KEY "
                f"(make one with FIXQ_REDIS_URL={_without_password(env['FIXQ_REDIS_URL'])} fixq keys add NAME)",
                flush=True,
            )
        command = [sys.executable, "-m", "service.cli"]
        api_command = [*command, "api", "--host", host, "--port", str(port)]
        if open_network:
            api_command.append("--allow-open-network")
        children.append(("api", spawn(api_command, env)))
        children.append(("worker", spawn([*command, "worker"], env)))
        print(f"fixq: API on http://{host}:{port} and one worker; Ctrl-C stops everything", flush=True)
        while True:
            for name, child in children:
                if child.poll() is not None:
                    print(f"fixq: the {name} process exited with {child.returncode}; stopping", file=sys.stderr)
                    return EXIT_FAILED
            time.sleep(0.2)
    except Stop:
        print("fixq: stopping", flush=True)
        return EXIT_OK
    finally:
        signal.signal(signal.SIGINT, signal.SIG_IGN)
        signal.signal(signal.SIGTERM, signal.SIG_IGN)
        for name, child in children:
            stop_child(child, repeat_after_s=WARM_STOP_S if name == "worker" else None)
        if redis_server is not None:
            redis_server.stop()


def _cmd_examples(args: argparse.Namespace) -> int:
    from service.examples import UnknownExample, list_examples, load_example

    if args.name is None:
        for example in list_examples():
            points = f"{example['points']} points" if example["points"] else ""
            print(f"{example['name']:<22} {example['kind']:<8} {points:>13}  {example['label']}")
        return EXIT_OK
    try:
        document = load_example(args.name)
    except UnknownExample as exc:
        print(f"fixq: {exc}", file=sys.stderr)
        return EXIT_INVALID
    text = json.dumps(document, indent=2) + "\n"
    if args.output:
        Path(args.output).write_text(text)
        print(f"wrote {args.output}", file=sys.stderr)
    else:
        sys.stdout.write(text)
    return EXIT_OK


_COMMANDS = {
    "examples": _cmd_examples,
    "run": _cmd_run,
    "api": _cmd_api,
    "worker": _cmd_worker,
    "submit": _cmd_submit,
    "status": _cmd_status,
    "result": _cmd_result,
    "check": _cmd_check,
    "cancel": _cmd_cancel,
    "changes": _cmd_changes,
    "keys": _cmd_keys,
}

if __name__ == "__main__":
    sys.exit(main())
