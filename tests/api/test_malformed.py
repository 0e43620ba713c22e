"""A malformed-input corpus: every case gets a 4xx problem+json naming what is wrong, never a 5xx.

Each case is (id, target, body) where body is either a JSON-able value or raw bytes sent as
application/json; targets are publish, allocate, plan, key, frontier.
"""

from __future__ import annotations

import copy
from collections.abc import AsyncIterator
from typing import Any

import httpx
import numpy as np
import pytest

from service.api import create_app
from service.demo import DEMO_ALLOCATION, DEMO_MIX
from service.settings import Settings
from service.store import Database

from .conftest import OPERATOR_KEY

pytestmark = pytest.mark.anyio

SMALL_LIMITS = {"max_assets": 12, "max_body_bytes": 200_000}


def mix(**changes: Any) -> dict[str, Any]:
    # A version of its own, so that each case reaches validation rather than the 409 for a clash.
    body = copy.deepcopy(DEMO_MIX) | {"cross_check": False, "version": "corpus-case"}
    for key, value in changes.items():
        if value is _DROP:
            body.pop(key, None)
        else:
            body[key] = value
    return body


def asset(i: int, **changes: Any) -> dict[str, Any]:
    body = mix()
    body["assets"][i].update(changes)
    return body


def corr(edit: Any) -> dict[str, Any]:
    body = mix()
    c = np.array(body["correlation"])
    body["correlation"] = edit(c)
    return body


def alloc(**changes: Any) -> dict[str, Any]:
    body = copy.deepcopy(DEMO_ALLOCATION)
    for key, value in changes.items():
        if value is _DROP:
            body.pop(key, None)
        else:
            body[key] = value
    return body


def pref(p: Any) -> dict[str, Any]:
    return alloc(preference=p)


_DROP = object()
RAW_MIX = b'{"version": "raw", "assets": [{"code": "A", "expected_return": %s, "volatility": 0.2}], "covariance": [[0.04]], "risk_free_rate": 0.01}'
RAW_ALLOC = b'{"member_id": "m", "mix_version": "2026-q4", "amount": %s, "preference": {"risk_aversion": %s}}'


def non_psd(c: np.ndarray) -> list[list[float]]:
    c = c.copy()
    c[0, 1] = c[1, 0] = -0.9  # with 0.78/0.66 elsewhere: no longer a correlation matrix
    c[0, 2] = c[2, 0] = 0.95
    c[1, 2] = c[2, 1] = 0.9
    return c.tolist()


def cov_body(cov: list[list[float]], **extra: Any) -> dict[str, Any]:
    return {"version": "cov", "assets": [{"code": f"A{i}", "expected_return": 0.05 + 0.01 * i} for i in range(len(cov))],
            "covariance": cov, "risk_free_rate": 0.01, "cross_check": False} | extra


