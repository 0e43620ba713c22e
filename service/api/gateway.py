"""What every request passes through first: its id, the body's media type, the access log line.

One plain ASGI middleware (no BaseHTTPMiddleware: that costs a task and a stream per request),
outermost, so that even a 413 or a 415 carries the id and gets its line:

- `X-Request-ID`: the caller's, if it is 1 to 128 visible ASCII characters, else one made here;
  echoed on every answer, named in every problem body (`request_id`, see errors.py) and in the
  access log line.
- A body whose media type is not JSON (or CSV where the route's request body names text/csv) is
  answered 415 before anything reads it; a body without a Content-Type counts as not JSON.
- An exception no handler turned into a response becomes the 500 problem here, logged once under
  the request id (access_log.py rate-limits repeated tracebacks).
"""

from __future__ import annotations

import itertools
import re
import secrets
import time
from collections.abc import Iterable, Sequence
from typing import Any

from starlette.types import ASGIApp, Message, Receive, Scope, Send

from .access_log import AccessLog
from .errors import UnsupportedMediaType, response_for
from .request_context import RequestInfo, current_request

# A caller's X-Request-ID that is kept; the OpenAPI declares the same pattern.
REQUEST_ID_PATTERN = "[!-~]{1,128}"
_CALLER_ID = re.compile(REQUEST_ID_PATTERN.encode())
_JSON = b"application/json"
_CSV = b"text/csv"


def csv_routes(routes: Iterable[Any]) -> list[re.Pattern[str]]:
    """Path patterns of the routes whose documented request body accepts text/csv."""
    found = []
    for route in routes:
        extra = getattr(route, "openapi_extra", None) or {}
        content = extra.get("requestBody", {}).get("content", {})
        if "text/csv" in content and hasattr(route, "path_regex"):
            found.append(route.path_regex)
    return found


class Gateway:
    def __init__(self, app: ASGIApp, log: AccessLog, csv_paths: Sequence[re.Pattern[str]] = ()) -> None:
        self.app = app
        self.log = log
        self.csv_paths = list(csv_paths)
        self._stem = secrets.token_hex(6)
        self._counter = itertools.count(int.from_bytes(secrets.token_bytes(3), "big"))

    def _media_type_refused(self, content_type: bytes | None, path: str) -> str | None:
        if content_type is None:
            return "a request body needs Content-Type: application/json"
        media = content_type.split(b";", 1)[0].strip().lower()
        if media == _JSON or (media.startswith(b"application/") and media.endswith(b"+json")):
            return None
        if media == _CSV and any(p.match(path) for p in self.csv_paths):
            return None
        shown = media.decode("latin-1")[:100]
        wanted = "application/json or text/csv" if any(p.match(path) for p in self.csv_paths) else "application/json"
        return f"request bodies are {wanted}, not {shown!r}"

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        start = time.perf_counter()
        caller_id: bytes | None = None
        content_type: bytes | None = None
        has_body = False
        for name, value in scope["headers"]:
            if name == b"x-request-id":
                caller_id = value
            elif name == b"content-type":
                content_type = value
            elif name == b"content-length":
                has_body = value.strip() not in (b"0", b"")
            elif name == b"transfer-encoding":
                has_body = True
        if caller_id is not None and _CALLER_ID.fullmatch(caller_id):
            request_id = caller_id.decode("ascii")
        else:
            request_id = f"{self._stem}{next(self._counter):08x}"
        client = scope.get("client")
        info = RequestInfo(request_id, client[0] if client else "", self.log)
        token = current_request.set(info)
        id_header = (b"x-request-id", request_id.encode("ascii"))
        status = 500
        started = False

        async def send_with_id(message: Message) -> None:
            nonlocal status, started
            if message["type"] == "http.response.start":
                status = message["status"]
                started = True
                message["headers"] = [*message.get("headers", ()), id_header]
            await send(message)

        path: str = scope.get("path", "")
        try:
            refused = self._media_type_refused(content_type, path) if has_body else None
            if refused is not None:
                await response_for(UnsupportedMediaType(refused), path, scope["method"])(scope, receive, send_with_id)
            else:
                await self.app(scope, receive, send_with_id)
        except Exception as error:
            if started:
                raise  # half an answer went out; nothing sensible can follow it
            await response_for(error, path, scope["method"])(scope, receive, send_with_id)
        finally:
            current_request.reset(token)
            route = scope.get("route")
            self.log.request(
                scope["method"], getattr(route, "path", None), status, time.perf_counter() - start,
                request_id, info.key_id,
            )


__all__ = ["Gateway", "csv_routes"]
