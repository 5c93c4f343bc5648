"""One delivery attempt on the wire: a POST to the addresses a webhook target was checked to have.

The connection goes to the checked address itself, with the host name in
``Host`` and, for https, in TLS SNI and the certificate check, so that the
address check and the connection cannot see two different answers from DNS.
Redirects are not followed, proxies from the environment are not used, and
the answer's body is never read.
"""

from __future__ import annotations

import ipaddress
from collections.abc import Sequence

import httpx

__all__ = ["post"]


def post(
    url: str,
    host: str,
    port: int,
    addresses: Sequence[ipaddress.IPv4Address | ipaddress.IPv6Address],
    body: bytes,
    headers: dict[str, str],
    timeout_s: float,
) -> tuple[int | None, str | None]:
    """POST ``body`` to ``addresses`` in turn (each connect, send and wait within ``timeout_s``);
    ``(status, None)`` or ``(None, error)``."""
    parsed = httpx.URL(url)
    default_port = 443 if parsed.scheme == "https" else 80
    host_header = host if port == default_port else f"{_bracketed(host)}:{port}"
    error = "no address to connect to"
    with httpx.Client(timeout=httpx.Timeout(timeout_s), follow_redirects=False, trust_env=False) as client:
        for address in addresses:
            request = client.build_request(
                "POST",
                parsed.copy_with(host=str(address)),
                content=body,
                headers={**headers, "Host": host_header},
                extensions={"sni_hostname": host} if parsed.scheme == "https" else {},
            )
            try:
                response = client.send(request, stream=True)
            except httpx.ConnectError as exc:
                error = f"could not connect to {address}: {exc}"
                continue
            except httpx.HTTPError as exc:
                return None, f"{type(exc).__name__}: {exc}"[:300]
            response.close()
            return response.status_code, None
    return None, error[:300]


def _bracketed(host: str) -> str:
    return f"[{host}]" if ":" in host else host