PUBLISH: list[tuple[str, Any]] = [
    ("nan-literal", RAW_MIX % b"NaN"),
    ("infinity-literal", RAW_MIX % b"Infinity"),
    ("minus-infinity-literal", RAW_MIX % b"-Infinity"),
    ("overflow-literal", RAW_MIX % b"1e400"),
    ("huge-integer-literal", RAW_MIX % (b"9" * 400)),
    ("nan-string", asset(0, expected_return="nan")),
    ("bool-return", asset(0, expected_return=False)),
    ("string-return", asset(0, expected_return="0.05")),
    ("null-rf", mix(risk_free_rate=None)),
    ("string-rf", mix(risk_free_rate="0.03")),
    ("missing-version", mix(version=_DROP)),
    ("missing-assets", mix(assets=_DROP)),
    ("empty-assets", mix(assets=[], correlation=[])),
    ("assets-object", mix(assets={"code": "X"})),
    ("duplicate-code", asset(1, code="HARBOR_EQ")),
    ("empty-code", asset(0, code="")),
    ("code-with-space", asset(0, code="HARBOR EQ")),
    ("code-too-long", asset(0, code="X" * 40)),
    ("zero-volatility", asset(2, volatility=0.0)),
    ("negative-volatility", asset(2, volatility=-0.1)),
    ("return-absurd", asset(0, expected_return=1e6)),
    ("volatility-absurd", asset(0, volatility=1e6)),
    ("missing-volatility-with-correlation", asset(3, volatility=None)),
    ("correlation-short-row", corr(lambda c: [row[:5] if i == 2 else row for i, row in enumerate(c.tolist())])),
    ("correlation-wrong-size", corr(lambda c: c[:5, :5].tolist())),
    ("correlation-asymmetric", corr(lambda c: (c + np.triu(np.full_like(c, 0.01), 1)).tolist())),
    ("correlation-diagonal", corr(lambda c: (c - 0.1 * np.eye(len(c))).tolist())),
    ("correlation-above-one", corr(lambda c: np.where(np.eye(len(c)) > 0, 1.0, np.where(c == 0.78, 1.2, c)).tolist())),
    ("correlation-not-psd", corr(non_psd)),
    ("correlation-nested-strings", corr(lambda c: [[str(x) for x in row] for row in c.tolist()])),
    ("correlation-flat", corr(lambda c: c.ravel().tolist())),
    ("both-matrices", mix(covariance=[[0.04]])),
    ("no-matrix", mix(correlation=_DROP)),
    ("covariance-not-psd", cov_body([[0.04, 0.05], [0.05, 0.04]])),
    ("covariance-asymmetric", cov_body([[0.04, 0.01], [0.02, 0.04]])),
    ("covariance-negative-diagonal", cov_body([[-0.04, 0.0], [0.0, 0.04]])),
    ("covariance-singular", cov_body([[0.04, 0.04], [0.04, 0.04]])),
    ("covariance-vols-disagree", {**cov_body([[0.04, 0.0], [0.0, 0.09]]), "assets": [{"code": "A0", "expected_return": 0.05, "volatility": 0.5}, {"code": "A1", "expected_return": 0.06, "volatility": 0.3}]}),
    ("covariance-ragged", cov_body([[0.04, 0.0], [0.0]])),
    ("bounds-unknown-code", mix(bounds={"NOPE": [0, 0.5]})),
    ("bounds-reversed", mix(bounds={"CIVIC_BOND": [0.5, 0.2]})),
    ("bounds-sum-hi-below-one", mix(bounds={a["code"]: [0, 0.1] for a in DEMO_MIX["assets"]})),
    ("bounds-sum-lo-above-one", mix(bounds={a["code"]: [0.2, 0.5] for a in DEMO_MIX["assets"]})),
    ("bounds-negative-long-only", mix(bounds={"CIVIC_BOND": [-0.2, 0.5]})),
    ("bounds-triple", mix(bounds={"CIVIC_BOND": [0, 0.2, 0.4]})),
    ("bounds-nan-string", mix(bounds={"CIVIC_BOND": ["nan", 0.4]})),
    ("bounds-object", mix(bounds=[0, 1])),
    ("rf-above-every-return", mix(risk_free_rate=0.2)),
    ("inefficient-branch", cov_body([[0.04, 0.0], [0.0, 0.09]], risk_free_rate=0.08, long_only=False)),
    ("unknown-field", mix(leverage=2)),
    ("unknown-asset-field", asset(0, sector="x")),
    ("long-only-string", mix(long_only="yes")),
    ("cross-check-int", mix(cross_check=1)),
    ("version-slash", mix(version="2026/q4")),
    ("body-array", [mix()]),
    ("body-string", "mix"),
    ("body-null", None),
    ("invalid-json", b'{"version": "x", "assets": ['),
    ("empty-body", b""),
    ("too-many-assets", cov_body(np.eye(13).tolist())),
    ("oversized-body", b'{"version": "x", "pad": "' + b"x" * 300_000 + b'"}'),
]

# Where the error must point, for the cases that reach the numerics' own validation.
PUBLISH_FIELD = {
    "duplicate-code": "assets[1].code",
    "correlation-short-row": "correlation",
    "correlation-wrong-size": "correlation",
    "correlation-asymmetric": "correlation[1][0]",
    "correlation-diagonal": "correlation[0][0]",
    "correlation-above-one": "correlation[0][1]",
    "correlation-not-psd": "correlation",
    "covariance-not-psd": "covariance",
    "covariance-singular": "covariance",
    "covariance-vols-disagree": "assets[0].volatility",
    "missing-volatility-with-correlation": "assets[3].volatility",
    "bounds-unknown-code": "bounds.NOPE",
    "bounds-reversed": "bounds.CIVIC_BOND",
    "bounds-sum-hi-below-one": "bounds",
    "bounds-sum-lo-above-one": "bounds",
    "bounds-negative-long-only": "bounds.CIVIC_BOND",
    "rf-above-every-return": "risk_free_rate",
    "inefficient-branch": "risk_free_rate",
    "nan-literal": "assets[0].expected_return",
    "unknown-field": "leverage",
}

