"""A member's future earnings as wealth (Bodie, Merton and Samuelson 1992), every member at once.

Human capital H is the present value of the earnings still to come: `annual` paid at each year's
end for n years, growing at g, discounted at d,

    H = annual (1 - ((1 + g)/(1 + d))^n) / (d - g),      H = annual n / (1 + d) when d = g,

the growing annuity. Written as annual/(1 + d) (1 - q^n)/(1 - q) with q = (1 + g)/(1 + d) and
computed through expm1/log1p, so that d close to g loses no digits and d = g is the limit of the
same expression, not a separate branch that could disagree with it. A fractional n continues the
same expression.

If the mean-variance rule gives risky fraction y of *total* wealth W + H and a share s of H
already behaves like the risky mix, the account itself should hold

    y_account = y (1 + H/W) - s H/W

in the risky mix (then the plan's band bounds it, as for every member).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from .issues import FieldIssue
from .policy import Policy
from .preferences import KIND_NAMES, MAX_LOSS, TARGET_VOLATILITY

Floats = NDArray[np.float64]

# Beyond 20 % a year for a whole working life an income forecast is not plausible.
MAX_INCOME_GROWTH = 0.2
MIN_INCOME_GROWTH = -0.2


def present_value(annual: Floats, growth: Floats, discount: float, years: Floats) -> Floats:
    """H of each member, in the units `annual` is given in."""
    log_q = np.log1p(growth) - np.log1p(discount)
    n_log_q = years * log_q
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(log_q == 0.0, years, np.expm1(n_log_q) / np.expm1(log_q))
    return annual / (1.0 + discount) * ratio


def account_fraction(y: Floats, human: Floats, wealth: Floats, equity_like_share: float) -> Floats:
    """The account's risky fraction when the rule's y is of wealth plus human capital.

    NaN in y (the preference asks for unlimited risk) stays NaN. An empty account beside future
    earnings has no finite fraction: the limit as W -> 0 is +inf where y exceeds s (-inf below
    it, y itself where they are equal), which the policy band then turns into its bound."""
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = human / wealth
        adjusted = y * (1.0 + ratio) - equity_like_share * ratio
    empty = (wealth == 0) & (human > 0)
    if empty.any():
        limit = np.where(y > equity_like_share, np.inf, np.where(y < equity_like_share, -np.inf, y))
        adjusted = np.where(empty, np.where(np.isnan(y), np.nan, limit), adjusted)
    return np.where(human > 0, adjusted, y)


def check_income(
    income_given: NDArray[np.bool_], kind: NDArray[np.int8], years: Floats, policy: Policy
) -> list[FieldIssue]:
    """Income counts only where the plan counts it, with years to retirement, and for a
    preference by risk aversion: a target volatility or a loss bound is about the account itself."""
    if not income_given.any():
        return []
    if policy.human_capital is None:
        reason = "this plan's policy has no human_capital: future earnings are not counted"
        return [FieldIssue(i, "income", reason) for i in np.flatnonzero(income_given).tolist()]
    found = [
        FieldIssue(i, "years_to_retirement", "required with income: the years it is still earned")
        for i in np.flatnonzero(income_given & np.isnan(years)).tolist()
    ]
    for i in np.flatnonzero(income_given & ((kind == TARGET_VOLATILITY) | (kind == MAX_LOSS))).tolist():
        found.append(FieldIssue(
            i, "income",
            f"counts only with a preference by risk aversion (risk_aversion, risk_score or the glide path); "
            f"{KIND_NAMES[kind[i]]} states the account's own risk",
        ))
    return found
