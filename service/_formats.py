"""Encodings shared by fixq's Redis-backed resources: ISO-8601 timestamps and list cursors.

A list cursor names the last item of a page by its index score (milliseconds
since the epoch) and its id, so the next page starts right after it even when
several items share a millisecond.
"""

from __future__ import annotations

import base64
import re
import time
from datetime import datetime, timezone

__all__ = ["decode_cursor", "encode_cursor", "is_resource_id", "iso_utc"]

_RESOURCE_ID = re.compile(r"[0-9a-f]{16}")


def is_resource_id(value: object) -> bool:
    """True for a well-formed job or sweep id (16 lowercase hex characters)."""
    return isinstance(value, str) and _RESOURCE_ID.fullmatch(value) is not None


def iso_utc(seconds: float | None = None, *, timespec: str = "milliseconds") -> str:
    """``seconds`` since the epoch (default: now) as ISO-8601 UTC ending in ``Z``."""
    moment = datetime.fromtimestamp(time.time() if seconds is None else seconds, timezone.utc)
    return moment.isoformat(timespec=timespec).replace("+00:00", "Z")


def encode_cursor(member: bytes, score: float) -> str:
    """The opaque cursor of the item ``member`` whose index score is ``score`` (milliseconds)."""
    return base64.urlsafe_b64encode(b"%d:%s" % (int(score), member)).decode().rstrip("=")


def decode_cursor(cursor: str | None) -> tuple[float, bytes] | None:
    """(score, member) of a cursor, None for no cursor; ``ValueError`` for a malformed one."""
    if cursor is None or cursor == "":
        return None
    try:
        raw = base64.urlsafe_b64decode(cursor + "=" * (-len(cursor) % 4))
        score, member = raw.split(b":", 1)
        if not is_resource_id(member.decode()):
            raise ValueError
        return float(int(score)), member
    except (ValueError, UnicodeDecodeError):
        raise ValueError(f"malformed cursor {cursor!r}") from None
