"""The frontier as points with corners and the tangency, as CSV, as an SVG chart, and content
negotiation between them."""

from __future__ import annotations

import csv
import io
import re
import subprocess
import sys
import xml.etree.ElementTree as ET
from typing import Any

import pytest
from numpy.testing import assert_allclose

from service.api.negotiation import NotAcceptable, choose
from service.demo import DEMO_MIX

from .conftest import World
from .test_flow import assert_problem

pytestmark = pytest.mark.anyio

VERSION = DEMO_MIX["version"]


async def setup(world: World, plan: str) -> tuple[dict[str, Any], str]:
    keys = await world.plan(plan)
    await world.publish(plan, keys)
    r = await world.client.post(
        f"/v1/plans/{plan}/allocations",
        json={"member_id": "m-7", "mix_version": VERSION, "amount": "1000.00", "preference": {"risk_aversion": 4}},
        headers=keys["portal"],
    )
    return keys, r.json()["allocation_id"]


async def frontier(world: World, plan: str, keys: dict[str, Any], accept: str | None = None, **params: Any) -> Any:
    headers = keys["portal"] | ({"Accept": accept} if accept else {})
    return await world.client.get(f"/v1/plans/{plan}/mixes/{VERSION}/frontier", params=params, headers=headers)


async def test_points_hold_the_corners_and_the_tangency(world: World, new_plan_id: str) -> None:
    keys, _ = await setup(world, new_plan_id)
    doc = (await frontier(world, new_plan_id, keys, points=9)).json()
    kinds = [p["kind"] for p in doc["points"]]
    assert kinds[0] == "min_variance" and kinds.count("tangency") == 1 and "corner" in kinds
    assert len([k for k in kinds if k == "spaced"]) <= 9 < len(kinds)
    rets = [p["expected_return"] for p in doc["points"]]
    assert rets == sorted(rets)
    tangency = doc["points"][kinds.index("tangency")]
    assert tangency["weights"] == doc["tangency"]["weights"]
    # The tangency has the highest Sharpe ratio of all points (its definition), and every point is
    # fully invested (identity) with its own weights.
    assert max(p["sharpe_ratio"] for p in doc["points"]) == pytest.approx(tangency["sharpe_ratio"], rel=1e-12)
    for p in doc["points"]:
        assert_allclose(sum(p["weights"].values()), 1.0, atol=1e-12)


async def test_corners_can_be_left_out(world: World, new_plan_id: str) -> None:
    keys, _ = await setup(world, new_plan_id)
    with_corners = (await frontier(world, new_plan_id, keys, points=9)).json()["points"]
    doc = (await frontier(world, new_plan_id, keys, points=9, corners="false")).json()
    kinds = [p["kind"] for p in doc["points"]]
    assert "corner" not in kinds and kinds[0] == "min_variance" and kinds.count("tangency") == 1
    assert len(kinds) <= 11 < len(with_corners) + 1  # nine spaced points, the two labelled ones
    # The spaced points are the same portfolios either way (one sampling of one frontier); with
    # corners, a spaced point that falls on a corner is shown as the corner.
    alone = [p for p in doc["points"] if p["kind"] == "spaced"]
    assert all(p in alone for p in with_corners if p["kind"] == "spaced")


async def test_points_spaced_by_volatility(world: World, new_plan_id: str) -> None:
    keys, _ = await setup(world, new_plan_id)
    doc = (await frontier(world, new_plan_id, keys, points=11, spacing="volatility")).json()
    assert doc["spacing"] == "volatility"
    vols = [p["volatility"] for p in doc["points"]]
    low, high = vols[0], max(vols)
    step = (high - low) / 10
    # Evenly spaced in volatility: every spaced point sits on the grid low + k * step (arithmetic).
    for p in doc["points"]:
        if p["kind"] == "spaced":
            k = round((p["volatility"] - low) / step)
            assert_allclose(p["volatility"], low + k * step, rtol=1e-9)
    by_return = (await frontier(world, new_plan_id, keys, points=11)).json()
    rets = [p["expected_return"] for p in by_return["points"]]
    low, step = rets[0], (rets[-1] - rets[0]) / 10
    for p in by_return["points"]:
        if p["kind"] == "spaced":  # on the return grid (a bounded frontier: it ends at its top corner)
            k = round((p["expected_return"] - low) / step)
            assert_allclose(p["expected_return"], low + k * step, rtol=1e-12)
    assert_problem(await frontier(world, new_plan_id, keys, spacing="sideways"), 422, "spacing")


