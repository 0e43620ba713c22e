"""Publishing a mix whose risk is a factor model, through the HTTP API.

References: the same mix published with its dense covariance B F B' + diag(d^2) (built with
numpy in the test) must give the same tangency; bad factor models get 422 problem+json
naming the field (API.md, "Factor-model risk" and "Errors").
"""

from __future__ import annotations

import copy
from typing import Any

import httpx
import numpy as np
import orjson
import pytest
from numpy.testing import assert_allclose

from service.api import create_app
from service.demo import DEMO_MIX
from service.settings import Settings
from service.store import Database

from .conftest import OPERATOR_KEY, World
from .test_flow import assert_problem

pytestmark = pytest.mark.anyio

N, K = 30, 3


def factor_body(version: str) -> dict[str, Any]:
    """An invented 30-security mix on 3 factors, long only, capped at 10 %."""
    rng = np.random.default_rng(30)
    b = rng.normal(size=(N, K)) * np.array([0.12, 0.06, 0.04])
    b[:, 0] = np.abs(b[:, 0]) + 0.05
    f = np.array([[1.0, 0.2, 0.0], [0.2, 0.8, 0.1], [0.0, 0.1, 0.6]])
    d = rng.uniform(0.05, 0.20, N)
    mu = 0.02 + b @ np.array([0.3, 0.1, 0.05]) + rng.normal(0.0, 0.01, N)
    return {
        "version": version,
        "assets": [{"code": f"SEC{i:03d}", "expected_return": float(mu[i])} for i in range(N)],
        "factor_model": {"loadings": b.tolist(), "factor_covariance": f.tolist(), "specific_volatility": d.tolist()},
        "risk_free_rate": 0.02,
        "bounds": {f"SEC{i:03d}": [0.0, 0.1] for i in range(N)},
        "cross_check": False,
    }


def dense_equivalent(body: dict[str, Any], version: str) -> dict[str, Any]:
    model = body["factor_model"]
    b, f, d = (np.array(model[key]) for key in ("loadings", "factor_covariance", "specific_volatility"))
    out = {k: v for k, v in copy.deepcopy(body).items() if k != "factor_model"}
    out["covariance"] = (b @ f @ b.T + np.diag(d ** 2)).tolist()
    out["version"] = version
    return out


async def test_a_factor_model_mix_publishes_like_its_dense_equivalent(world: World, new_plan_id: str) -> None:
    keys = await world.plan(new_plan_id)
    body = factor_body("fm-1")
    published = await world.publish(new_plan_id, keys, body)
    dense = await world.publish(new_plan_id, keys, dense_equivalent(body, "dense-1"), activate=False)
    assert published["content_hash"] != dense["content_hash"]
    codes = [a["code"] for a in body["assets"]]
    ours = np.array([published["tangency"]["weights"][c] for c in codes])
    ref = np.array([dense["tangency"]["weights"][c] for c in codes])
    assert_allclose(ours, ref, rtol=0, atol=1e-10)
    assert_allclose(published["tangency"]["sharpe_ratio"], dense["tangency"]["sharpe_ratio"], rtol=1e-12)
    assert published["kkt_residual"] <= 1e-10

    # The same content with other key order and integer spellings hashes the same: 200, same body.
    again = copy.deepcopy(body)
    again["factor_model"] = dict(reversed(list(again["factor_model"].items())))
    again["factor_model"]["factor_covariance"][0][2] = 0
    raw = orjson.dumps(dict(reversed(list(again.items()))))
    r = await world.client.post(f"/v1/plans/{new_plan_id}/mixes", content=raw,
                                headers={**keys["committee"], "content-type": "application/json"})
    assert r.status_code == 200, r.text
    assert r.json() == published

    r = await world.client.get(f"/v1/plans/{new_plan_id}/mixes/fm-1", headers=keys["portal"])
    assert r.status_code == 200 and r.json()["content_hash"] == published["content_hash"]
    frontier = await world.client.get(f"/v1/plans/{new_plan_id}/mixes/fm-1/frontier", params={"points": 9},
                                      headers=keys["portal"])
    assert frontier.status_code == 200, frontier.text
    points = frontier.json()["points"]
    # Nine spaced points with the corners and the tangency among them (a spaced point on a corner
    # is given once, under that kind).
    assert [p["kind"] for p in points].count("spaced") <= 9 < len(points)
    # Frontier points are fully invested and within the caps (the published bounds).
    for p in points:
        w = np.array(list(p["weights"].values()))
        assert_allclose(w.sum(), 1.0, rtol=0, atol=1e-12)
        assert w.min() >= 0.0 and w.max() <= 0.1 + 1e-15
    # Its highest Sharpe ratio is at most the tangency's (exact identity of the two methods).
    assert max(p["sharpe_ratio"] for p in points) <= published["tangency"]["sharpe_ratio"] + 1e-12


def _changed(edit: Any) -> dict[str, Any]:
    body = factor_body("fm-bad")
    edit(body)
    return body


def _set(path: tuple[Any, ...], value: Any) -> Any:
    def edit(body: dict[str, Any]) -> None:
        target: Any = body
        for key in path[:-1]:
            target = target[key]
        target[path[-1]] = value
    return edit


