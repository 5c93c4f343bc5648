"""The dashboard: ``GET /`` (the job list), ``GET /jobs/{id}`` (one job) and ``GET /jobs/{id}/changes?since=ID``
(what moved since an earlier job).

The pages are static HTML shells from ``service/dashboard/`` that read the
JSON API from the browser (plain JavaScript, no framework, nothing fetched
from outside the service).  With auth on, the browser signs in once: the key
is posted to ``POST /ui/session``, checked, and kept in an HttpOnly,
SameSite=Strict cookie named :data:`SESSION_COOKIE`, which the API's ``Owner``
dependency accepts in place of an ``Authorization: Bearer`` header.  A key
never appears in a URL.
"""

from __future__ import annotations

from pathlib import Path
from string import Template
from typing import Any
from urllib.parse import parse_qs, urlsplit

from fastapi import APIRouter, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response

from service.deps import Caller, SettingsDep, current_owner
from service.problems import Problem
from service.settings import Settings
from service.store import is_job_id

__all__ = ["SESSION_COOKIE", "SESSION_MAX_AGE_S", "router"]

SESSION_COOKIE = "fixq_session"
"""Name of the cookie holding a signed-in dashboard's API key."""
SESSION_MAX_AGE_S = 30 * 24 * 3600
"""Lifetime of that cookie in seconds (30 days); signing out deletes it at once."""
MAX_FORM_BYTES = 4096
"""Largest accepted sign-in form body, in bytes."""

DASHBOARD_DIR = Path(__file__).resolve().parent.parent / "dashboard"
STATIC_TYPES = {
    "dashboard.css": "text/css; charset=utf-8",
    "common.js": "text/javascript; charset=utf-8",
    "jobs.js": "text/javascript; charset=utf-8",
    "job.js": "text/javascript; charset=utf-8",
    "changes.js": "text/javascript; charset=utf-8",
    "search.js": "text/javascript; charset=utf-8",
    "favicon.svg": "image/svg+xml",
}
# Everything the pages load comes from this service; no inline script or style.
PAGE_HEADERS = {
    "Content-Security-Policy": (
        "default-src 'self'; script-src 'self'; style-src 'self'; img-src 'self' data:; "
        "connect-src 'self'; form-action 'self'; frame-ancestors 'none'; base-uri 'none'"
    ),
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "same-origin",
    "Cache-Control": "no-cache",
}

router = APIRouter(include_in_schema=False)


def _page(title: str, body: str, script: str, page: str) -> HTMLResponse:
    shell = Template((DASHBOARD_DIR / "page.html").read_text(encoding="utf-8"))
    html = shell.substitute(
        title=title, body=(DASHBOARD_DIR / body).read_text(encoding="utf-8"), script=script, page=page
    )
    return HTMLResponse(html, headers=PAGE_HEADERS)


@router.get("/", response_class=HTMLResponse)
def job_list_page() -> HTMLResponse:
    """The dashboard's job list."""
    return _page("jobs", "jobs.html", "jobs.js", "jobs")


@router.get("/jobs/{job_id}", response_class=HTMLResponse)
def job_page(job_id: str) -> HTMLResponse:
    """The dashboard's page of one job (the job itself is read by the page, with the caller's key)."""
    if not is_job_id(job_id):
        raise Problem(404, "not-found", f"no job {job_id!r}: job ids are 16 lowercase hexadecimal characters")
    return _page("job", "job.html", "job.js", "job")


@router.get("/jobs/{job_id}/changes", response_class=HTMLResponse)
def changes_page(job_id: str) -> HTMLResponse:
    """What moved between this job and an earlier one (``?since=ID``), read by the page with the caller's key."""
    if not is_job_id(job_id):
        raise Problem(404, "not-found", f"no job {job_id!r}: job ids are 16 lowercase hexadecimal characters")
    return _page("changes", "changes.html", "changes.js", "changes")


