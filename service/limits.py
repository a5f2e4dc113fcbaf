"""Request body size limit as a pure ASGI middleware.

It counts the bytes as they stream in (a ``Content-Length`` header can lie, and chunked uploads
have none) and answers 413 itself. Raising an exception from inside ``receive`` would reach the
app's form parser and come out as a 400, so instead the middleware hands the app an
``http.disconnect``, swallows whatever the app tries to send after that, and sends the 413.
"""
from __future__ import annotations

import json


class BodySizeLimit:
    def __init__(self, app, max_body_bytes: int):
        self.app = app
        self.max_body_bytes = int(max_body_bytes)

    async def __call__(self, scope, receive, send):
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        limit = self.max_body_bytes
        for name, value in scope.get("headers", ()):
            if name == b"content-length":
                try:
                    declared = int(value)
                except ValueError:
                    declared = -1
                if declared > limit:
                    await self._send_413(send, limit)
                    return
        received = 0
        exceeded = False
        started = False

        async def limited_receive():
            nonlocal received, exceeded
            if exceeded:
                return {"type": "http.disconnect"}
            message = await receive()
            if message["type"] == "http.request":
                received += len(message.get("body", b""))
                if received > limit:
                    exceeded = True
                    return {"type": "http.disconnect"}
            return message

        async def guarded_send(message):
            nonlocal started
            if exceeded and not started:
                return  # the app's answer to the fake disconnect; ours goes out instead
            if message["type"] == "http.response.start":
                started = True
            await send(message)

        try:
            await self.app(scope, limited_receive, guarded_send)
        except Exception:
            if not exceeded:
                raise
        if exceeded and not started:
            await self._send_413(send, limit)

    @staticmethod
    async def _send_413(send, limit: int) -> None:
        # a problem document (RFC 9457), as service.app answers every other error
        body = json.dumps({"type": "about:blank", "title": "Content Too Large", "status": 413,
                           "detail": f"request body larger than the limit of {limit} bytes"}).encode()
        await send({"type": "http.response.start", "status": 413,
                    "headers": [(b"content-type", b"application/problem+json"),
                                (b"content-length", str(len(body)).encode()),
                                (b"connection", b"close")]})
        await send({"type": "http.response.body", "body": body})
