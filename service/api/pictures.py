"""The frontier as a table (CSV) and as the data of its chart; what a member's split adds to it."""

from __future__ import annotations

import csv
import io
from typing import Any

from service.allocation import MixView, frontier_document
from service.numerics import Frontier

from .charts import FrontierChart, Mark

# Points along the drawn curve (spaced in return; the corners are added, so kinks stay sharp).
CURVE_POINTS = 160


def frontier_csv(doc: dict[str, Any]) -> str:
    """One row per frontier point: kind, expected return, volatility, Sharpe ratio, then one
    weight column per asset code (in the mix's order)."""
    codes = list(doc["tangency"]["weights"])
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(["kind", "expected_return", "volatility", "sharpe_ratio", *codes])
    for p in doc["points"]:
        writer.writerow([p["kind"], repr(p["expected_return"]), repr(p["volatility"]), repr(p["sharpe_ratio"]),
                         *(repr(p["weights"][c]) for c in codes)])
    return out.getvalue()


def member_split(allocation: dict[str, Any]) -> dict[str, Any]:
    """Where a logged allocation sits on the allocation line (no member id: charts get mailed)."""
    return {
        "allocation_id": allocation["allocation_id"],
        "risky_fraction": allocation["risky_fraction"],
        "expected_return": allocation["expected_return"],
        "volatility": allocation["volatility"],
    }


def frontier_chart(view: MixView, frontier: Frontier, title: str, member: dict[str, Any] | None = None) -> FrontierChart:
    doc = frontier_document(view, frontier, CURVE_POINTS)
    inputs = view.solved.inputs
    t, mv = view.solved.tangency, view.solved.min_variance
    return FrontierChart(
        title=title,
        curve=[(p["volatility"], p["expected_return"]) for p in doc["points"]],
        risk_free_rate=view.risk_free_rate,
        sharpe_ratio=t.sharpe_ratio,
        tangency=Mark(f"tangency (Sharpe {t.sharpe_ratio:.3f})", t.volatility, t.expected_return),
        min_variance=Mark("minimum variance", mv.volatility, mv.expected_return),
        assets=[Mark(code, float(vol), float(mu))
                for code, mu, vol in zip(view.codes, inputs.expected_returns, inputs.volatilities, strict=True)],
        member=None if member is None else Mark(
            f"member's split ({member['risky_fraction']:.0%} risky)", member["volatility"], member["expected_return"]
        ),
    )
