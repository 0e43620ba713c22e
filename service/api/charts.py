"""The frontier chart as SVG, drawn with matplotlib (Agg-family SVG canvas, no display, no pyplot).

matplotlib is imported on the first chart, never at start-up (its first import in a fresh
environment builds a font cache), and drawing is CPU work: callers run ``frontier_svg`` in a
worker thread. One lock keeps two charts from being drawn at once (matplotlib's text and font
caches are shared process state). Text is drawn as paths, so the SVG needs no font and loads
nothing.
"""

from __future__ import annotations

import io
import threading
from collections.abc import Sequence
from dataclasses import dataclass

_drawing = threading.Lock()
MAX_LABELLED_ASSETS = 12


@dataclass(frozen=True)
class Mark:
    label: str
    volatility: float
    expected_return: float


@dataclass(frozen=True)
class FrontierChart:
    title: str
    curve: Sequence[tuple[float, float]]   # (volatility, expected return), by return
    risk_free_rate: float
    sharpe_ratio: float                    # slope of the capital allocation line
    tangency: Mark
    min_variance: Mark
    assets: Sequence[Mark]
    member: Mark | None = None


def frontier_svg(chart: FrontierChart) -> str:
    """The chart as a standalone SVG document."""
    from matplotlib import rc_context
    from matplotlib.backends.backend_svg import FigureCanvasSVG
    from matplotlib.figure import Figure
    from matplotlib.ticker import PercentFormatter

    with _drawing, rc_context({"svg.hashsalt": "mixline", "svg.fonttype": "path", "font.size": 9}):
        fig = Figure(figsize=(8.0, 5.2), dpi=100, layout="constrained")
        FigureCanvasSVG(fig)
        ax = fig.add_subplot()
        vols = [v for v, _ in chart.curve]
        rets = [r for _, r in chart.curve]
        # Room on the right for the labels of the riskiest assets.
        reach = 1.18 * max([*vols, *(a.volatility for a in chart.assets), chart.member.volatility if chart.member else 0.0])
        ax.plot(vols, rets, color="#1f4e79", linewidth=2.0, label="efficient frontier", zorder=2)
        ax.plot([0.0, reach], [chart.risk_free_rate, chart.risk_free_rate + chart.sharpe_ratio * reach],
                color="#b35900", linestyle="--", linewidth=1.4, label="capital allocation line", zorder=1)
        ax.scatter([a.volatility for a in chart.assets], [a.expected_return for a in chart.assets],
                   s=28, color="#6b6b6b", label="asset classes", zorder=3)
        # Beyond a dozen asset classes labels only hide each other; the page's tables name them.
        for a in chart.assets if len(chart.assets) <= MAX_LABELLED_ASSETS else ():
            ax.annotate(a.label, (a.volatility, a.expected_return), textcoords="offset points", xytext=(5, 4),
                        fontsize=8, color="#404040")
        ax.scatter([0.0], [chart.risk_free_rate], s=30, marker="s", color="#b35900", clip_on=False,
                   label=f"safe holding ({chart.risk_free_rate:.2%})", zorder=4)
        ax.scatter([chart.tangency.volatility], [chart.tangency.expected_return], s=140, marker="*",
                   color="#c00000", label=chart.tangency.label, zorder=5)
        ax.scatter([chart.min_variance.volatility], [chart.min_variance.expected_return], s=60, marker="D",
                   color="#2e7d32", label=chart.min_variance.label, zorder=5)
        if chart.member is not None:
            ax.scatter([chart.member.volatility], [chart.member.expected_return], s=90, marker="X",
                       color="#6a1b9a", label=chart.member.label, zorder=6)
        ax.set_xlim(0.0, reach)
        # The vertical range follows the frontier and the assets; a steep allocation line leaves
        # through the top rather than flattening everything else.
        shown = [*rets, *(a.expected_return for a in chart.assets), chart.risk_free_rate, chart.tangency.expected_return]
        if chart.member is not None:
            shown.append(chart.member.expected_return)
        low, high = min(shown), max(shown)
        pad = 0.08 * (high - low or abs(high) or 0.01)
        ax.set_ylim(low - pad, high + pad)
        ax.xaxis.set_major_formatter(PercentFormatter(xmax=1.0, decimals=0))
        ax.yaxis.set_major_formatter(PercentFormatter(xmax=1.0, decimals=1))
        ax.set_xlabel("volatility (annual)")
        ax.set_ylabel("expected return (annual)")
        ax.set_title(chart.title)
        ax.grid(True, color="#e0e0e0", linewidth=0.6)
        ax.legend(loc="best", fontsize=8, frameon=True, framealpha=0.9)
        out = io.StringIO()
        # No date or tool metadata: the same chart gives the same bytes.
        fig.savefig(out, format="svg", metadata={"Date": None, "Creator": None, "Format": None, "Type": None})
    return out.getvalue()


def inline_svg(svg: str) -> str:
    """The <svg> element alone, for embedding in an HTML page (no XML prolog or DOCTYPE)."""
    start = svg.find("<svg")
    return svg[start:] if start >= 0 else svg
