"""Solver checkpoints in Redis: the ``checkpoint`` object of an execution, and its bytes.

``RedisCheckpoint`` is what ``service.task`` hands to ``solve``: ``has_state`` says whether one is stored
(without decoding it); ``save``
stores the state if its iteration is not older than the stored one and the
lease is still the execution's (a failed save is logged and the solve goes
on); ``load`` returns it and rewrites the stored log to the checkpoint's.
``encode_checkpoint`` and ``decode_checkpoint`` give the bytes: arrays as
``np.save`` data, everything else as JSON, compressed; the pair round-trips
every array bit for bit, so a resumed solve ends exactly where an
uninterrupted one does.
"""

from __future__ import annotations

import io
import logging
import zlib
from typing import Any

import numpy as np
import orjson
import redis

__all__ = ["RedisCheckpoint", "decode_checkpoint", "encode_checkpoint"]

logger = logging.getLogger("fixq.task")


def encode_checkpoint(state: dict[str, Any]) -> bytes:
    """Compress a solver state: arrays as ``np.save`` bytes, the rest as JSON."""
    arrays: list[tuple[str, bytes]] = []
    plain: dict[str, Any] = {}
    for name, value in state.items():
        if isinstance(value, np.ndarray):
            buffer = io.BytesIO()
            np.save(buffer, value, allow_pickle=False)
            arrays.append((name, buffer.getvalue()))
        else:
            plain[name] = value
    header = orjson.dumps(
        {"plain": plain, "arrays": [[name, len(data)] for name, data in arrays]}, option=orjson.OPT_SERIALIZE_NUMPY
    )
    return zlib.compress(len(header).to_bytes(8, "big") + header + b"".join(data for _, data in arrays), 1)


def decode_checkpoint(payload: bytes) -> dict[str, Any]:
    """Inverse of ``encode_checkpoint``."""
    raw = zlib.decompress(payload)
    size = int.from_bytes(raw[:8], "big")
    header = orjson.loads(raw[8 : 8 + size])
    state: dict[str, Any] = dict(header["plain"])
    offset = 8 + size
    for name, length in header["arrays"]:
        state[name] = np.load(io.BytesIO(raw[offset : offset + length]), allow_pickle=False)
        offset += length
    return state


class RedisCheckpoint:
    """The ``checkpoint`` object ``service.task`` hands to ``solve`` for one execution.

    ``execution`` is that execution: its ``store``, ``job_id``, ``token``,
    ``replace_log(entries)`` and ``still_ours()`` (take a lapsed lease back,
    or mark it lost).
    """

    def __init__(self, execution: Any) -> None:
        self.execution = execution

    def has_state(self) -> bool:
        """Whether a checkpoint is stored, without reading it (``worker.coarse_solve`` asks this before a
        solve's own ``load``: a resumed solve then decodes its state once)."""
        execution = self.execution
        return bool(execution.store.redis.exists(execution.store.keys.checkpoint(execution.job_id)))

    def load(self) -> dict[str, Any] | None:
        execution = self.execution
        stored = execution.store.load_checkpoint(execution.job_id)
        if stored is None:
            return None
        iteration, payload = stored
        try:
            state = decode_checkpoint(payload)
        except (ValueError, OSError, zlib.error):
            logger.warning("job %s: unreadable checkpoint ignored", execution.job_id, exc_info=True)
            return None
        log = [entry for entry in state.get("log", []) if entry.get("iteration", 0) <= iteration]
        execution.replace_log(log)
        logger.info("job %s: resuming from the checkpoint of iteration %d", execution.job_id, iteration)
        return state

    def save(self, state: dict[str, Any]) -> None:
        execution = self.execution
        iteration, payload = int(state["iteration"]), encode_checkpoint(state)
        try:
            outcome = execution.store.save_checkpoint(execution.job_id, execution.token, iteration, payload)
            if outcome == "lease_lost" and execution.still_ours():
                execution.store.save_checkpoint(execution.job_id, execution.token, iteration, payload)
        except redis.RedisError as exc:
            # The solve goes on; the next save (or the result) catches up once Redis is back.
            logger.warning("job %s: could not save a checkpoint (%s)", execution.job_id, exc)
