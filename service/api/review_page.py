"""The committee's review page: one self-contained HTML document (Jinja2 template packaged with
the service, styles inline, the chart as inline SVG) that can be saved, mailed and archived."""

from __future__ import annotations

import math
from datetime import UTC, datetime
from functools import cache
from typing import Any

from jinja2 import Environment, PackageLoader, select_autoescape
from markupsafe import Markup

from .charts import inline_svg

# No http(s) anywhere, no scripts: a saved page shows the same thing offline, years later. Sent
# as a header and also written into the page, so a saved copy refuses to load anything too.
CONTENT_SECURITY_POLICY = "default-src 'none'; style-src 'unsafe-inline'"


def _pct(value: float | None) -> str:
    return "" if value is None else f"{100.0 * value:.2f} %"


def _pp(value: float | None) -> str:
    return "" if value is None else f"{100.0 * value:+.2f}"


def _when(value: str | None) -> str:
    """An ISO timestamp as people read it in minutes: to the second, in UTC."""
    if not value:
        return ""
    return datetime.fromisoformat(value).astimezone(UTC).strftime("%Y-%m-%d %H:%M:%S UTC")


def _bound(value: float | str) -> str:
    if isinstance(value, str) or math.isinf(value):
        return "none"
    return _pct(value)


@cache
def _environment() -> Environment:
    env = Environment(loader=PackageLoader("service.api", "templates"), autoescape=select_autoescape(["html"]))
    env.filters["pct"] = _pct
    env.filters["pp"] = _pp
    env.filters["when"] = _when
    return env


def review_html(
    *,
    plan: dict[str, Any],
    mix: dict[str, Any],
    inputs: dict[str, Any],
    lifecycle: dict[str, Any],
    active_version: str | None,
    chart_svg: str,
    lower: list[float],
    upper: list[float],
    impact: dict[str, Any] | None = None,
    impact_note: str | None = None,
) -> str:
    """``impact`` is the impact preview's answer (API.md, "Impact of a version before
    activation"); None renders as "not computed", with ``impact_note`` saying why."""
    assets = [
        {"code": a["code"], "expected_return": a["expected_return"], "volatility": vol,
         "lower": _bound(lo), "upper": _bound(hi)}
        for a, vol, lo, hi in zip(inputs["assets"], _volatilities(inputs), lower, upper, strict=True)
    ]
    matrix = inputs["correlation"] if inputs["correlation"] is not None else inputs["covariance"]
    bounds: list[str] = []
    if impact:
        for side in ("before", "after"):
            bounds += [b for b in impact["limited_by"][side] if b not in bounds]
    return _environment().get_template("review.html").render(
        plan=plan, mix=mix, inputs=inputs, lifecycle=lifecycle, active_version=active_version, assets=assets,
        matrix=matrix, impact=impact, impact_bounds=bounds, impact_note=impact_note, chart_svg=Markup(inline_svg(chart_svg)),  # our own matplotlib output
        generated_at=datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC"), content_security_policy=CONTENT_SECURITY_POLICY,
    )


def _volatilities(inputs: dict[str, Any]) -> list[float]:
    if inputs["covariance"] is not None:
        return [math.sqrt(inputs["covariance"][i][i]) for i in range(len(inputs["assets"]))]
    return [a["volatility"] for a in inputs["assets"]]