ALLOCATE: list[tuple[str, Any]] = [
    ("amount-nan-literal", RAW_ALLOC % (b"NaN", b"4")),
    ("amount-infinity-literal", RAW_ALLOC % (b"Infinity", b"4")),
    ("aversion-nan-literal", RAW_ALLOC % (b'"100"', b"NaN")),
    ("aversion-overflow-literal", RAW_ALLOC % (b'"100"', b"1e999")),
    ("amount-nan-string", alloc(amount="NaN")),
    ("amount-infinity-string", alloc(amount="Infinity")),
    ("amount-negative", alloc(amount="-5.00")),
    ("amount-three-decimals", alloc(amount="10.005")),
    ("amount-float-three-decimals", alloc(amount=10.005)),
    ("amount-bool", alloc(amount=True)),
    ("amount-missing", alloc(amount=_DROP)),
    ("amount-object", alloc(amount={"value": 5})),
    ("amount-huge", alloc(amount="1e30")),
    ("amount-words", alloc(amount="ten")),
    ("member-missing", alloc(member_id=_DROP)),
    ("member-empty", alloc(member_id="")),
    ("member-number", alloc(member_id=417)),
    ("member-too-long", alloc(member_id="m" * 200)),
    ("member-control-char", alloc(member_id="m\n1")),
    ("amount-with-newline", alloc(amount="12\n34")),
    ("preference-missing", alloc(preference=_DROP)),
    ("preference-empty", pref({})),
    ("preference-list", pref([{"risk_aversion": 4}])),
    ("preference-two-kinds", pref({"risk_aversion": 4, "target_volatility": 0.1})),
    ("preference-three-kinds", pref({"risk_aversion": 4, "risk_score": 2, "max_loss": 0.1, "confidence": 0.9})),
    ("preference-unknown", pref({"appetite": "high"})),
    ("aversion-string", pref({"risk_aversion": "4"})),
    ("aversion-bool", pref({"risk_aversion": True})),
    ("aversion-negative", pref({"risk_aversion": -1})),
    ("aversion-absurd", pref({"risk_aversion": 1e9})),
    ("target-vol-negative", pref({"target_volatility": -0.1})),
    ("target-vol-percent", pref({"target_volatility": 12})),
    ("max-loss-no-confidence", pref({"max_loss": 0.1})),
    ("confidence-without-max-loss", pref({"risk_aversion": 3, "confidence": 0.9})),
    ("confidence-above-one", pref({"max_loss": 0.1, "confidence": 1.5})),
    ("confidence-half", pref({"max_loss": 0.1, "confidence": 0.5})),
    ("confidence-one", pref({"max_loss": 0.1, "confidence": 1.0})),
    ("max-loss-zero", pref({"max_loss": 0.0, "confidence": 0.95})),
    ("max-loss-negative", pref({"max_loss": -0.1, "confidence": 0.95})),
    ("horizon-negative", pref({"max_loss": 0.1, "confidence": 0.95, "horizon_years": -1})),
    ("horizon-string", pref({"max_loss": 0.1, "confidence": 0.95, "horizon_years": "1"})),
    ("score-float", pref({"risk_score": 2.5})),
    ("score-string", pref({"risk_score": "3"})),
    ("score-not-in-table", pref({"risk_score": 99})),
    ("holdings-missing-safe", alloc(amount=_DROP, holdings={"risky": "10"})),
    ("holdings-negative", alloc(amount=_DROP, holdings={"risky": "-10", "safe": "5"})),
    ("holdings-nan", alloc(amount=_DROP, holdings={"risky": "NaN", "safe": "5"})),
    ("holdings-extra", alloc(amount=_DROP, holdings={"risky": "1", "safe": "5", "other": "1"})),
    ("contribution-without-holdings", alloc(contribution="100")),
    ("contribution-negative", alloc(amount=_DROP, holdings={"risky": "1", "safe": "5"}, contribution="-1")),
    ("amount-disagrees-with-holdings", alloc(amount="1000", holdings={"risky": "1", "safe": "5"})),
    ("unknown-mix", alloc(mix_version="1999-q1")),
    ("mix-version-bad-chars", alloc(mix_version="../etc")),
    ("mix-version-missing", alloc(mix_version=_DROP)),
    ("unknown-field", alloc(comment="hi")),
    ("body-array", [alloc()]),
    ("invalid-json", b'{"member_id": '),
    ("empty-body", b""),
]

