"""The vectorised batch rules agree member by member with the single-member rules.

The single-member functions are themselves checked against closed forms and scipy in
test_preferences.py and test_money.py; here the reference is that scalar implementation.
"""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose

from service.allocation import (
    AllocationLine,
    LossTolerance,
    RiskAversion,
    RiskScore,
    TargetVolatility,
    build_policy,
    choose_risky_fraction,
    route_contribution,
    split_units,
)
from service.allocation.batch import (
    LIMIT_NAMES,
    MAX_LOSS,
    RISK_AVERSION,
    RISK_SCORE,
    TARGET_VOLATILITY,
    BatchError,
    BatchInput,
    allocate,
    split_rows,
)

TABLE = {"1": 12.0, "2": 6.0, "3": 3.0, "4": 1.5, "5": 0.0}


def random_batch(rng: np.random.Generator, n: int, *, routed: bool) -> BatchInput:
    kind = rng.integers(0, 4, n).astype(np.int8)
    value = np.select(
        [kind == RISK_AVERSION, kind == TARGET_VOLATILITY, kind == MAX_LOSS],
        [rng.choice([0.0, 0.5, 1.0, 2.0, 4.0, 9.0], n), rng.uniform(0, 0.4, n), rng.uniform(0.02, 0.5, n)],
        rng.integers(1, 6, n).astype(float),
    )
    confidence = np.where(kind == MAX_LOSS, rng.uniform(0.55, 0.995, n), 0.0)
    horizon = np.where(kind == MAX_LOSS, rng.choice([0.5, 1.0, 3.0, 10.0], n), 0.0)
    total = rng.integers(0, 10**9, n)
    if not routed:
        return BatchInput(kind, value, confidence, horizon, total)
    held = rng.integers(0, 10**8, n)
    contribution = rng.integers(0, 10**6, n)
    return BatchInput(kind, value, confidence, horizon, held + rng.integers(0, 10**8, n) + contribution, held, contribution)


def scalar_preference(batch: BatchInput, i: int) -> object:
    k, v = int(batch.kind[i]), float(batch.value[i])
    if k == RISK_AVERSION:
        return RiskAversion(v)
    if k == TARGET_VOLATILITY:
        return TargetVolatility(v)
    if k == MAX_LOSS:
        return LossTolerance(v, float(batch.confidence[i]), float(batch.horizon[i]))
    return RiskScore(int(v))


@pytest.mark.parametrize(("leverage", "routed"), [(False, False), (True, False), (False, True), (True, True)])
def test_batch_matches_single_member_rules(leverage: bool, routed: bool) -> None:
    rng = np.random.default_rng(7 + 2 * leverage + routed)
    policy = build_policy(min_risky_fraction=0.05, max_risky_fraction=1.8 if leverage else 0.9,
                          borrowing_rate=0.045 if leverage else None, risk_score_table=TABLE)
    line = AllocationLine(0.03, 0.075, 0.14, borrowing_rate=0.045 if leverage else None)
    weights = rng.dirichlet(np.ones(7))
    batch = random_batch(rng, 400, routed=routed)
    result = allocate(batch, line, policy, weights)
    for i in range(batch.size):
        choice = choose_risky_fraction(scalar_preference(batch, i), line, policy)  # type: ignore[arg-type]
        assert_allclose(result.risky_fraction[i], choice.risky_fraction, rtol=1e-12, atol=1e-15)
        assert LIMIT_NAMES[result.limited[i]] == choice.limited_by
        if choice.unconstrained_risky_fraction is None:
            assert np.isnan(result.unconstrained[i])
        else:
            assert_allclose(result.unconstrained[i], choice.unconstrained_risky_fraction, rtol=1e-12)
        risky = int(round(choice.risky_fraction * int(batch.total[i])))
        assert result.risky[i] == risky and result.risky[i] + result.safe[i] == batch.total[i]
        assert result.by_asset[i].tolist() == split_units(risky, weights).tolist()
        assert_allclose(result.expected_return[i], line.expected_return(choice.risky_fraction), rtol=1e-12)
        if routed:
            assert batch.risky_held is not None and batch.contribution is not None and result.to_risky is not None
            split = route_contribution(int(batch.risky_held[i]), int(batch.contribution[i]), risky)
            assert (result.to_risky[i], result.to_safe[i]) == (split.risky, split.safe)


