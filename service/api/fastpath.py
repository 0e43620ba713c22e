"""The hot route, served without the router: POST /v1/plans/{plan_id}/allocations.

Portals and record-keepers call this once per member and contribution change, so it carries
most of the service's traffic. FastAPI's routing and dependency resolution cost more than the
allocation itself here (about 60 % of a request in a profile), so this ASGI middleware
recognises exactly that path and method and calls the same `allocate_one` the documented route
calls, with the same key check and the same problem responses. Everything else, including
this route's OpenAPI description, stays with FastAPI.
"""

from __future__ import annotations

from starlette.types import ASGIApp, Message, Receive, Scope, Send

from .allocations import allocate_one
from .errors import PayloadTooLarge, response_for
from .state import AppState

_PREFIX = "/v1/plans/"
_SUFFIX = "/allocations"


class AllocationFastPath:
    def __init__(self, app: ASGIApp, state: AppState, route: object, body_limit: int) -> None:
        self.app = app
        self.state = state
        self.route = route  # the documented route, so metrics label this path as usual
        self.body_limit = body_limit

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        path: str = scope.get("path", "")
        if (
            scope["type"] != "http"
            or scope["method"] != "POST"
            or not path.startswith(_PREFIX)
            or not path.endswith(_SUFFIX)
        ):
            await self.app(scope, receive, send)
            return
        plan_id = path[len(_PREFIX) : -len(_SUFFIX)]
        if not plan_id or "/" in plan_id:
            await self.app(scope, receive, send)
            return
        scope["route"] = self.route
        try:
            headers = dict(scope["headers"])
            authorization = headers.get(b"authorization")
            idempotency_key = headers.get(b"idempotency-key")
            caller = self.state.keys.caller(
                None if authorization is None else authorization.decode("latin-1"), self.state.load_key
            )
            raw = await self._body(receive)
            response = await allocate_one(
                self.state, caller, plan_id, raw,
                None if idempotency_key is None else idempotency_key.decode("latin-1"),
            )
        except Exception as error:  # noqa: BLE001 - every failure becomes a problem response
            response = response_for(error, path, "POST")
        await response(scope, receive, send)

    async def _body(self, receive: Receive) -> bytes:
        chunks: list[bytes] = []
        size = 0
        while True:
            message: Message = await receive()
            if message["type"] == "http.disconnect":
                break
            chunk = message.get("body", b"")
            size += len(chunk)
            if size > self.body_limit:
                raise PayloadTooLarge(f"request body over the limit of {self.body_limit} bytes")
            chunks.append(chunk)
            if not message.get("more_body", False):
                break
        return b"".join(chunks)
