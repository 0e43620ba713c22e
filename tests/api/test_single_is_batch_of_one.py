"""Differential test of the two real entry points: a member posted alone and inside a batch.

Hypothesis draws plans (with and without borrowing, min/max bands, risk-score tables, glide paths,
human capital terms, rebalancing bands), mixes and members (every preference kind or none, with
and without holdings, holdings by asset, contribution, years to retirement and income). Each member is
posted alone to POST .../allocations and, at a random position, inside a batch of random size to
POST .../allocations/batch. Every answer field must be identical (allocation_id and created_at
aside), and so must the logged record bytes; each single answer must also equal its GET. The
reference for each side is the other side, through HTTP, on SQLite and PostgreSQL.
"""

from __future__ import annotations

import copy
import secrets
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import httpx
import numpy as np
import orjson
import pytest
from anyio.from_thread import BlockingPortal, start_blocking_portal
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from service.api import create_app
from service.settings import Settings
from service.store import Database, get_allocation

from .conftest import OPERATOR_KEY

VARYING = ("allocation_id", "created_at")


@dataclass
class Live:
    portal: BlockingPortal
    client: httpx.AsyncClient
    database: Database

    def call(self, method: str, url: str, key: str, body: Any = None) -> httpx.Response:
        headers = {"Authorization": f"Bearer {key}"}
        return self.portal.call(lambda: self.client.request(method, url, json=body, headers=headers))


@pytest.fixture
def live(database: Database) -> Iterator[Live]:
    """The app with its lifespan running in a portal thread, so that a sync hypothesis test can call it."""
    app = create_app(Settings(database_url=database.url, bootstrap_operator_key=OPERATOR_KEY), database, migrate=False)
    with start_blocking_portal() as portal:
        with portal.wrap_async_context_manager(app.router.lifespan_context(app)):
            client = httpx.AsyncClient(transport=httpx.ASGITransport(app=app), base_url="http://mixline.test")
            try:
                yield Live(portal, client, database)
            finally:
                portal.call(client.aclose)


def money(units: int) -> str:
    return f"{units // 100}.{units % 100:02d}"