PLAN: list[tuple[str, Any]] = [
    ("plan-id-illegal", {"plan_id": "a b", "name": "n", "currency": "USD"}),
    ("currency-lower", {"plan_id": "p1", "name": "n", "currency": "usd"}),
    ("currency-long", {"plan_id": "p1", "name": "n", "currency": "USDX"}),
    ("name-empty", {"plan_id": "p1", "name": "", "currency": "USD"}),
    ("policy-max-below-min", {"plan_id": "p1", "name": "n", "currency": "USD", "policy": {"min_risky_fraction": 0.6, "max_risky_fraction": 0.4}}),
    ("policy-leverage-unpriced", {"plan_id": "p1", "name": "n", "currency": "USD", "policy": {"max_risky_fraction": 1.5}}),
    ("policy-min-negative", {"plan_id": "p1", "name": "n", "currency": "USD", "policy": {"min_risky_fraction": -0.1}}),
    ("policy-table-key", {"plan_id": "p1", "name": "n", "currency": "USD", "policy": {"risk_score_table": {"high": 2.0}}}),
    ("policy-table-nan", {"plan_id": "p1", "name": "n", "currency": "USD", "policy": {"risk_score_table": {"1": "NaN"}}}),
    ("policy-unknown", {"plan_id": "p1", "name": "n", "currency": "USD", "policy": {"leverage": True}}),
    ("policy-borrowing-absurd", {"plan_id": "p1", "name": "n", "currency": "USD", "policy": {"max_risky_fraction": 1.5, "borrowing_rate": 7.0}}),
    ("plan-missing-currency", {"plan_id": "p1", "name": "n"}),
]

KEY: list[tuple[str, Any]] = [
    ("role-admin", {"role": "admin"}),
    ("role-operator", {"role": "operator"}),
    ("role-missing", {}),
    ("role-number", {"role": 1}),
]

FRONTIER = [("points-text", "abc"), ("points-zero", "0"), ("points-negative", "-5"), ("points-huge", "1000000000"), ("points-float", "2.5")]


@pytest.fixture
async def limited(database: Database, new_plan_id: str) -> AsyncIterator[tuple[httpx.AsyncClient, dict[str, str], str]]:
    settings = Settings(database_url=database.url, bootstrap_operator_key=OPERATOR_KEY, **SMALL_LIMITS)
    app = create_app(settings, database, migrate=False)
    operator = {"Authorization": f"Bearer {OPERATOR_KEY}"}
    async with app.router.lifespan_context(app):
        async with httpx.AsyncClient(transport=httpx.ASGITransport(app=app), base_url="http://mixline.test") as c:
            plan = {"plan_id": new_plan_id, "name": "Corpus", "currency": "USD", "policy": {"risk_score_table": {"1": 8.0}}}
            assert (await c.post("/v1/plans", json=plan, headers=operator)).status_code == 201
            keys = {}
            for role in ("committee", "portal"):
                r = await c.post(f"/v1/plans/{new_plan_id}/keys", json={"role": role}, headers=operator)
                keys[role] = {"Authorization": f"Bearer {r.json()['secret']}"}
            r = await c.post(f"/v1/plans/{new_plan_id}/mixes", json=DEMO_MIX | {"cross_check": False}, headers=keys["committee"])
            assert r.status_code == 201, r.text
            yield c, {"operator": operator["Authorization"], **{k: v["Authorization"] for k, v in keys.items()}}, new_plan_id


async def send(c: httpx.AsyncClient, url: str, key: str, body: Any) -> httpx.Response:
    headers = {"Authorization": key, "Content-Type": "application/json"}
    if isinstance(body, bytes):
        return await c.post(url, content=body, headers=headers)
    return await c.post(url, json=body, headers=headers)


