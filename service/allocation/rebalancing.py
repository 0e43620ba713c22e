"""Trades that bring an account's holdings, asset by asset, to its target split.

The target is the split's own money in minor units: `by_asset` for the risky mix's assets and
`safe` for the safe holding, of the account's total (holdings plus any contribution). A trade is
target minus holding, so trades reach the target exactly and sum to the contribution (to zero
without one), with no rounding of their own. Where the account's risky fraction before the
contribution lies within the plan's band of the target, no trades are proposed: the contribution
split (no selling) keeps directing new money.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from .money import Units


@dataclass(frozen=True)
class Rebalancing:
    trading: NDArray[np.bool_]  # rows given trades (itemised and outside the band)
    trades: Units  # (rows, assets + 1): buys positive, sales negative, the safe holding last


def rebalance(
    itemised: NDArray[np.bool_],
    held: Units,
    by_asset: Units,
    safe: Units,
    risky_fraction: NDArray[np.float64],
    band: float,
) -> Rebalancing:
    """`held` is (rows, assets + 1), meaningful where `itemised`."""
    held_risky = held[:, :-1].sum(axis=1)
    held_total = held_risky + held[:, -1]
    with np.errstate(divide="ignore", invalid="ignore"):
        current = held_risky / held_total
    # An empty account has no risky fraction: its first money is placed by trades.
    within = (held_total > 0) & (np.abs(current - risky_fraction) <= band)
    trading = itemised & ~within
    target = np.concatenate([by_asset, safe[:, None]], axis=1)
    trades = np.where(trading[:, None], target - held, 0)
    return Rebalancing(trading, trades)
