"""The whole membership at once: the same rules as one member, as numpy arrays.

Every formula here is the vector form of `preferences.py`, `money.py` and `routing.py`; the tests
check member by member that both give the same answer. Nothing here builds a Python object per
member except where a caller asks for one.
"""

from __future__ import annotations

from dataclasses import dataclass
import numpy as np
from scipy.special import ndtri

from .errors import AllocationError
from .line import AllocationLine
from .policy import MAX_RISK_AVERSION, Policy

# Preference kinds, as stored in `BatchInput.kind`.
RISK_AVERSION, TARGET_VOLATILITY, MAX_LOSS, RISK_SCORE = 0, 1, 2, 3
# limited_by codes in `BatchResult.limited`.
LIMIT_NONE, LIMIT_MIN, LIMIT_MAX = 0, 1, 2
LIMIT_NAMES = (None, "min_risky_fraction", "max_risky_fraction")


@dataclass(frozen=True)
class BatchInput:
    """Columns of a batch, one entry per member (parameters unused by a kind are 0)."""

    kind: np.ndarray  # int8
    value: np.ndarray  # A, s, L or the score
    confidence: np.ndarray
    horizon: np.ndarray
    total: np.ndarray  # int64 minor units to split
    risky_held: np.ndarray | None = None  # int64, when holdings were given (else -1 per member)
    contribution: np.ndarray | None = None  # int64

    @property
    def size(self) -> int:
        return int(self.kind.shape[0])

    def subset(self, rows: np.ndarray) -> BatchInput:
        pick = lambda a: None if a is None else a[rows]  # noqa: E731
        return BatchInput(self.kind[rows], self.value[rows], self.confidence[rows], self.horizon[rows],
                          self.total[rows], pick(self.risky_held), pick(self.contribution))


@dataclass(frozen=True)
class BatchResult:
    risky_fraction: np.ndarray
    unconstrained: np.ndarray  # NaN where unbounded (risk aversion 0, loss bound never binding)
    limited: np.ndarray  # LIMIT_* codes
    risky: np.ndarray  # int64 minor units
    safe: np.ndarray
    by_asset: np.ndarray  # (members, assets) int64
    expected_return: np.ndarray
    volatility: np.ndarray
    to_risky: np.ndarray | None  # contribution split, where holdings were given (else -1)
    to_safe: np.ndarray | None

    def subset(self, rows: np.ndarray) -> BatchResult:
        pick = lambda a: None if a is None else a[rows]  # noqa: E731
        return BatchResult(self.risky_fraction[rows], self.unconstrained[rows], self.limited[rows],
                           self.risky[rows], self.safe[rows], self.by_asset[rows], self.expected_return[rows],
                           self.volatility[rows], pick(self.to_risky), pick(self.to_safe))


class BatchError(AllocationError):
    """A member of a batch that cannot be answered: names its index and field."""

    def __init__(self, index: int, field: str, reason: str) -> None:
        super().__init__(f"members[{index}].{field}", reason)
        self.index = index


def _first(mask: np.ndarray) -> int | None:
    hits = np.flatnonzero(mask)
    return int(hits[0]) if hits.size else None


def _refuse(mask: np.ndarray, field: str, reason: str) -> None:
    index = _first(mask)
    if index is not None:
        raise BatchError(index, field, reason)


def validate(batch: BatchInput, policy: Policy) -> None:
    """The range checks of preferences.validate_preference, for every member at once."""
    k, v = batch.kind, batch.value
    ra, tv, ml, rs = k == RISK_AVERSION, k == TARGET_VOLATILITY, k == MAX_LOSS, k == RISK_SCORE
    _refuse(ra & ~((v >= 0) & (v <= MAX_RISK_AVERSION)), "preference.risk_aversion",
            f"must be in [0, {MAX_RISK_AVERSION}]")
    _refuse(tv & ~((v >= 0) & (v <= 5.0)), "preference.target_volatility",
            "must be an annual volatility in [0, 5] (decimal, 0.12 = 12 %)")
    _refuse(ml & ~((v > 0) & (v <= 1.0)), "preference.max_loss", "must be in (0, 1]")
    _refuse(ml & ~((batch.confidence > 0.5) & (batch.confidence < 1.0)), "preference.confidence",
            "must lie strictly between 0.5 and 1")
    _refuse(ml & ~((batch.horizon > 0) & (batch.horizon <= 100)), "preference.horizon_years",
            "must be in (0, 100] years")
    if rs.any():
        if not policy.risk_score_table:
            _refuse(rs, "preference.risk_score", "this plan has no risk_score_table to map scores")
        known = np.array(sorted(policy.risk_score_table), dtype=float)
        _refuse(rs & ~np.isin(v, known), "preference.risk_score",
                "score is not in the plan's risk_score_table (scores: "
                + ", ".join(str(int(s)) for s in known) + ")")


def _aversion_fraction(a: np.ndarray, line: AllocationLine, policy: Policy) -> np.ndarray:
    variance = line.tangency_volatility**2
    with np.errstate(divide="ignore"):
        lending = (line.tangency_return - line.risk_free_rate) / (a * variance)
        if policy.allows_borrowing and line.borrowing_rate is not None:
            borrowing = np.maximum(1.0, (line.tangency_return - line.borrowing_rate) / (a * variance))
            lending = np.where(lending > 1.0, borrowing, lending)
    return np.where(a == 0.0, np.nan, lending)


