"""From members' stated risk preferences to risky fractions y on the allocation line, every member at once.

- risk aversion A (utility E[r] - A/2 sigma^2): y = (mu_T - rf) / (A sigma_T^2); above 1 the
  borrowing piece applies, y = max(1, (mu_T - r_b) / (A sigma_T^2)); A = 0 asks for as much risk as
  the policy allows;
- target volatility s: y = s / sigma_T (the kink does not move volatility);
- loss tolerance (Telser's safety-first criterion, normal returns): the largest y with
  P(R_H < -L) <= 1 - c, where over H years R_H ~ N(H E[r](y), H sigma(y)^2), i.e.
  H E[r](y) - z_c sqrt(H) sigma(y) >= -L with z_c the standard normal c-quantile;
- risk score: the plan's table gives A, then as risk aversion;
- no preference: the plan's glide path gives A from the member's years to retirement (linear
  between its points, flat beyond its ends), then as risk aversion.
Then the policy band [min_risky_fraction, max_risky_fraction] bounds y and names what bound.

One code path for one member or 300,000: every rule is a numpy expression over columns, and
branches by preference kind are masks. A member's range problems are reported as `FieldIssue`s,
every member's at once.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from scipy.special import ndtr, ndtri

from .issues import FieldIssue
from .line import AllocationLine
from .policy import MAX_RISK_AVERSION, MAX_YEARS_TO_RETIREMENT, Policy

Floats = NDArray[np.float64]

# Preference kinds, as stored in `PreferenceColumns.kind`; KIND_NAMES are those a member states.
RISK_AVERSION, TARGET_VOLATILITY, MAX_LOSS, RISK_SCORE, GLIDE_PATH = 0, 1, 2, 3, 4
KIND_NAMES = ("risk_aversion", "target_volatility", "max_loss", "risk_score")
KIND_COUNT = 5
# Where the preference came from, as answers and records name it.
SOURCE_MEMBER, SOURCE_GLIDE_PATH = "member", "glide_path"
# Bound codes in `Fractions.limited`; LIMIT_NAMES[code] is the policy field (None: no bound).
LIMIT_NONE, LIMIT_MIN, LIMIT_MAX = 0, 1, 2
LIMIT_NAMES = (None, "min_risky_fraction", "max_risky_fraction")
# An annual volatility above 500 % is a typo for a percentage, not a preference.
MAX_TARGET_VOLATILITY = 5.0
MAX_HORIZON_YEARS = 100.0


@dataclass(frozen=True)
class PreferenceColumns:
    """Preferences of n members: `value` is A, s, L or the score by `kind` (0 for GLIDE_PATH);
    `confidence` and `horizon` belong to max_loss (0 and 1 elsewhere). `years` is the member's
    years to retirement (NaN: not given), which the glide path and human capital read."""

    kind: NDArray[np.int8]
    value: Floats
    confidence: Floats
    horizon: Floats
    years: Floats

    def rows(self, at: NDArray[np.intp]) -> PreferenceColumns:
        return PreferenceColumns(self.kind[at], self.value[at], self.confidence[at], self.horizon[at], self.years[at])


@dataclass(frozen=True)
class Fractions:
    risky_fraction: Floats
    # NaN where the preference asks for unlimited risk (A = 0, a loss bound never reached).
    unconstrained: Floats
    limited: NDArray[np.int8]


def _issues(mask: NDArray[np.bool_], field: str, reason: str) -> list[FieldIssue]:
    return [FieldIssue(int(i), field, reason) for i in np.flatnonzero(mask)]


def kinds_present(kind: NDArray[np.int8]) -> NDArray[np.bool_]:
    """Which preference kinds occur (one pass; np.unique costs more than this on any size)."""
    return np.bincount(kind, minlength=KIND_COUNT) > 0


def check_preferences(p: PreferenceColumns, policy: Policy) -> list[FieldIssue]:
    """Range checks beyond the reader's types, for every member; fields as in the request."""
    k, v = p.kind, p.value
    present = kinds_present(k).tolist()
    checks: list[tuple[NDArray[np.bool_], str, str]] = []
    if present[RISK_AVERSION]:
        checks.append((
            (k == RISK_AVERSION) & ~((v >= 0) & (v <= MAX_RISK_AVERSION)), "preference.risk_aversion",
            f"must lie in [0, {MAX_RISK_AVERSION:g}]",
        ))
    if present[TARGET_VOLATILITY]:
        checks.append((
            (k == TARGET_VOLATILITY) & ~((v >= 0) & (v <= MAX_TARGET_VOLATILITY)), "preference.target_volatility",
            f"must be an annual volatility in [0, {MAX_TARGET_VOLATILITY:g}] (a decimal: 0.12 = 12 %)",
        ))
    if present[MAX_LOSS]:
        ml = k == MAX_LOSS
        checks += [
            (ml & ~((v > 0) & (v <= 1.0)), "preference.max_loss",
             "must lie in (0, 1]: a fraction of the account (0.15 = 15 %)"),
            (ml & ~((p.confidence > 0.5) & (p.confidence < 1.0)), "preference.confidence",
             "must lie strictly between 0.5 and 1"),
            (ml & ~((p.horizon > 0) & (p.horizon <= MAX_HORIZON_YEARS)), "preference.horizon_years",
             f"must lie in (0, {MAX_HORIZON_YEARS:g}] years"),
        ]
    if present[RISK_SCORE]:
        rs = k == RISK_SCORE
        table = sorted(policy.risk_score_table)
        if not table:
            checks.append((rs, "preference.risk_score", "this plan has no risk_score_table to map scores"))
        else:
            known = (v[:, None] == np.array(table, dtype=float)[None, :]).any(axis=1)
            listed = ", ".join(str(score) for score in table)
            checks.append((rs & ~known, "preference.risk_score",
                           f"is not a score of the plan's risk_score_table ({listed})"))
    if present[GLIDE_PATH]:
        glide = k == GLIDE_PATH
        if policy.glide_path is None:
            checks.append((glide, "preference", "required: this plan's policy has no glide_path to default from"))
        else:
            checks.append((glide & np.isnan(p.years), "years_to_retirement",
                           "required without a preference: the plan's glide_path sets risk aversion by it"))
    given = ~np.isnan(p.years)
    if given.any():
        checks.append((given & ~((p.years >= 0) & (p.years <= MAX_YEARS_TO_RETIREMENT)), "years_to_retirement",
                       f"must be a number of years in [0, {MAX_YEARS_TO_RETIREMENT:g}]"))
    found: list[FieldIssue] = []
    for mask, field, reason in checks:
        if mask.any():
            found += _issues(mask, field, reason)
    return found


