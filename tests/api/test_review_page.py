"""The committee's review page: one self-contained HTML document, checked as text and in a real
headless Chromium (Debian's `chromium`), which must render it without loading anything.

Without Chromium the browser test is skipped, unless MIXLINE_REQUIRE_CHROMIUM=1 (.ci/run sets
it once it has installed the browser), which turns the skip into a failure.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
from pathlib import Path
from typing import Any

import pytest
from markupsafe import escape

from service.api.review_page import CONTENT_SECURITY_POLICY, review_html
from service.demo import DEMO_MIX

from .conftest import World
from .test_flow import assert_problem

pytestmark = pytest.mark.anyio

VERSION = DEMO_MIX["version"]
# No load of any kind: src/href to a URL, CSS url(...) or @import, scripts, frames, objects.
# (url(#id) is an in-document reference: matplotlib's clip paths.)
OUTSIDE = re.compile(r"""(src|href)\s*=\s*["']?\s*(https?:|//)|url\(\s*["']?(?!#)|@import|<script|<link|<iframe|<object|<embed""", re.IGNORECASE)


async def review(world: World, plan: str) -> tuple[dict[str, Any], Any]:
    keys = await world.plan(plan)
    await world.publish(plan, keys, DEMO_MIX | {"cross_check": True})
    r = await world.client.get(f"/v1/plans/{plan}/mixes/{VERSION}/review", headers=keys["committee"])
    return keys, r


async def test_the_page_is_one_self_contained_document(world: World, new_plan_id: str) -> None:
    keys, r = await review(world, new_plan_id)
    assert r.status_code == 200, r.text
    assert r.headers["content-type"].startswith("text/html")
    assert r.headers["content-security-policy"].startswith("default-src 'none'")
    page = r.text
    assert page.startswith("<!DOCTYPE html>") and page.count("<svg") == 1 and "<?xml" not in page
    assert not OUTSIDE.search(page), OUTSIDE.search(page)
    assert f'<span id="mix-version">{VERSION}</span>' in page
    for section in ("chart", "weights", "cross-checks", "inputs", "impact"):
        assert f'<section id="{section}">' in page
    for code in (a["code"] for a in DEMO_MIX["assets"]):
        assert code in page
    assert "direct_search" in page and "return_grid" in page
    assert 'id="impact-not-computed"' in page and "not computed" in page
    assert_problem(await world.client.get(f"/v1/plans/{new_plan_id}/mixes/{VERSION}/review", headers=keys["portal"]), 403)
    assert_problem(await world.client.get(f"/v1/plans/{new_plan_id}/mixes/never/review", headers=keys["committee"]), 404)


async def test_a_candidates_page_shows_its_impact(world: World, new_plan_id: str) -> None:
    keys = await world.plan(new_plan_id)
    await world.publish(new_plan_id, keys)
    for i in range(3):  # three members under the active version
        member = {"member_id": f"m-{i}", "mix_version": VERSION, "amount": "1000.00", "preference": {"risk_aversion": 2 + i}}
        assert (await world.client.post(f"/v1/plans/{new_plan_id}/allocations", json=member, headers=keys["portal"])).status_code == 201
    await world.publish(new_plan_id, keys, DEMO_MIX | {"version": "2027-q1", "risk_free_rate": 0.029}, activate=False)
    page = (await world.client.get(f"/v1/plans/{new_plan_id}/mixes/2027-q1/review", headers=keys["committee"])).text
    assert '<span id="impact-members">3</span>' in page and "not computed" not in page
    # The numbers are the impact preview's own (same request, same rules).
    preview = (await world.client.post(f"/v1/plans/{new_plan_id}/mixes/2027-q1/impact", headers=keys["committee"])).json()
    assert preview["members"] == 3 and f"{100 * preview['risky_fraction_change']['mean']:+.2f}" in page
    active = (await world.client.get(f"/v1/plans/{new_plan_id}/mixes/{VERSION}/review", headers=keys["committee"])).text
    assert "not computed (this is the version in force)" in active


def test_an_impact_given_is_shown() -> None:
    # The impact section renders the contract's shape (API.md, "Impact of a version before
    # activation") when one is passed in; these numbers are an invented example, not a result.
    impact = {
        "from_version": "2026-q4", "to_version": "2027-q1", "members": 1200,
        "risky_fraction_change": {"mean": 0.012, "p05": -0.03, "p50": 0.01, "p95": 0.05, "max_abs": 0.11},
        "limited_by": {"before": {"max_risky_fraction": 40}, "after": {"max_risky_fraction": 52, "min_risky_fraction": 3}},
        "largest_moves": [{"member_id": "m-000417", "before": 0.42, "after": 0.53}],
    }
    page = review_html(
        plan={"plan_id": "p", "name": "Plan"}, mix=_mix(), inputs=_inputs(), active_version="2026-q4",
        lifecycle={"state": "published", "published_at": "2026-12-02T10:00:00+00:00", "published_by": "k1",
                   "activated_at": None, "activated_by": None, "retired_at": None, "retired_by": None},
        chart_svg="<svg></svg>", lower=[0.0], upper=[1.0], impact=impact,
    )
    assert "not computed" not in page
    assert '<span id="impact-members">1200</span>' in page and "+1.20" in page and "m-000417" in page and "min_risky_fraction" in page


def _mix() -> dict[str, Any]:
    p = {"weights": {"A": 1.0}, "expected_return": 0.06, "volatility": 0.1, "sharpe_ratio": 0.3, "method": "closed_form"}
    return {"version": "2027-q1", "content_hash": "c" * 64, "risk_free_rate": 0.03, "asset_codes": ["A"],
            "tangency": p, "min_variance": p, "kkt_residual": 0.0, "cross_checks": []}


def _inputs() -> dict[str, Any]:
    return {"assets": [{"code": "A", "expected_return": 0.06, "volatility": 0.1}], "risk_free_rate": 0.03,
            "correlation": [[1.0]], "covariance": None, "bounds": None, "long_only": True}


def chromium() -> str:
    found = shutil.which("chromium")
    if found is None:
        if os.environ.get("MIXLINE_REQUIRE_CHROMIUM") == "1":
            pytest.fail("chromium is not installed (apt-get install chromium)")
        pytest.skip("chromium is not installed (apt-get install chromium)")
    return found


def run_chromium(binary: str, tmp: Path, page: Path, *mode: str) -> subprocess.CompletedProcess[str]:
    flags = [
        "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
        "--disable-component-update", "--disable-sync", "--no-first-run", f"--user-data-dir={tmp / 'profile'}",
        # The browser's own background traffic goes to a closed loopback port; console messages
        # (among them every refused load) go to stderr.
        "--proxy-server=http://127.0.0.1:9", "--enable-logging=stderr", "--v=0",
    ]
    return subprocess.run([binary, *flags, *mode, page.as_uri()], capture_output=True, text=True, timeout=90, check=False)


def refused_loads(stderr: str) -> list[str]:
    return [line for line in stderr.splitlines() if "CONSOLE" in line and "Content Security Policy" in line]


@pytest.mark.slow
async def test_chromium_renders_it_offline(world: World, new_plan_id: str, tmp_path: Path) -> None:
    binary = chromium()
    _, r = await review(world, new_plan_id)
    # The page carries its policy, so even a saved copy loads nothing: Chromium reports any
    # attempt as a refused load on its console.
    assert f'<meta http-equiv="Content-Security-Policy" content="{escape(CONTENT_SECURITY_POLICY)}">' in r.text
    page = tmp_path / "review.html"
    page.write_text(r.text)
    dom = run_chromium(binary, tmp_path, page, "--dump-dom")
    shot = tmp_path / "review.png"
    drawn = run_chromium(binary, tmp_path, page, f"--screenshot={shot}", "--window-size=1280,1600")
    assert dom.returncode == 0, dom.stderr[-2000:]
    # Chromium parsed and laid out the document: the version, the inline chart, every section.
    assert f'<span id="mix-version">{VERSION}</span>' in dom.stdout
    assert "<svg" in dom.stdout and 'id="impact-not-computed"' in dom.stdout
    assert refused_loads(dom.stderr + drawn.stderr) == []
    # The check can fail: the same page with one outside image is reported.
    control = tmp_path / "control.html"
    control.write_text(r.text.replace("</footer>", '<img src="http://example.org/logo.png"></footer>'))
    assert refused_loads(run_chromium(binary, tmp_path, control, "--dump-dom").stderr) != []

    assert shot.is_file() and shot.stat().st_size > 20_000
    from matplotlib.image import imread

    pixels = imread(shot)
    assert pixels.shape[:2] == (1600, 1280)
    # Not a blank page: a good share of the pixels are not background white.
    inked = (pixels[..., :3].mean(axis=2) < 0.9).mean()
    assert inked > 0.03, inked
    if os.environ.get("MIXLINE_KEEP_SCREENSHOT"):
        shutil.copyfile(shot, os.environ["MIXLINE_KEEP_SCREENSHOT"])