def _loss_fraction(batch: BatchInput, line: AllocationLine, policy: Policy) -> np.ndarray:
    h = batch.horizon
    conf = np.clip(batch.confidence, 0.5 + 1e-12, 1 - 1e-12)
    z = ndtri(conf)  # the standard normal quantile, as NormalDist().inv_cdf in preferences.py
    loss = batch.value

    def largest(intercept: float, excess: float) -> np.ndarray:
        k = z * np.sqrt(h) * line.tangency_volatility - h * excess
        room = loss + h * intercept
        with np.errstate(divide="ignore", invalid="ignore"):
            y = room / k
        # Never binding on this piece: unbounded (NaN), or impossible (-inf) when even y = 0 fails.
        return np.where(k <= 0.0, np.where(room >= 0.0, np.nan, -np.inf), y)

    lending = largest(line.risk_free_rate, line.tangency_return - line.risk_free_rate)
    if policy.allows_borrowing and line.borrowing_rate is not None:
        borrowing = largest(line.borrowing_rate, line.tangency_return - line.borrowing_rate)
        lending = np.where(np.isnan(lending) | (lending > 1.0), borrowing, lending)
    return lending


def risky_fractions(batch: BatchInput, line: AllocationLine, policy: Policy) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(risky_fraction, unconstrained (NaN = unbounded), limited code) for every member."""
    k = batch.kind
    a = batch.value.copy()
    if (k == RISK_SCORE).any():
        table = policy.risk_score_table
        scores = batch.value[k == RISK_SCORE].astype(np.int64)
        a[k == RISK_SCORE] = _lookup(table, scores)
    wanted = np.full(batch.size, np.nan)
    by_aversion = (k == RISK_AVERSION) | (k == RISK_SCORE)
    wanted[by_aversion] = _aversion_fraction(a[by_aversion], line, policy)
    tv = k == TARGET_VOLATILITY
    wanted[tv] = batch.value[tv] / line.tangency_volatility
    ml = k == MAX_LOSS
    if ml.any():
        sub = BatchInput(k[ml], batch.value[ml], batch.confidence[ml], batch.horizon[ml], batch.total[ml])
        wanted[ml] = _loss_fraction(sub, line, policy)
        impossible = np.zeros(batch.size, dtype=bool)
        impossible[ml] = np.isneginf(wanted[ml])
        _refuse(impossible, "preference.max_loss",
                "no risky fraction keeps the loss within the bound: even the safe holding fails it")
    lo, hi = policy.min_risky_fraction, policy.max_risky_fraction
    unbounded = np.isnan(wanted)
    over = unbounded | (wanted > hi)
    under = ~over & (wanted < lo)
    y = np.where(over, hi, np.where(under, lo, wanted))
    limited = np.where(over, LIMIT_MAX, np.where(under, LIMIT_MIN, LIMIT_NONE)).astype(np.int8)
    return y, wanted, limited


def _lookup(table: dict[int, float], scores: np.ndarray) -> np.ndarray:
    keys = np.array(sorted(table), dtype=np.int64)
    values = np.array([table[int(s)] for s in keys], dtype=float)
    return values[np.searchsorted(keys, scores)]


def split_rows(totals: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """Largest remainder for every row at once (the vector form of money.split_units)."""
    exact = totals[:, None].astype(float) * weights[None, :]
    floors = np.floor(exact)
    parts = floors.astype(np.int64)
    missing = totals - parts.sum(axis=1)
    # Rank each asset's remainder within its row (stable: ties go to the earlier asset).
    order = np.argsort(-(exact - floors), axis=1, kind="stable")
    ranks = np.empty_like(order)
    np.put_along_axis(ranks, order, np.broadcast_to(np.arange(weights.size), order.shape), axis=1)
    parts += ranks < missing[:, None]
    # A weight sum a hair above 1 can leave one unit too many: take it from the smallest remainder.
    parts -= ranks >= weights.size + missing[:, None]
    return parts


def allocate(batch: BatchInput, line: AllocationLine, policy: Policy, weights: np.ndarray) -> BatchResult:
    validate(batch, policy)
    y, wanted, limited = risky_fractions(batch, line, policy)
    risky = np.rint(y * batch.total).astype(np.int64)
    safe = batch.total - risky
    by_asset = split_rows(risky, weights)
    lend = line.risk_free_rate + y * (line.tangency_return - line.risk_free_rate)
    if line.borrowing_rate is not None:
        borrow = line.tangency_return + (y - 1.0) * (line.tangency_return - line.borrowing_rate)
        expected = np.where(y > 1.0, borrow, lend)
    else:
        expected = lend
    to_risky = to_safe = None
    if batch.risky_held is not None and batch.contribution is not None:
        routed = batch.risky_held >= 0
        to_risky = np.where(routed, np.clip(risky - batch.risky_held, 0, batch.contribution), -1)
        to_safe = np.where(routed, batch.contribution - to_risky, -1)
    return BatchResult(y, wanted, limited, risky, safe, by_asset, expected,
                       np.abs(y) * line.tangency_volatility, to_risky, to_safe)
