"""Dependency aliases, so that routes read like their signature."""

from __future__ import annotations

from typing import Annotated

from fastapi import Depends, Request
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer

from .auth import Caller
from .state import AppState

_bearer = HTTPBearer(auto_error=False, description="Bearer <secret> issued by POST /v1/plans/{plan_id}/keys")


async def get_state(request: Request) -> AppState:
    state: AppState = request.app.state.mixline
    return state


StateDep = Annotated[AppState, Depends(get_state)]


# Async so that FastAPI does not hop to a worker thread for them on every request; a key is read
# from the database on its first use in this process and every few seconds after (auth.py), in a
# worker thread (AppState.caller).
async def current_caller(
    request: Request,
    state: StateDep,
    _credentials: Annotated[HTTPAuthorizationCredentials | None, Depends(_bearer)],
) -> Caller:
    # The raw header is read again so that a malformed scheme gets our 401, not HTTPBearer's 403.
    return await state.caller(request.headers.get("authorization"))


CallerDep = Annotated[Caller, Depends(current_caller)]