BAD = [
    ("loadings rows", _set(("factor_model", "loadings"), [[0.1, 0.0, 0.0]] * (N - 1)),
     "factor_model.loadings", f"({N - 1}, 3)"),
    ("too many factors", lambda b: b["factor_model"].update(
        loadings=[[0.01] * 51] * N, factor_covariance=np.eye(51).tolist()), "factor_model.loadings", "k <= 50"),
    ("factor covariance shape", _set(("factor_model", "factor_covariance"), np.eye(2).tolist()),
     "factor_model.factor_covariance", "(2, 2)"),
    ("factor covariance not PSD", _set(("factor_model", "factor_covariance"),
                                       [[1.0, 2.0, 0.0], [2.0, 1.0, 0.0], [0.0, 0.0, 1.0]]),
     "factor_model.factor_covariance", "not positive semi-definite: smallest eigenvalue -1"),
    ("factor covariance asymmetric", _set(("factor_model", "factor_covariance", 0, 1), 0.3),
     "factor_model.factor_covariance[1][0]", "not symmetric"),
    ("specific volatility zero", _set(("factor_model", "specific_volatility", 2), 0.0),
     "factor_model.specific_volatility[2]", "greater than 0"),
    ("specific volatility count", _set(("factor_model", "specific_volatility"), [0.1] * (N + 1)),
     "factor_model.specific_volatility", f"({N + 1},)"),
    ("loading not a number", _set(("factor_model", "loadings", 0, 1), "0.1"),
     "factor_model.loadings[0][1]", "valid number"),
    ("missing part", lambda b: b["factor_model"].pop("specific_volatility"),
     "factor_model.specific_volatility", "required"),
    ("unknown part", _set(("factor_model", "residual_correlation"), [[1.0]]),
     "factor_model.residual_correlation", "not permitted"),
    ("two risk forms", _set(("covariance",), np.eye(N).tolist()), "factor_model", "exactly one"),
    ("volatility disagrees", _set(("assets", 1, "volatility"), 0.5), "assets[1].volatility", "disagrees"),
]


@pytest.mark.parametrize(("case", "edit", "field", "reason"), BAD, ids=[b[0] for b in BAD])
async def test_bad_factor_models_get_422_naming_the_field(world: World, new_plan_id: str, case: str, edit: Any,
                                                          field: str, reason: str) -> None:
    keys = await world.plan(new_plan_id)
    r = await world.client.post(f"/v1/plans/{new_plan_id}/mixes", json=_changed(edit), headers=keys["committee"])
    problem = assert_problem(r, 422, field)
    assert any(reason in e["reason"] for e in problem["errors"] if e["field"] == field), problem


async def test_a_large_frontier_solved_in_the_child_process_is_the_same(world: World, new_plan_id: str,
                                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    from service.api import state as state_module
    from service.numerics import build_inputs, efficient_frontier

    # Every frontier goes to the child process here (normally only those of >= 500 assets).
    monkeypatch.setattr(state_module, "FRONTIER_PROCESS_MIN_ASSETS", 1)
    keys = await world.plan(new_plan_id)
    body = factor_body("fm-process")
    await world.publish(new_plan_id, keys, body, activate=False)
    r = await world.client.get(f"/v1/plans/{new_plan_id}/mixes/fm-process/frontier", params={"points": 7},
                               headers=keys["portal"])
    assert r.status_code == 200, r.text
    # Reference: the same frontier solved in this process.
    inputs = build_inputs([a["code"] for a in body["assets"]], [a["expected_return"] for a in body["assets"]],
                          body["risk_free_rate"], factor_model=body["factor_model"],
                          bounds={c: (lo, hi) for c, (lo, hi) in body["bounds"].items()})
    here = efficient_frontier(inputs).sample(7, inputs)
    # The seven spaced points are among the answer's (some under the kind of the corner they fall on).
    got = {point["expected_return"]: point for point in r.json()["points"]}
    for ours in here:
        point = got[min(got, key=lambda m: abs(m - ours.expected_return))]
        assert_allclose(point["expected_return"], ours.expected_return, rtol=0, atol=1e-14)
        assert_allclose([point["weights"][c] for c in inputs.codes], ours.weights, rtol=0, atol=1e-15)


async def test_cross_checks_run_by_default_only_for_mixes_they_finish_quickly(database: Database,
                                                                             new_plan_id: str) -> None:
    # A limit of 10 assets: the 30-security mix is above it, the 6-class demo mix below.
    settings = Settings(database_url=database.url, bootstrap_operator_key=OPERATOR_KEY, max_cross_check_assets=10)
    app = create_app(settings, database, migrate=False)
    async with app.router.lifespan_context(app), httpx.AsyncClient(
            transport=httpx.ASGITransport(app=app), base_url="http://t") as client:
        world = World(client, database, settings)
        keys = await world.plan(new_plan_id)
        body = {k: v for k, v in factor_body("fm-default").items() if k != "cross_check"}
        r = await client.post(f"/v1/plans/{new_plan_id}/mixes", json=body, headers=keys["committee"])
        assert r.status_code == 201, r.text
        assert r.json()["cross_checks"] == []
        asked = factor_body("fm-asked") | {"cross_check": True}
        r = await client.post(f"/v1/plans/{new_plan_id}/mixes", json=asked, headers=keys["committee"])
        problem = assert_problem(r, 422, "cross_check")
        assert "at most 10 assets" in problem["detail"]
        small = {k: v for k, v in copy.deepcopy(DEMO_MIX).items() if k != "cross_check"} | {"version": "small"}
        r = await client.post(f"/v1/plans/{new_plan_id}/mixes", json=small, headers=keys["committee"])
        assert r.status_code == 201, r.text
        assert {c["method"] for c in r.json()["cross_checks"]} == {"direct_search", "risk_grid", "return_grid"}