def check(r: httpx.Response) -> None:
    assert 400 <= r.status_code < 500, (r.status_code, r.text[:500])
    assert r.headers["content-type"].startswith("application/problem+json"), r.headers
    body = r.json()  # parseable: no NaN ever echoed back
    assert body["status"] == r.status_code and body["title"] and body["detail"]
    if r.status_code == 422:
        assert body["errors"] and all(e["field"] and e["reason"] for e in body["errors"])


def test_corpus_is_large_enough() -> None:
    assert len(PUBLISH) + len(ALLOCATE) + len(PLAN) + len(KEY) + len(FRONTIER) >= 100


@pytest.mark.parametrize(("case", "body"), PUBLISH, ids=[c for c, _ in PUBLISH])
async def test_publish_corpus(limited: Any, case: str, body: Any) -> None:
    c, keys, plan_id = limited
    r = await send(c, f"/v1/plans/{plan_id}/mixes", keys["committee"], body)
    check(r)
    if case in {"too-many-assets", "oversized-body"}:
        assert r.status_code == 413
    if case in PUBLISH_FIELD:
        assert PUBLISH_FIELD[case] in [e["field"] for e in r.json()["errors"]], r.json()
    if case == "correlation-not-psd":
        assert "smallest eigenvalue -" in r.json()["detail"]


@pytest.mark.parametrize(("case", "body"), ALLOCATE, ids=[c for c, _ in ALLOCATE])
async def test_allocate_corpus(limited: Any, case: str, body: Any) -> None:
    c, keys, plan_id = limited
    r = await send(c, f"/v1/plans/{plan_id}/allocations", keys["portal"], body)
    check(r)
    # Nothing refused is ever logged.
    v = await c.get(f"/v1/plans/{plan_id}/audit/verify", headers={"Authorization": keys["committee"]})
    assert v.json()["checked"] == 0


@pytest.mark.parametrize(("case", "body"), PLAN, ids=[c for c, _ in PLAN])
async def test_plan_corpus(limited: Any, case: str, body: Any) -> None:
    c, keys, _ = limited
    check(await send(c, "/v1/plans", keys["operator"], body))


@pytest.mark.parametrize(("case", "body"), KEY, ids=[c for c, _ in KEY])
async def test_key_corpus(limited: Any, case: str, body: Any) -> None:
    c, keys, plan_id = limited
    check(await send(c, f"/v1/plans/{plan_id}/keys", keys["operator"], body))


@pytest.mark.parametrize(("case", "points"), FRONTIER, ids=[c for c, _ in FRONTIER])
async def test_frontier_corpus(limited: Any, case: str, points: str) -> None:
    c, keys, plan_id = limited
    r = await c.get(f"/v1/plans/{plan_id}/mixes/{DEMO_MIX['version']}/frontier", params={"points": points}, headers={"Authorization": keys["portal"]})
    check(r)


async def _chunks(total: int, size: int = 16_384) -> AsyncIterator[bytes]:
    # A JSON string that never ends: only the count of bytes received can stop it.
    yield b'{"member_id": "'
    sent = 0
    while sent < total:
        yield b"x" * size
        sent += size


@pytest.mark.parametrize(
    ("route", "role"),
    [("/v1/plans", "operator"), ("/v1/plans/{plan}/keys", "operator"), ("/v1/plans/{plan}/mixes", "committee"),
     ("/v1/plans/{plan}/allocations", "portal"), ("/v1/plans/{plan}/allocations/batch", "portal")],
)
async def test_chunked_body_over_the_limit_is_413_on_every_route(limited: Any, route: str, role: str) -> None:
    c, keys, plan_id = limited
    limit = SMALL_LIMITS["max_body_bytes"]
    url = route.format(plan=plan_id)
    # An iterator body is sent chunked, without Content-Length: the limit must count the bytes.
    r = await c.post(url, content=_chunks(2 * limit), headers={"Authorization": keys[role], "Content-Type": "application/json"})
    assert "content-length" not in r.request.headers
    assert r.status_code == 413, r.text
    assert r.headers["content-type"].startswith("application/problem+json")
    # Under the limit the same route answers as usual (a 4xx for this body, never the 413).
    small = await c.post(url, content=_chunks(limit // 4), headers={"Authorization": keys[role], "Content-Type": "application/json"})
    assert small.status_code != 413 and small.status_code < 500, small.text
