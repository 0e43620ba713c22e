"""The rules of answering and logging allocations, between the HTTP routes and the layers below."""

from __future__ import annotations

import secrets
import threading
from datetime import UTC, datetime
from typing import Any

import orjson

from service.allocation import (
    LossTolerance,
    MixView,
    Preference,
    RiskAversion,
    RiskScore,
    TargetVolatility,
    account_from_request,
    recommend,
    record_text,
    render,
)
from service.store import IdempotencyCompletion, LogBatch

from .schemas import AllocationIn, PreferenceIn
from .state import AppState, PlanView


class _AllocationIds:
    """al_ + 80 random bits per process + a 48-bit counter: unique across replicas, ordered within
    one (so the log's unique index grows at its end), and no system call per allocation. A batch
    takes a block of consecutive counter values."""

    def __init__(self) -> None:
        self._stem = secrets.token_hex(10)
        self._counter = int.from_bytes(secrets.token_bytes(2), "big") << 32
        self._lock = threading.Lock()

    def _take(self, n: int) -> int:
        with self._lock:
            first = self._counter
            self._counter += n
        return first

    def __call__(self) -> str:
        return f"al_{self._stem}{self._take(1):012x}"

    def block(self, n: int) -> list[str]:
        first, stem = self._take(n), self._stem
        return [f"al_{stem}{i:012x}" for i in range(first, first + n)]


new_allocation_id = _AllocationIds()


def utc_now_text() -> str:
    return datetime.now(UTC).isoformat(timespec="microseconds").replace("+00:00", "Z")


def preference_of(p: PreferenceIn) -> tuple[Preference, dict[str, float | int]]:
    if p.risk_aversion is not None:
        return RiskAversion(p.risk_aversion), {"risk_aversion": p.risk_aversion}
    if p.target_volatility is not None:
        return TargetVolatility(p.target_volatility), {"target_volatility": p.target_volatility}
    if p.max_loss is not None:
        assert p.confidence is not None
        horizon = 1.0 if p.horizon_years is None else p.horizon_years
        return (
            LossTolerance(p.max_loss, p.confidence, horizon),
            {"max_loss": p.max_loss, "confidence": p.confidence, "horizon_years": horizon},
        )
    assert p.risk_score is not None
    return RiskScore(p.risk_score), {"risk_score": p.risk_score}


def answer(state: AppState, plan: PlanView, body: AllocationIn, *, created_at: str) -> tuple[dict[str, Any], MixView]:
    """The allocation record for one member (not yet logged), and the mix it was made with."""
    view = state.mixes.view_in_force(plan.plan_id, body.mix_version)
    preference, preference_doc = preference_of(body.preference)
    holdings = None if body.holdings is None else {"risky": body.holdings.risky, "safe": body.holdings.safe}
    account = account_from_request(plan.currency, body.amount, holdings, body.contribution)
    record = recommend(
        allocation_id=new_allocation_id(),
        plan_id=plan.plan_id,
        member_id=body.member_id,
        created_at=created_at,
        currency=plan.currency,
        view=view,
        policy=plan.policy,
        preference=preference,
        preference_document=preference_doc,
        account=account,
    )
    return record, view


def log_batch(
    plan_id: str,
    mix_version: str,
    created_at: str,
    records: list[dict[str, Any]],
    completes: IdempotencyCompletion | None = None,
) -> LogBatch:
    return LogBatch(
        plan_id=plan_id,
        mix_version=mix_version,
        created_at=created_at,
        allocation_ids=[r["allocation_id"] for r in records],
        member_ids=[r["member_id"] for r in records],
        bodies=[record_text(r).decode() for r in records],
        completes=completes,
    )


def rendered(state: AppState, plan_id: str, stored: str) -> dict[str, Any]:
    record = orjson.loads(stored)
    return render(record, state.mixes.view(plan_id, record["mix_version"]).codes)
