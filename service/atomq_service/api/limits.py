"""Request limits applied before any route runs: body size (plain and gzip-inflated) and
requests per minute."""

from __future__ import annotations

import hashlib
import json
import time
import zlib
from collections import defaultdict, deque

from starlette.types import ASGIApp, Message, Receive, Scope, Send


async def _refuse(send: Send, status: int, code: str, detail: str, retry_after: int = 0) -> None:
    body = json.dumps({"detail": detail, "code": code}).encode()
    headers = [(b"content-type", b"application/json"), (b"content-length", str(len(body)).encode())]
    if retry_after:
        headers.append((b"retry-after", str(retry_after).encode()))
    await send({"type": "http.response.start", "status": status, "headers": headers})
    await send({"type": "http.response.body", "body": body})


def _replaying(body: bytes, receive: Receive) -> Receive:
    """A receive that hands the app the body read here, whole, then the real messages."""
    replayed = False

    async def replay() -> Message:
        nonlocal replayed
        if replayed:
            return await receive()
        replayed = True
        return {"type": "http.request", "body": body, "more_body": False}

    return replay


class BodySizeLimit:
    """413 for a body over the limit, whether it declares its length or streams. A streamed
    body is read up to the limit here and handed on whole."""

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
        headers = dict(scope["headers"])
        declared = headers.get(b"content-length")
        if declared is not None:
            if declared.isdigit() and int(declared) > self.max_bytes:
                await _refuse(send, 413, "body_too_large", message)
                return
            await self.app(scope, receive, send)
            return
        chunks: list[bytes] = []
        size = 0
        while True:
            event = await receive()
            if event["type"] != "http.request":
                break
            chunk = event.get("body", b"")
            size += len(chunk)
            if size > self.max_bytes:
                await _refuse(send, 413, "body_too_large", message)
                return
            chunks.append(chunk)
            if not event.get("more_body", False):
                break
        await self.app(scope, _replaying(b"".join(chunks), receive), send)


class RateLimit:
    """Requests per minute per bearer token, counted in this process (a sliding window).
    With several API processes each counts its own share."""

    def __init__(self, app: ASGIApp, per_minute: int) -> None:
        self.app = app
        self.per_minute = per_minute
        self.recent: defaultdict[str, deque[float]] = defaultdict(deque)
        self.last_sweep = time.monotonic()

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        authorization = dict(scope.get("headers", [])).get(b"authorization")
        if scope["type"] != "http" or not self.per_minute or authorization is None:
            await self.app(scope, receive, send)
            return
        # The scheme is case-insensitive ("Bearer", "bearer"): count the credentials alone,
        # hashed, so the limiter never holds a secret.
        parts = authorization.split(None, 1)
        credentials = parts[-1].strip() if parts else b""
        key = hashlib.sha256(credentials).hexdigest()
        now = time.monotonic()
        if now - self.last_sweep >= 60:  # forget tokens idle for a minute: memory stays bounded
            self.last_sweep = now
            idle = [k for k, times in self.recent.items() if not times or times[-1] <= now - 60]
            for stale in idle:
                del self.recent[stale]
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


class GzipRequest:
    """Accepts request bodies sent with `Content-Encoding: gzip` (the client compresses
    large structures), inflating them under the same size limit as plain bodies: a small
    compressed body cannot expand past ATOMQ_MAX_BODY_BYTES."""

    def __init__(self, app: ASGIApp, max_bytes: int) -> None:
        self.app = app
        self.max_bytes = max_bytes

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        headers = dict(scope.get("headers", [])) if scope["type"] == "http" else {}
        encoding = headers.get(b"content-encoding", b"").strip().lower()
        if not encoding or encoding == b"identity":
            await self.app(scope, receive, send)
            return
        if encoding != b"gzip":
            await _refuse(
                send,
                415,
                "unsupported_encoding",
                f"Content-Encoding {encoding.decode(errors='replace')!r} is not accepted; "
                "send the body plain or gzip-compressed",
            )
            return
        compressed = bytearray()
        while True:
            event = await receive()
            if event["type"] != "http.request":
                break
            compressed += event.get("body", b"")
            if not event.get("more_body", False):
                break
        inflater = zlib.decompressobj(16 + zlib.MAX_WBITS)  # gzip framing
        try:
            body = inflater.decompress(bytes(compressed), self.max_bytes + 1)
            complete = inflater.eof
        except zlib.error as exc:
            await _refuse(send, 400, "bad_gzip", f"the body is not valid gzip ({exc})")
            return
        if len(body) > self.max_bytes:
            await _refuse(
                send,
                413,
                "body_too_large",
                f"request body over {self.max_bytes} bytes once inflated "
                "(ATOMQ_MAX_BODY_BYTES); split the work into several requests",
            )
            return
        if not complete:
            await _refuse(send, 400, "bad_gzip", "the gzip body ends before its last block")
            return
        plain_headers = [
            (name, value)
            for name, value in scope["headers"]
            if name not in (b"content-encoding", b"content-length")
        ]
        plain_headers.append((b"content-length", str(len(body)).encode()))
        await self.app({**scope, "headers": plain_headers}, _replaying(body, receive), send)
