"""The transport floor for the HTTP benchmarks: a bare ASGI app that reads the request body and
answers a fixed pick-shaped JSON (so keepset's own client can call it), served by the same
uvicorn (httptools, uvloop) as keepset, on TCP or a Unix socket (uvicorn's ``--uds``).

A JSON body with ``logits_shm`` is treated as keepset treats it: the segment named in
``KEEPSET_SHM_DIR`` is mapped and viewed (keepset's own reader, keeping mappings open between
requests as a keepset worker does), then let go.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import orjson

from service.shm import SegmentMaps, ShmRef, read_segment

_SHM_DIR = Path(os.environ["KEEPSET_SHM_DIR"]) if os.environ.get("KEEPSET_SHM_DIR") else None
_MAPS = None if _SHM_DIR is None else SegmentMaps(_SHM_DIR)
_REPLY = orjson.dumps(
    {
        "request_id": "floor",
        "client": "floor",
        "policy": "floor",
        "version": 0,
        "arm": "floor",
        "seed": 0,
        "tokens": [0],
        "rows": [
            {
                "token": 0,
                "prob": 1.0,
                "logprob": 0.0,
                "entropy": 0.0,
                "kept": 1,
                "kept_mass": 1.0,
                "fallback": None,
            }
        ],
    }
)


def _no_limits(rows: int, vocab: int) -> None:
    return None


async def app(scope: dict[str, Any], receive: Any, send: Any) -> None:
    if scope["type"] != "http":
        return
    chunks = []
    more = True
    while more:
        message = await receive()
        chunks.append(message.get("body", b""))
        more = message.get("more_body", False)
    if dict(scope["headers"]).get(b"content-type", b"").startswith(b"application/json"):
        ref = ShmRef.model_validate(orjson.loads(b"".join(chunks))["logits_shm"])
        read_segment(ref, _SHM_DIR, _no_limits, _MAPS).close()
    await send(
        {
            "type": "http.response.start",
            "status": 200,
            "headers": [(b"content-type", b"application/json")],
        }
    )
    await send({"type": "http.response.body", "body": _REPLY})
