"""POST /v1/plans/{plan}/mixes/estimate, JSON and CSV: a publishable body, nothing stored, every
refusal a 4xx problem naming the field.

Data: the first 36 months (1949-1951) of Ken French's 12 industry portfolio returns bundled with
`linearmodels` (`linearmodels.datasets.french`), so the check is against numpy on the same rows.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
from numpy.testing import assert_allclose

from .conftest import World
from .test_flow import assert_problem

pytestmark = pytest.mark.anyio

CODES = ["NoDur", "Durbl", "Manuf", "Enrgy", "Chems", "BusEq"]


@pytest.fixture(scope="module")
def history() -> tuple[list[str], np.ndarray]:
    from linearmodels.datasets import french

    frame = french.load().iloc[:36]
    return [d.date().isoformat() for d in frame["dates"]], frame[CODES].to_numpy(dtype=np.float64)


def as_json(dates: list[str], x: np.ndarray, **options: Any) -> dict[str, Any]:
    return {"frequency": "monthly", "returns": {c: x[:, j].tolist() for j, c in enumerate(CODES)},
            "dates": dates, "risk_free_rate": 0.02} | options


def as_csv(dates: list[str], x: np.ndarray) -> str:
    lines = ["date," + ",".join(CODES)] + [d + "," + ",".join(repr(float(v)) for v in row) for d, row in zip(dates, x, strict=True)]
    return "\n".join(lines) + "\n"


async def logged_and_listed(world: World, plan: str, keys: dict[str, Any]) -> tuple[int, int]:
    v = await world.client.get(f"/v1/plans/{plan}/audit/verify", headers=keys["committee"])
    listed = await world.client.get(f"/v1/plans/{plan}/mixes", headers=keys["committee"])
    assert v.json()["ok"] is True
    return v.json()["checked"], len(listed.json()["versions"])


async def test_json_and_csv_agree_and_the_body_publishes(world: World, new_plan_id: str, history: Any) -> None:
    dates, x = history
    keys = await world.plan(new_plan_id)
    url = f"/v1/plans/{new_plan_id}/mixes/estimate"
    before = await logged_and_listed(world, new_plan_id, keys)
    r = await world.client.post(url, json=as_json(dates, x, covariance_method="shrinkage"), headers=keys["committee"])
    assert r.status_code == 200, r.text
    doc = r.json()
    csv = await world.client.post(
        url, content=as_csv(dates, x), headers=keys["committee"] | {"Content-Type": "text/csv"},
        params={"frequency": "monthly", "risk_free_rate": 0.02, "covariance_method": "shrinkage"},
    )
    assert csv.status_code == 200, csv.text
    assert csv.json() == doc
    est = doc["estimation"]
    assert (est["observations"], est["periods_per_year"], est["covariance_method"]) == (36, 12, "shrinkage")
    assert 0 < est["shrinkage_intensity"] < 1 and est["repaired"] is False and est["repair_distance"] is None
    # Historical means, annualised: 12 x the monthly mean (numpy, computed here).
    mix = doc["mix"]
    assert_allclose([a["expected_return"] for a in mix["assets"]], 12 * x.mean(axis=0), rtol=1e-12)
    sample = await world.client.post(url, json=as_json(dates, x), headers=keys["committee"])
    vols = [a["volatility"] for a in sample.json()["mix"]["assets"]]
    assert_allclose(vols, np.sqrt(12 * x.var(axis=0, ddof=1)), rtol=1e-12)  # numpy, unbiased
    assert_allclose(sample.json()["mix"]["correlation"], np.corrcoef(x, rowvar=False), atol=1e-13)
    # Nothing is stored or logged by an estimate.
    assert await logged_and_listed(world, new_plan_id, keys) == before
    published = await world.client.post(f"/v1/plans/{new_plan_id}/mixes", json=mix | {"version": "from-history"}, headers=keys["committee"])
    assert published.status_code == 201, published.text


async def test_given_expected_returns_and_repair(world: World, new_plan_id: str, history: Any) -> None:
    dates, x = history
    keys = await world.plan(new_plan_id)
    url = f"/v1/plans/{new_plan_id}/mixes/estimate"
    given = {c: 0.05 + 0.005 * j for j, c in enumerate(CODES)}
    r = await world.client.post(url, json=as_json(dates, x, expected_returns=given), headers=keys["committee"])
    assert [a["expected_return"] for a in r.json()["mix"]["assets"]] == list(given.values())
    r = await world.client.post(
        url, content=as_csv(dates, x), headers=keys["committee"] | {"Content-Type": "text/csv"},
        params={"frequency": "monthly", "risk_free_rate": 0.02, "expected_returns": ",".join(f"{c}:{v}" for c, v in given.items())},
    )
    assert [a["expected_return"] for a in r.json()["mix"]["assets"]] == list(given.values())
    # A series that is an exact blend of two others: refused, or repaired when asked.
    blended = as_json(dates, x)
    blended["returns"]["BLEND"] = (0.5 * x[:, 0] + 0.5 * x[:, 1]).tolist()
    assert_problem(await world.client.post(url, json=blended, headers=keys["committee"]), 422, "returns")
    fixed = await world.client.post(url, json=blended | {"repair": True}, headers=keys["committee"])
    assert fixed.status_code == 200, fixed.text
    assert fixed.json()["estimation"]["repaired"] is True and 0 < fixed.json()["estimation"]["repair_distance"] < 1e-6


async def test_csv_options_beside_a_json_history_are_refused(world: World, new_plan_id: str, history: Any) -> None:
    # they would otherwise be ignored without a word (a fuzzer's find: frequency=AAA answered 200)
    dates, x = history
    keys = await world.plan(new_plan_id)
    url = f"/v1/plans/{new_plan_id}/mixes/estimate"
    r = await world.client.post(url, json=as_json(dates, x), params={"frequency": "weekly"}, headers=keys["committee"])
    assert_problem(r, 422, "frequency")


async def test_every_refusal_names_its_field(world: World, new_plan_id: str, history: Any) -> None:
    dates, x = history
    keys = await world.plan(new_plan_id)
    url = f"/v1/plans/{new_plan_id}/mixes/estimate"
    before = await logged_and_listed(world, new_plan_id, keys)

    def body(**changes: Any) -> dict[str, Any]:
        return as_json(dates, x) | changes

    ragged = body()
    ragged["returns"]["Manuf"] = ragged["returns"]["Manuf"][:-1]
    gap = body()
    gap["returns"]["Enrgy"][7] = None
    flat = body()
    flat["returns"]["Chems"] = [0.01] * 36
    percent = body()
    percent["returns"]["BusEq"] = [100 * v for v in percent["returns"]["BusEq"]]
    loud = body()  # in percent, and never below -100 %: the annualised volatility gives it away
    loud["returns"]["BusEq"] = [abs(10 * v) for v in loud["returns"]["BusEq"]]
    swapped = list(dates)
    swapped[4], swapped[5] = swapped[5], swapped[4]
    few = {"frequency": "monthly", "returns": {c: x[:6, j].tolist() for j, c in enumerate(CODES)}, "risk_free_rate": 0.02}
    cases = [
        (ragged, "returns.Manuf", "observations"),
        (gap, "returns.Enrgy[7]", dates[7]),
        (flat, "returns.Chems", "constant"),
        (percent, "returns.BusEq[0]", "percent"),
        (loud, "returns.BusEq", "percent"),
        (body(dates=swapped), "dates[5]", "increase"),
        (body(dates=dates[:-1] + ["31/12/1951"]), "dates[35]", "ISO"),
        (body(dates=dates[:-1]), "dates", "one date per observation"),
        (few, "returns", "at least 7"),
        (body(frequency="fortnightly"), "frequency", "unknown"),
        (body(covariance_method="robust"), "covariance_method", "unknown"),
        (body(expected_returns={"NoDur": 0.05}), "expected_returns.Durbl", "every asset"),
        (body(expected_returns={c: 6.0 for c in CODES}), "expected_returns.NoDur", "decimals"),
        (body(risk_free_rate=2.5), "risk_free_rate", "decimals"),
        (body(frequency=None), "frequency", ""),
        (body(returns={"bad code": [0.1] * 36}), "returns.bad code", ""),
    ]
    for bad, field, words in cases:
        r = await world.client.post(url, json=bad, headers=keys["committee"])
        problem = assert_problem(r, 422, field)
        reason = next(e["reason"] for e in problem["errors"] if e["field"] == field)
        assert words in reason, (field, reason)

    csv = as_csv(dates, x).splitlines()
    headers = keys["committee"] | {"Content-Type": "text/csv"}
    params = {"frequency": "monthly", "risk_free_rate": 0.02}
    holed = csv.copy()
    holed[10] = holed[10].rsplit(",", 1)[0] + ","  # the last cell of the tenth data row left empty
    short = csv.copy()
    short[3] = short[3].rsplit(",", 1)[0]
    word = csv.copy()
    word[3] = word[3].rsplit(",", 1)[0] + ",n.a."
    for text, field, words, query in (
        (holed, "returns.BusEq[9]", "CSV line 11", params),
        (short, "body", "CSV line 4", params),
        (word, "returns.BusEq", "CSV line 4", params),
        (csv, "frequency", "query parameter", {"risk_free_rate": 0.02}),
        (csv, "expected_returns", "CODE:rate", params | {"expected_returns": "NoDur=0.05"}),
        (["date"], "body", "asset code", params),
    ):
        r = await world.client.post(url, content="\n".join(text) + "\n", headers=headers, params=query)
        problem = assert_problem(r, 422, field)
        assert words in next(e["reason"] for e in problem["errors"] if e["field"] == field), problem

    assert_problem(await world.client.post(url, content=b"x", headers=keys["committee"] | {"Content-Type": "text/plain"}), 415)
    assert_problem(await world.client.post(url, json=body(), headers=keys["portal"]), 403)
    # Nothing logged or stored changed.
    assert await logged_and_listed(world, new_plan_id, keys) == before
