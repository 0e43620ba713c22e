"""Dependency aliases, so that routes read like their signature."""

from __future__ import annotations

from typing import Annotated

from fastapi import Depends, Request
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer
from starlette.concurrency import run_in_threadpool

from .auth import Caller
from .state import AppState

_bearer = HTTPBearer(auto_error=False, description="Bearer <secret> issued by POST /v1/plans/{plan_id}/keys")


async def get_state(request: Request) -> AppState:
    state: AppState = request.app.state.mixline
    return state


StateDep = Annotated[AppState, Depends(get_state)]


# Async so that FastAPI does not hop to a worker thread for them on every request; a key is read
# from the database on its first use in this process and every few seconds after (auth.py), in a
# worker thread: a database that hangs must not stall the event loop (and /livez with it).
async def current_caller(
    request: Request,
    state: StateDep,
    _credentials: Annotated[HTTPAuthorizationCredentials | None, Depends(_bearer)],
) -> Caller:
    # The raw header is read again so that a malformed scheme gets our 401, not HTTPBearer's 403.
    authorization = request.headers.get("authorization")
    due = state.keys.due(authorization)
    if due is not None:
        state.keys.store(due, await run_in_threadpool(state.load_key, due))
    return state.keys.caller(authorization, state.load_key)


CallerDep = Annotated[Caller, Depends(current_caller)]
