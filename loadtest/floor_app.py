"""The transport floor for the HTTP benchmark: a bare ASGI app that reads the request body and
answers a tiny JSON, served by the same uvicorn (httptools, uvloop) as keepset."""

from __future__ import annotations

from typing import Any


async def app(scope: dict[str, Any], receive: Any, send: Any) -> None:
    if scope["type"] != "http":
        return
    size = 0
    more = True
    while more:
        message = await receive()
        size += len(message.get("body", b""))
        more = message.get("more_body", False)
    body = b'{"bytes": %d}' % size
    await send(
        {
            "type": "http.response.start",
            "status": 200,
            "headers": [(b"content-type", b"application/json")],
        }
    )
    await send({"type": "http.response.body", "body": body})