@router.get("/ui/static/{name}")
def static_file(name: str) -> Response:
    """One of the dashboard's own CSS, JavaScript or icon files."""
    if name not in STATIC_TYPES:
        raise Problem(404, "not-found", f"no dashboard file {name!r}")
    return Response(
        (DASHBOARD_DIR / name).read_bytes(),
        media_type=STATIC_TYPES[name],
        headers={"Cache-Control": "no-cache", "X-Content-Type-Options": "nosniff"},
    )


@router.get("/ui/session")
def session_state(request: Request, settings: SettingsDep) -> dict[str, Any]:
    """Whether auth is on and whether this browser is signed in (and as whom)."""
    if not settings.auth:
        return {"auth": False, "signed_in": False, "owner": None}
    caller = _caller_or_none(request, settings)
    return {"auth": True, "signed_in": caller is not None, "owner": caller.owner if caller else None}


@router.post("/ui/session")
async def sign_in(request: Request, settings: SettingsDep) -> Response:
    """Check a key posted from the sign-in form and keep it in the session cookie."""
    _check_same_origin(request)
    form = await _form(request)
    target = _local_path(form.get("next", "/"))
    if not settings.auth:
        return RedirectResponse(target, status_code=303)
    key = form.get("key", "").strip()
    if not key or _caller_with_key(request, settings, key) is None:
        separator = "&" if "?" in target else "?"
        return RedirectResponse(f"{target}{separator}signin=failed", status_code=303)
    response = RedirectResponse(target, status_code=303)
    response.set_cookie(
        SESSION_COOKIE,
        key,
        max_age=SESSION_MAX_AGE_S,
        path="/",
        httponly=True,
        samesite="strict",
        secure=request.url.scheme == "https",
    )
    return response


@router.post("/ui/logout")
def sign_out(request: Request) -> Response:
    """Forget this browser's key (delete the session cookie)."""
    _check_same_origin(request)
    response = RedirectResponse("/", status_code=303)
    response.delete_cookie(SESSION_COOKIE, path="/", httponly=True, samesite="strict")
    return response


def _caller_or_none(request: Request, settings: Settings) -> Caller | None:
    """The caller the API's ``Owner`` dependency sees in this request, or None when it refuses (401)."""
    try:
        return current_owner(request, settings)
    except Problem as refusal:
        if refusal.status == 401:
            return None
        raise


def _caller_with_key(request: Request, settings: Settings, key: str) -> Caller | None:
    """Whom ``key`` signs in as, asked of the ``Owner`` dependency itself (so there is one key check)."""
    headers = [(name, value) for name, value in request.scope["headers"] if name not in (b"authorization", b"cookie")]
    scope = {**request.scope, "headers": [*headers, (b"authorization", f"Bearer {key}".encode("latin-1", "replace"))]}
    return _caller_or_none(Request(scope, request.receive), settings)


async def _form(request: Request) -> dict[str, str]:
    """The urlencoded form fields (first value of each), without python-multipart."""
    content_type = request.headers.get("content-type", "").split(";")[0].strip().lower()
    if content_type != "application/x-www-form-urlencoded":
        raise Problem(415, "unsupported-media-type", "post the sign-in form as application/x-www-form-urlencoded")
    body = await request.body()
    if len(body) > MAX_FORM_BYTES:
        raise Problem(413, "body-too-large", f"a sign-in form is at most {MAX_FORM_BYTES} bytes")
    fields = parse_qs(body.decode("utf-8", errors="replace"), keep_blank_values=True)
    return {name: values[0] for name, values in fields.items()}


def _local_path(target: str) -> str:
    """``target`` if it is a path on this site, else ``/`` (no open redirects)."""
    if target.startswith("/") and not target.startswith("//") and "\\" not in target:
        return target
    return "/"


def _check_same_origin(request: Request) -> None:
    """Refuse sign-in and sign-out posts that a browser says came from another site."""
    fetch_site = request.headers.get("sec-fetch-site")
    if fetch_site is not None:
        cross_site = fetch_site not in ("same-origin", "none")
    else:
        origin = request.headers.get("origin")
        cross_site = bool(origin) and origin != "null" and urlsplit(origin).netloc != request.headers.get("host")
    if cross_site:
        raise Problem(403, "forbidden", "sign-in and sign-out must be posted from this dashboard")
