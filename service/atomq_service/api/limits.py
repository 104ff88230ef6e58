"""Request limits applied before any route runs: body size and requests per minute."""

from __future__ import annotations

import hashlib
import json
import time
from collections import defaultdict, deque

from starlette.types import ASGIApp, Message, Receive, Scope, Send


async def _refuse(send: Send, status: int, code: str, detail: str, retry_after: int = 0) -> None:
    body = json.dumps({"detail": detail, "code": code}).encode()
    headers = [(b"content-type", b"application/json"), (b"content-length", str(len(body)).encode())]
    if retry_after:
        headers.append((b"retry-after", str(retry_after).encode()))
    await send({"type": "http.response.start", "status": status, "headers": headers})
    await send({"type": "http.response.body", "body": body})


class BodySizeLimit:
    """413 for a body over the limit, whether it declares its length or streams."""

    def __init__(self, app: ASGIApp, max_bytes: int) -> None:
        self.app = app
        self.max_bytes = max_bytes

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        message = (
            f"request body over {self.max_bytes} bytes (ATOMQ_MAX_BODY_BYTES); "
            "split the work into several jobs"
        )
        declared = dict(scope["headers"]).get(b"content-length")
        if declared is not None and declared.isdigit() and int(declared) > self.max_bytes:
            await _refuse(send, 413, "body_too_large", message)
            return
        received = 0
        started = False

        async def counting_receive() -> Message:
            nonlocal received
            event = await receive()
            if event["type"] == "http.request":
                received += len(event.get("body", b""))
                if received > self.max_bytes:
                    raise _TooLarge()
            return event

        async def tracking_send(event: Message) -> None:
            nonlocal started
            started = started or event["type"] == "http.response.start"
            await send(event)

        try:
            await self.app(scope, counting_receive, tracking_send)
        except _TooLarge:
            if not started:
                await _refuse(send, 413, "body_too_large", message)


class _TooLarge(Exception):
    pass


class RateLimit:
    """Requests per minute per bearer token, counted in this process (a sliding window).
    With several API processes each counts its own share."""

    def __init__(self, app: ASGIApp, per_minute: int) -> None:
        self.app = app
        self.per_minute = per_minute
        self.recent: defaultdict[str, deque[float]] = defaultdict(deque)

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        authorization = dict(scope.get("headers", [])).get(b"authorization")
        if scope["type"] != "http" or not self.per_minute or authorization is None:
            await self.app(scope, receive, send)
            return
        key = hashlib.sha256(authorization).hexdigest()  # never keep the secret itself
        now = time.monotonic()
        window = self.recent[key]
        while window and window[0] <= now - 60:
            window.popleft()
        if len(window) >= self.per_minute:
            wait = int(60 - (now - window[0])) + 1
            await _refuse(
                send,
                429,
                "rate_limited",
                f"more than {self.per_minute} requests in a minute with this token "
                f"(ATOMQ_REQUESTS_PER_MINUTE); retry in {wait} s",
                retry_after=wait,
            )
            return
        window.append(now)
        await self.app(scope, receive, send)
