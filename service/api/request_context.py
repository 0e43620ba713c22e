"""What the service knows about the request being answered, reachable from any code it calls.

The gateway (gateway.py) sets one RequestInfo per request in a context variable; key checks
write the key id into it (for the access log) and read the client address from it (for the
failed-authentication limit), and problem bodies read the request id from it. Context variables
follow a request into the worker threads FastAPI runs sync routes in.
"""

from __future__ import annotations

from contextvars import ContextVar
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from .access_log import AccessLog


class RequestInfo:
    __slots__ = ("client", "key_id", "log", "request_id")

    def __init__(self, request_id: str, client: str, log: AccessLog | None) -> None:
        self.request_id = request_id
        self.client = client
        self.log = log
        self.key_id: str | None = None


current_request: ContextVar[RequestInfo | None] = ContextVar("mixline_request", default=None)


def request_id() -> str | None:
    info = current_request.get()
    return None if info is None else info.request_id


__all__ = ["RequestInfo", "current_request", "request_id"]