def _aversion_fraction(a: Floats, line: AllocationLine) -> Floats:
    # A = 0 asks for unlimited risk (NaN); an A so small that A sigma^2 underflows is +inf.
    denominator = a * line.tangency_volatility**2
    positive = denominator > 0.0
    y = np.divide(line.tangency_return - line.risk_free_rate, denominator, out=np.full(a.shape, np.inf), where=positive)
    if line.borrowing_rate is not None:
        borrowing = np.divide(line.tangency_return - line.borrowing_rate, denominator, out=np.full(a.shape, np.inf), where=positive)
        y = np.where(y > 1.0, np.maximum(1.0, borrowing), y)
    return np.where(a == 0.0, np.nan, y)


def _loss_fraction(loss: Floats, confidence: Floats, horizon: Floats, line: AllocationLine) -> Floats:
    """Largest y meeting the criterion; NaN where it never binds, -inf where even y = 0 fails."""
    z = ndtri(confidence)
    root_h = np.sqrt(horizon)

    def largest(intercept: float, excess: float) -> Floats:
        # On a piece E[r](y) = a + b y: the criterion is y (z sqrt(h) sigma_T - h b) <= L + h a.
        k = z * root_h * line.tangency_volatility - horizon * excess
        room = loss + horizon * intercept
        with np.errstate(divide="ignore", invalid="ignore"):
            y = room / k
        return np.where(k <= 0.0, np.where(room >= 0.0, np.nan, -np.inf), y)

    y = largest(line.risk_free_rate, line.tangency_return - line.risk_free_rate)
    if line.borrowing_rate is not None:
        # Past y = 1 the line's intercept is r_b and its excess mu_T - r_b (continuous at y = 1).
        borrowing = largest(line.borrowing_rate, line.tangency_return - line.borrowing_rate)
        y = np.where(np.isnan(y) | (y > 1.0), borrowing, y)
    return y


