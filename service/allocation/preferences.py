"""From members' stated risk preferences to risky fractions y on the allocation line, every member at once.

- risk aversion A (utility E[r] - A/2 sigma^2): y = (mu_T - rf) / (A sigma_T^2); above 1 the
  borrowing piece applies, y = max(1, (mu_T - r_b) / (A sigma_T^2)); A = 0 asks for as much risk as
  the policy allows;
- target volatility s: y = s / sigma_T (the kink does not move volatility);
- loss tolerance (Telser's safety-first criterion, normal returns): the largest y with
  P(R_H < -L) <= 1 - c, where over H years R_H ~ N(H E[r](y), H sigma(y)^2), i.e.
  H E[r](y) - z_c sqrt(H) sigma(y) >= -L with z_c the standard normal c-quantile;
- risk score: the plan's table gives A, then as risk aversion.
Then the policy band [min_risky_fraction, max_risky_fraction] bounds y and names what bound.

One code path for one member or 300,000: every rule is a numpy expression over columns, and
branches by preference kind are masks. A member's range problems are reported as `FieldIssue`s,
every member's at once.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from scipy.special import ndtri

from .issues import FieldIssue
from .line import AllocationLine
from .policy import MAX_RISK_AVERSION, Policy

Floats = NDArray[np.float64]

# Preference kinds, as stored in `Members.kind`.
RISK_AVERSION, TARGET_VOLATILITY, MAX_LOSS, RISK_SCORE = 0, 1, 2, 3
KIND_NAMES = ("risk_aversion", "target_volatility", "max_loss", "risk_score")
# Bound codes in `Fractions.limited`; LIMIT_NAMES[code] is the policy field (None: no bound).
LIMIT_NONE, LIMIT_MIN, LIMIT_MAX = 0, 1, 2
LIMIT_NAMES = (None, "min_risky_fraction", "max_risky_fraction")
# An annual volatility above 500 % is a typo for a percentage, not a preference.
MAX_TARGET_VOLATILITY = 5.0
MAX_HORIZON_YEARS = 100.0


@dataclass(frozen=True)
class PreferenceColumns:
    """Preferences of n members: `value` is A, s, L or the score by `kind`; `confidence` and
    `horizon` belong to max_loss (0 and 1 elsewhere)."""

    kind: NDArray[np.int8]
    value: Floats
    confidence: Floats
    horizon: Floats


@dataclass(frozen=True)
class Fractions:
    risky_fraction: Floats
    # NaN where the preference asks for unlimited risk (A = 0, a loss bound never reached).
    unconstrained: Floats
    limited: NDArray[np.int8]


def _issues(mask: NDArray[np.bool_], field: str, reason: str) -> list[FieldIssue]:
    return [FieldIssue(int(i), field, reason) for i in np.flatnonzero(mask)]


def check_preferences(p: PreferenceColumns, policy: Policy) -> list[FieldIssue]:
    """Range checks beyond the reader's types, for every member; fields as in the request."""
    k, v = p.kind, p.value
    ra, tv, ml, rs = k == RISK_AVERSION, k == TARGET_VOLATILITY, k == MAX_LOSS, k == RISK_SCORE
    found = _issues(ra & ~((v >= 0) & (v <= MAX_RISK_AVERSION)), "preference.risk_aversion",
                    f"must lie in [0, {MAX_RISK_AVERSION:g}]")
    found += _issues(tv & ~((v >= 0) & (v <= MAX_TARGET_VOLATILITY)), "preference.target_volatility",
                     f"must be an annual volatility in [0, {MAX_TARGET_VOLATILITY:g}] (a decimal: 0.12 = 12 %)")
    found += _issues(ml & ~((v > 0) & (v <= 1.0)), "preference.max_loss",
                     "must lie in (0, 1]: a fraction of the account (0.15 = 15 %)")
    found += _issues(ml & ~((p.confidence > 0.5) & (p.confidence < 1.0)), "preference.confidence",
                     "must lie strictly between 0.5 and 1")
    found += _issues(ml & ~((p.horizon > 0) & (p.horizon <= MAX_HORIZON_YEARS)), "preference.horizon_years",
                     f"must lie in (0, {MAX_HORIZON_YEARS:g}] years")
    if rs.any():
        if not policy.risk_score_table:
            found += _issues(rs, "preference.risk_score", "this plan has no risk_score_table to map scores")
        else:
            known = np.array(sorted(policy.risk_score_table), dtype=float)
            listed = ", ".join(str(s) for s in sorted(policy.risk_score_table))
            found += _issues(rs & ~np.isin(v, known), "preference.risk_score",
                             f"is not a score of the plan's risk_score_table ({listed})")
    return found


def _aversion_fraction(a: Floats, line: AllocationLine) -> Floats:
    variance = line.tangency_volatility**2
    with np.errstate(divide="ignore"):
        y = (line.tangency_return - line.risk_free_rate) / (a * variance)
        if line.borrowing_rate is not None:
            borrowing = np.maximum(1.0, (line.tangency_return - line.borrowing_rate) / (a * variance))
            y = np.where(y > 1.0, borrowing, y)
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


def wanted_fractions(p: PreferenceColumns, line: AllocationLine, policy: Policy) -> tuple[Floats, list[FieldIssue]]:
    """Each member's y before the policy band (NaN = unlimited), and members no y can satisfy."""
    k = p.kind
    wanted = np.full(k.shape[0], np.nan)
    by_aversion = (k == RISK_AVERSION) | (k == RISK_SCORE)
    if by_aversion.any():
        a = p.value[by_aversion]
        scored = k[by_aversion] == RISK_SCORE
        if scored.any():
            table = policy.risk_score_table
            keys = np.array(sorted(table), dtype=float)
            values = np.array([table[int(s)] for s in keys.tolist()], dtype=float)
            a = np.where(scored, values[np.searchsorted(keys, a).clip(0, max(len(keys) - 1, 0))], a)
        wanted[by_aversion] = _aversion_fraction(a, line)
    tv = k == TARGET_VOLATILITY
    if tv.any():
        wanted[tv] = p.value[tv] / line.tangency_volatility
    ml = k == MAX_LOSS
    issues: list[FieldIssue] = []
    if ml.any():
        wanted[ml] = _loss_fraction(p.value[ml], p.confidence[ml], p.horizon[ml], line)
        impossible = np.zeros(k.shape[0], dtype=bool)
        impossible[ml] = np.isneginf(wanted[ml])
        issues = _issues(
            impossible, "preference.max_loss",
            "no risky fraction keeps the chance of this loss within 1 - confidence over the horizon: "
            f"even the safe holding fails it at the mix's risk-free rate of {line.risk_free_rate}",
        )
    return wanted, issues


def bound_by_policy(wanted: Floats, policy: Policy) -> Fractions:
    lo, hi = policy.min_risky_fraction, policy.max_risky_fraction
    over = np.isnan(wanted) | (wanted > hi)
    under = ~over & (wanted < lo)
    y = np.where(over, hi, np.where(under, lo, wanted))
    limited = np.where(over, LIMIT_MAX, np.where(under, LIMIT_MIN, LIMIT_NONE)).astype(np.int8)
    return Fractions(y, wanted, limited)