async def test_csv_has_one_row_per_point_with_weights_as_columns(world: World, new_plan_id: str) -> None:
    keys, _ = await setup(world, new_plan_id)
    doc = (await frontier(world, new_plan_id, keys, points=7)).json()
    r = await frontier(world, new_plan_id, keys, "text/csv", points=7)
    assert r.status_code == 200 and r.headers["content-type"].startswith("text/csv")
    rows = list(csv.reader(io.StringIO(r.text)))
    codes = [a["code"] for a in DEMO_MIX["assets"]]
    assert rows[0] == ["kind", "expected_return", "volatility", "sharpe_ratio", *codes]
    assert len(rows) - 1 == len(doc["points"])
    for row, point in zip(rows[1:], doc["points"], strict=True):
        assert row[0] == point["kind"]
        assert float(row[1]) == point["expected_return"] and float(row[2]) == point["volatility"]
        assert [float(x) for x in row[4:]] == [point["weights"][c] for c in codes]  # repr round-trips exactly


async def test_svg_chart_and_a_members_split(world: World, new_plan_id: str) -> None:
    keys, allocation_id = await setup(world, new_plan_id)
    plain = await frontier(world, new_plan_id, keys, "image/svg+xml")
    assert plain.status_code == 200 and plain.headers["content-type"] == "image/svg+xml"
    root = ET.fromstring(plain.content)
    assert root.tag == "{http://www.w3.org/2000/svg}svg"
    # Nothing is loaded from anywhere (the xmlns and DOCTYPE names are identifiers, not loads).
    assert not re.search(r'(href|src)="(https?:)?//', plain.text) and "<image" not in plain.text
    marked = await frontier(world, new_plan_id, keys, "image/svg+xml", allocation_id=allocation_id)
    # Four scatters (assets, safe holding, tangency, minimum variance), each also in the legend;
    # the member's split adds one more of each.
    assert plain.text.count('id="PathCollection_') == 8 and marked.text.count('id="PathCollection_') == 10
    again = await frontier(world, new_plan_id, keys, "image/svg+xml")
    assert again.content == plain.content  # no date or random ids: the same chart, the same bytes
    json_marked = (await frontier(world, new_plan_id, keys, allocation_id=allocation_id)).json()
    split = json_marked["member_split"]
    line = json_marked["allocation_line"]
    # On the capital allocation line: E[r] = rf + Sharpe * sigma (closed form, no borrowing here).
    assert_allclose(split["expected_return"], line["intercept"] + line["slope"] * split["volatility"], rtol=1e-12)
    assert_problem(await frontier(world, new_plan_id, keys, "image/svg+xml", allocation_id="al_missing"), 404)


async def test_a_split_under_another_version_is_refused(world: World, new_plan_id: str) -> None:
    keys, allocation_id = await setup(world, new_plan_id)
    await world.publish(new_plan_id, keys, DEMO_MIX | {"version": "2027-q1", "risk_free_rate": 0.029}, activate=False)
    r = await world.client.get(f"/v1/plans/{new_plan_id}/mixes/2027-q1/frontier", params={"allocation_id": allocation_id},
                               headers=keys["portal"] | {"Accept": "image/svg+xml"})
    assert_problem(r, 422, "allocation_id")


async def test_negotiation(world: World, new_plan_id: str) -> None:
    keys, _ = await setup(world, new_plan_id)
    assert_problem(await frontier(world, new_plan_id, keys, "image/png"), 406)
    assert (await frontier(world, new_plan_id, keys, "*/*")).headers["content-type"] == "application/json"
    svg = await frontier(world, new_plan_id, keys, "text/csv;q=0.5, image/svg+xml")
    assert svg.headers["content-type"] == "image/svg+xml"


def test_choose_follows_quality_and_specificity() -> None:
    offered = ("application/json", "text/csv", "image/svg+xml")
    assert choose(None, offered) == "application/json"
    assert choose("text/*", offered) == "text/csv"
    assert choose("image/svg+xml;q=0.9, text/csv", offered) == "text/csv"
    assert choose("*/*;q=0.1, image/svg+xml", offered) == "image/svg+xml"
    assert choose("text/csv;q=0, */*", offered) == "application/json"
    with pytest.raises(NotAcceptable):
        choose("application/xml", offered)


def test_matplotlib_is_not_imported_at_start_up() -> None:
    code = "import sys, service.api, service.api.app; print('matplotlib' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False", out.stderr