def risk_aversions(p: PreferenceColumns, policy: Policy) -> Floats:
    """The risk aversion each member's preference comes to (NaN for target volatility and max_loss)."""
    k = p.kind
    present = kinds_present(k).tolist()
    a = np.where((k == RISK_AVERSION) | (k == RISK_SCORE), p.value, np.nan)
    if present[RISK_SCORE]:
        table = policy.risk_score_table
        keys = np.array(sorted(table), dtype=float)
        values = np.array([table[int(s)] for s in keys.tolist()], dtype=float)
        at = np.searchsorted(keys, a).clip(0, len(keys) - 1)
        a = np.where(k == RISK_SCORE, values[at], a)
    if present[GLIDE_PATH] and policy.glide_path is not None:
        path = policy.glide_path
        # np.interp is linear between points and flat beyond the ends: the glide path's rule.
        a = np.where(k == GLIDE_PATH, np.interp(p.years, path.years, path.risk_aversion), a)
    return a


def loss_chance(loss: Floats, horizon: Floats, expected_return: Floats, volatility: Floats) -> Floats:
    """P(R_H < -L) under the same model: R_H ~ N(H E[r], H sigma^2). No risk: 0 or 1."""
    shortfall = -loss - horizon * expected_return
    spread = np.sqrt(horizon) * volatility
    with np.errstate(divide="ignore", invalid="ignore"):
        chance = ndtr(shortfall / spread)
    return np.where(spread > 0.0, chance, (shortfall > 0.0).astype(np.float64))


def wanted_fractions(
    p: PreferenceColumns, line: AllocationLine, policy: Policy
) -> tuple[Floats, Floats, list[FieldIssue]]:
    """Each member's y before the policy band (NaN = unlimited), the risk aversion it came from
    (NaN where none), and members no y can satisfy."""
    k = p.kind
    present = kinds_present(k).tolist()
    a = risk_aversions(p, policy)
    # Every kind's formula on every row (a few flops each), then one choice by mask: cheaper than
    # gathering rows per kind, and the same code for one member or many.
    by_aversion = present[RISK_AVERSION] or present[RISK_SCORE] or present[GLIDE_PATH]
    wanted = _aversion_fraction(np.where(np.isnan(a), 1.0, a), line) if by_aversion else p.value.copy()
    if present[TARGET_VOLATILITY]:
        wanted = np.where(k == TARGET_VOLATILITY, p.value / line.tangency_volatility, wanted)
    issues: list[FieldIssue] = []
    if present[MAX_LOSS]:
        ml = k == MAX_LOSS
        # Other kinds' rows get a harmless confidence for the quantile; their results are not used.
        loss = _loss_fraction(p.value, np.where(ml, p.confidence, 0.75), p.horizon, line)
        wanted = np.where(ml, loss, wanted)
        impossible = ml & np.isneginf(loss)
        if impossible.any():
            issues = _issues(
                impossible, "preference.max_loss",
                "no risky fraction keeps the chance of this loss within 1 - confidence over the horizon: "
                f"even the safe holding fails it at the mix's risk-free rate of {line.risk_free_rate}",
            )
    return wanted, a, issues


def bound_by_policy(wanted: Floats, policy: Policy) -> Fractions:
    lo, hi = policy.min_risky_fraction, policy.max_risky_fraction
    over = ~(wanted <= hi)  # NaN (unlimited) counts as over
    under = wanted < lo
    y = np.where(over, hi, np.where(under, lo, wanted))
    limited = (over * LIMIT_MAX + under * LIMIT_MIN).astype(np.int8)
    return Fractions(y, wanted, limited)