def test_split_rows_sums_exactly() -> None:
    rng = np.random.default_rng(11)
    totals = rng.integers(0, 10**12, 2000)
    w = rng.dirichlet(np.ones(13))
    parts = split_rows(totals, w)
    assert (parts.sum(axis=1) == totals).all()  # identity of the largest-remainder method
    assert (np.abs(parts - totals[:, None] * w[None, :]) < 1 + 1e-3).all()


@pytest.mark.parametrize(
    ("kind", "value", "conf", "field"),
    [(RISK_AVERSION, -1.0, 0.0, "preference.risk_aversion"), (TARGET_VOLATILITY, 9.0, 0.0, "preference.target_volatility"),
     (MAX_LOSS, 0.1, 0.4, "preference.confidence"), (MAX_LOSS, 0.0, 0.9, "preference.max_loss"), (RISK_SCORE, 8.0, 0.0, "preference.risk_score")],
)
def test_batch_refusal_names_the_member(kind: int, value: float, conf: float, field: str) -> None:
    n = 50
    batch = BatchInput(np.zeros(n, np.int8), np.full(n, 3.0), np.zeros(n), np.ones(n), np.full(n, 1000))
    batch.kind[37], batch.value[37], batch.confidence[37] = kind, value, conf
    policy = build_policy(risk_score_table=TABLE)
    with pytest.raises(BatchError) as info:
        allocate(batch, AllocationLine(0.03, 0.07, 0.15), policy, np.array([0.5, 0.5]))
    assert info.value.index == 37 and info.value.field == f"members[37].{field}"


@pytest.mark.parametrize(("leverage", "routed"), [(False, False), (True, True)])
def test_batch_record_text_is_the_single_record_text(leverage: bool, routed: bool) -> None:
    """Byte equality with records.record_text of the dict the single path builds from the same numbers."""
    from service.allocation import RECORD_FORM, record_text
    from service.allocation.batch import LIMIT_NAMES
    from service.allocation.batch_records import BatchContext, money_texts, preference_texts, record_texts
    from service.allocation.disclosures import DISCLOSURES_VERSION
    from service.allocation.money import format_units

    rng = np.random.default_rng(99)
    policy = build_policy(max_risky_fraction=1.8 if leverage else 1.0, borrowing_rate=0.045 if leverage else None, risk_score_table=TABLE)
    line = AllocationLine(0.03, 0.075, 0.14, borrowing_rate=0.045 if leverage else None)
    weights = rng.dirichlet(np.ones(5))
    batch = random_batch(rng, 300, routed=routed)
    result = allocate(batch, line, policy, weights)
    ctx = BatchContext("plan-x", "2026-q4", "ab" * 32, "2026-12-01T00:00:00.000001Z", "USD")
    ids = [f"al_{i:032x}" for i in range(batch.size)]
    members = [f"m-{i}" for i in range(batch.size)]
    texts = record_texts(ctx, ids, members, batch, result)
    prefs = preference_texts(batch)
    for i in range(batch.size):
        y = float(result.risky_fraction[i])
        u = float(result.unconstrained[i])
        record = {
            "form": RECORD_FORM, "allocation_id": ids[i], "plan_id": ctx.plan_id, "member_id": members[i],
            "mix_version": ctx.mix_version, "mix_content_hash": ctx.mix_content_hash, "created_at": ctx.created_at,
            "currency": "USD", "preference": __import__("orjson").loads(prefs[i]), "risky_fraction": y,
            "unconstrained_risky_fraction": None if np.isnan(u) else u, "limited_by": LIMIT_NAMES[result.limited[i]],
            "expected_return": float(result.expected_return[i]), "volatility": float(result.volatility[i]),
            "amount_minor": int(batch.total[i]), "split_minor": [int(result.risky[i]), int(result.safe[i])],
            "by_asset_minor": result.by_asset[i].tolist(), "disclosures_version": DISCLOSURES_VERSION,
        }
        if routed:
            assert batch.risky_held is not None and batch.contribution is not None and result.to_risky is not None and result.to_safe is not None
            held = int(batch.risky_held[i])
            record["holdings_minor"] = [held, int(batch.total[i]) - int(batch.contribution[i]) - held]
            record["contribution_minor"] = int(batch.contribution[i])
            record["contribution_split_minor"] = [int(result.to_risky[i]), int(result.to_safe[i])]
        assert texts[i] == record_text(record).decode()
    units = np.array([0, 5, -5, 123456789, -100, 99])
    assert money_texts(units, "USD") == [format_units(int(u), "USD") for u in units]
    assert money_texts(units, "JPY") == [format_units(int(u), "JPY") for u in units]
    assert money_texts(units, "KWD") == [format_units(int(u), "KWD") for u in units]