@st.composite
def scenarios(draw: st.DrawFn) -> dict[str, Any]:
    n = draw(st.integers(1, 5))
    rf = draw(st.floats(0.0, 0.04))
    mu = [rf + draw(st.floats(0.005, 0.09)) for _ in range(n)]
    vol = [draw(st.floats(0.03, 0.35)) for _ in range(n)]
    seed = draw(st.integers(0, 2**31))
    loadings = np.random.default_rng(seed).normal(size=(n, 2))
    c = loadings @ loadings.T + np.diag(np.full(n, 0.6))
    d = np.sqrt(np.diag(c))
    corr = np.clip(c / np.outer(d, d), -1.0, 1.0)
    np.fill_diagonal(corr, 1.0)
    mix: dict[str, Any] = {
        "version": f"v{seed % 1000}",
        "assets": [{"code": f"AC{i}", "expected_return": mu[i], "volatility": vol[i]} for i in range(n)],
        "correlation": corr.round(6).tolist(),
        "risk_free_rate": rf,
        "long_only": draw(st.booleans()),
        "cross_check": False,
    }
    if n > 1 and draw(st.booleans()):
        mix["long_only"] = True
        mix["bounds"] = {"AC0": [0.0, 0.6]}
    policy: dict[str, Any] = {"min_risky_fraction": draw(st.sampled_from([0.0, 0.0, 0.1, 0.3]))}
    if draw(st.booleans()):
        policy["max_risky_fraction"] = draw(st.sampled_from([1.2, 1.5, 2.5]))
        policy["borrowing_rate"] = rf + draw(st.floats(0.0, 0.03))
    else:
        policy["max_risky_fraction"] = draw(st.sampled_from([0.8, 1.0]))
    table = draw(st.booleans())
    if table:
        policy["risk_score_table"] = {"1": 12.0, "2": 6.0, "3": draw(st.floats(0.0, 4.0))}
    glide = draw(st.booleans())
    if glide:
        policy["glide_path"] = [
            {"years_to_retirement": 0, "risk_aversion": draw(st.floats(2.0, 20.0))},
            {"years_to_retirement": draw(st.floats(5.0, 45.0)), "risk_aversion": draw(st.floats(0.0, 8.0))},
        ]
    earnings = draw(st.booleans())
    if earnings:
        policy["human_capital"] = {
            "discount_rate": draw(st.sampled_from([None, 0.02, 0.05])),
            "equity_like_share": draw(st.sampled_from([0.0, 0.2, 1.0])),
        }
    policy["rebalance_band"] = draw(st.sampled_from([0.0, 0.05, 0.3]))
    kinds = ["risk_aversion", "target_volatility", "max_loss"] + (["risk_score"] if table else [])
    kinds += ["glide_path"] if glide else []
    members = []
    for i in range(draw(st.integers(1, 6))):
        kind = draw(st.sampled_from(kinds))
        pref: dict[str, Any] | None
        if kind == "glide_path":
            pref = None
        elif kind == "risk_aversion":
            pref = {"risk_aversion": draw(st.one_of(st.floats(0.0, 30.0), st.integers(0, 12)))}
        elif kind == "target_volatility":
            pref = {"target_volatility": draw(st.floats(0.0, 0.6))}
        elif kind == "max_loss":
            pref = {"max_loss": draw(st.floats(0.01, 0.6)), "confidence": draw(st.floats(0.55, 0.995))}
            if draw(st.booleans()):
                pref["horizon_years"] = draw(st.sampled_from([0.5, 1, 3.0, 10]))
        else:
            pref = {"risk_score": draw(st.integers(1, 3))}
        m: dict[str, Any] = {"member_id": f"m-{i}-{secrets.token_hex(3)}"}
        if pref is not None:
            m["preference"] = pref
        if pref is None or draw(st.booleans()):
            m["years_to_retirement"] = draw(st.one_of(st.integers(0, 60), st.floats(0.0, 60.0)))
        by_aversion = kind in ("glide_path", "risk_aversion", "risk_score")
        if earnings and by_aversion and "years_to_retirement" in m and draw(st.booleans()):
            m["income"] = {"annual": money(draw(st.integers(0, 2 * 10**7)))}
            if draw(st.booleans()):
                m["income"]["growth"] = draw(st.floats(-0.2, 0.2))
        itemised = draw(st.integers(0, 3)) == 0
        if itemised:
            m["holdings_by_asset"] = {a["code"]: money(draw(st.integers(0, 10**8))) for a in mix["assets"]}
            m["holdings_by_asset"]["safe"] = money(draw(st.integers(0, 10**8)))
            if draw(st.booleans()):
                m["contribution"] = money(draw(st.integers(0, 10**7)))
        elif draw(st.booleans()):
            risky, safe = draw(st.integers(0, 10**9)), draw(st.integers(0, 10**9))
            m["holdings"] = {"risky": money(risky), "safe": draw(st.sampled_from([money(safe), safe // 100]))}
            if draw(st.booleans()):
                m["contribution"] = money(draw(st.integers(0, 10**7)))
        else:
            m["amount"] = draw(st.one_of(st.integers(0, 10**11).map(money), st.integers(0, 10**6)))
        members.append(m)
    filler = draw(st.integers(0, 12))
    order = draw(st.permutations(list(range(len(members) + filler))))
    return {"mix": mix, "policy": policy, "members": members, "filler": filler, "order": order}


def logged(live: Live, plan_id: str, allocation_id: str) -> bytes:
    with live.database.reading() as s:
        body = get_allocation(s, plan_id, allocation_id)
    assert body is not None
    record = orjson.loads(body)
    for field in VARYING:
        record[field] = "-"
    # Records are canonical (sorted keys, orjson numbers): re-dumping must give the same bytes.
    assert orjson.dumps(orjson.loads(body), option=orjson.OPT_SORT_KEYS).decode() == body
    return orjson.dumps(record, option=orjson.OPT_SORT_KEYS)


def without(doc: dict[str, Any], *fields: str) -> dict[str, Any]:
    return {k: v for k, v in doc.items() if k not in fields}


@settings(max_examples=40, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(case=scenarios())
def test_alone_and_in_a_batch_the_same_bits(live: Live, case: dict[str, Any]) -> None:
    plan_id = f"diff-{secrets.token_hex(4)}"
    r = live.call("POST", "/v1/plans", OPERATOR_KEY, {"plan_id": plan_id, "name": "Differential", "currency": "USD", "policy": case["policy"]})
    assert r.status_code == 201, r.text
    keys = {}
    for role in ("committee", "portal"):
        keys[role] = live.call("POST", f"/v1/plans/{plan_id}/keys", OPERATOR_KEY, {"role": role}).json()["secret"]
    mix = case["mix"]
    r = live.call("POST", f"/v1/plans/{plan_id}/mixes", keys["committee"], mix)
    assert r.status_code == 201, r.text
    assert live.call("POST", f"/v1/plans/{plan_id}/mixes/{mix['version']}/activate", keys["committee"]).status_code == 200
    members = case["members"]
    alone = []
    for m in members:
        r = live.call("POST", f"/v1/plans/{plan_id}/allocations", keys["portal"], m | {"mix_version": mix["version"]})
        assert r.status_code == 201, r.text
        back = live.call("GET", f"/v1/plans/{plan_id}/allocations/{r.json()['allocation_id']}", keys["portal"])
        assert back.content == r.content  # the answer read back is the answer given, byte for byte
        alone.append(r.json())
    filler = [copy.deepcopy(members[0]) | {"member_id": f"fill-{j}"} for j in range(case["filler"])]
    pool = members + filler
    batch = [pool[i] for i in case["order"]]
    r = live.call("POST", f"/v1/plans/{plan_id}/allocations/batch", keys["portal"], {"mix_version": mix["version"], "members": batch})
    assert r.status_code == 201, r.text
    out = r.json()
    position = {i: p for p, i in enumerate(case["order"])}
    for i, single in enumerate(alone):
        result = out["results"][position[i]]
        assert without(result, *VARYING) == without(single, *VARYING, "disclosures")
        # The disclosure texts: given once at the top of the batch; the borrowing text applies to y > 1.
        general = [t for t in out["disclosures"] if "borrowing" not in t]
        assert single["disclosures"][: len(general)] == general
        assert single["disclosures_version"] == out["disclosures_version"] == result["disclosures_version"]
        assert logged(live, plan_id, single["allocation_id"]) == logged(live, plan_id, result["allocation_id"])
    verify = live.call("GET", f"/v1/plans/{plan_id}/audit/verify", keys["committee"]).json()
    assert verify["ok"] and verify["checked"] == len(members) + len(batch)
