"""The OpenAPI document itself: what a generated client needs from it, and the mismatches a
fuzzer once found between it and the validation (each asserted on the document, so that they
cannot come back unnoticed even where test_openapi_fuzz.py allows a 422)."""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import jsonschema
import pytest

from service.api import create_app
from service.api.errors import PROBLEM_KINDS, problem_type
from service.settings import Settings

DOC = create_app(Settings(max_frontier_points=321)).openapi()
OPERATIONS = [
    (path, method, op) for path, item in DOC["paths"].items() for method, op in item.items() if isinstance(op, dict)
]


def valid(component: str, instance: Any) -> bool:
    """Draft 2020-12 (OpenAPI 3.1's dialect) against a component, references resolved in the document."""
    schema = {"$ref": f"#/components/schemas/{component}", "components": DOC["components"]}
    return jsonschema.Draft202012Validator(schema).is_valid(instance)


def properties(node: Any, where: str = "") -> Iterator[tuple[str, str, dict[str, Any]]]:
    """(where, name, schema) of every property declared anywhere below node."""
    if isinstance(node, dict):
        for name, schema in (node.get("properties") or {}).items():
            if isinstance(schema, dict):
                yield where, name, schema
        for key, value in node.items():
            yield from properties(value, f"{where}/{key}")
    elif isinstance(node, list):
        for i, value in enumerate(node):
            yield from properties(value, f"{where}/{i}")


def test_every_field_says_what_it_means() -> None:
    missing = sorted({f"{where}.{name}" for where, name, schema in properties(DOC["components"]["schemas"])
                      if "description" not in schema and schema != {"type": "null"} and "/oneOf/" not in where})
    assert not missing, missing


def test_times_and_money_have_formats() -> None:
    for where, name, schema in properties(DOC["components"]["schemas"]):
        if name.endswith("_at"):
            kinds = schema.get("anyOf", [schema])
            assert {"type": "string", "format": "date-time"}.items() <= next(k for k in kinds if k.get("type") == "string").items(), (where, name)
    # an answer's money is a decimal string of the declared pattern
    amount = DOC["components"]["schemas"]["AllocationOut"]["properties"]["amount"]
    assert amount["format"] == "decimal" and amount["pattern"] == r"^[0-9]+(?:\.[0-9]+)?$"
    assert valid("AllocationIn", {"member_id": "m-1", "mix_version": "v1", "amount": "10.50",
                                  "preference": {"risk_aversion": 3}})
    assert not valid("AllocationIn", {"member_id": "m-1", "mix_version": "v1", "amount": "1e3",
                                      "preference": {"risk_aversion": 3}})


def test_a_preference_is_exactly_one_closed_kind_and_may_be_left_out() -> None:
    member = {"member_id": "m-1", "mix_version": "v1", "amount": "100.00"}
    assert valid("AllocationIn", member)  # the glide path's member: no preference
    assert valid("AllocationIn", member | {"years_to_retirement": 25})
    for preference in ({"risk_aversion": 4}, {"target_volatility": 0.08}, {"risk_score": 3},
                       {"max_loss": 0.1, "confidence": 0.95}, {"max_loss": 0.1, "confidence": 0.95, "horizon_years": 3}):
        assert valid("AllocationIn", member | {"preference": preference}), preference
    for preference in ({}, {"risk_aversion": 4, "risk_score": 3}, {"max_loss": 0.1}, {"risk_aversion": 4, "confidence": 0.9},
                       {"risk_aversion": -1}, {"risk_aversion": 4, "mood": "calm"}):
        assert not valid("AllocationIn", member | {"preference": preference}), preference


def test_a_mix_gives_exactly_one_risk_description() -> None:
    assets = [{"code": "A", "expected_return": 0.05, "volatility": 0.1}, {"code": "B", "expected_return": 0.03, "volatility": 0.05}]
    base = {"version": "v1", "assets": assets, "risk_free_rate": 0.01}
    matrix = [[1.0, 0.2], [0.2, 1.0]]
    assert valid("MixIn", base | {"correlation": matrix})
    assert valid("MixIn", base | {"covariance": matrix, "correlation": None})
    assert not valid("MixIn", base)
    assert not valid("MixIn", base | {"correlation": None, "covariance": None})
    assert not valid("MixIn", base | {"correlation": matrix, "covariance": matrix})
    # a correlation needs every asset's volatility
    assert not valid("MixIn", base | {"assets": [{"code": "A", "expected_return": 0.05}, assets[1]], "correlation": matrix})
    assert not valid("MixIn", base | {"version": "current", "correlation": matrix})


@pytest.mark.parametrize(("path", "method", "op"), OPERATIONS, ids=[f"{m.upper()} {p}" for p, m, _ in OPERATIONS])
def test_every_status_an_operation_can_answer_is_declared(path: str, method: str, op: dict[str, Any]) -> None:
    responses = op["responses"]
    assert "500" in responses
    if op.get("security"):
        assert {"401", "403", "404", "422", "429", "503"} <= set(responses)
        assert responses["401"]["headers"]["WWW-Authenticate"]["required"]
        assert responses["429"]["headers"]["Retry-After"]["required"]
    if "requestBody" in op:
        assert {"413", "415", "422"} <= set(responses)
    for status, response in responses.items():
        assert response["headers"]["X-Request-ID"]["required"], status
        if int(status) >= 400:
            assert list(response["content"]) == ["application/problem+json"], status
        elif status != "204":
            assert all("schema" in media for media in response["content"].values()), status


def test_the_problem_shape_is_typed() -> None:
    problem = DOC["components"]["schemas"]["Problem"]["properties"]
    assert problem["type"]["enum"] == [problem_type(kind) for kind in PROBLEM_KINDS]
    assert valid("Problem", {"type": "urn:mixline:problem:validation", "title": "Invalid request", "status": 422,
                             "detail": "x: bad", "errors": [{"field": "x", "reason": "bad"}]})
    assert not valid("Problem", {"type": "urn:mixline:problem:validation", "title": "Invalid request", "status": 422,
                                 "detail": "x: bad", "errors": [{"field": "x"}]})


def test_parameters_and_answers_a_client_relies_on() -> None:
    ops = {op["operationId"]: op for _, _, op in OPERATIONS}
    points = next(p for p in ops["get_frontier"]["parameters"] if p["name"] == "points")
    assert points["schema"]["maximum"] == 321  # the process's MIXLINE_MAX_FRONTIER_POINTS
    key = next(p for p in ops["create_allocation"]["parameters"] if p["name"] == "Idempotency-Key")
    assert key["schema"]["pattern"]
    assert ops["create_allocation"]["responses"]["201"]["headers"]["Mixline-Replay"]
    assert ops["publish_mix"]["responses"]["200"]["content"]["application/json"]["schema"] == {
        "$ref": "#/components/schemas/MixOut"
    }
    assert list(ops["metrics"]["responses"]["200"]["content"]) == ["text/plain"]
    for enum_field, component in (("role", "KeyInfoOut"), ("state", "MixVersionOut"), ("method", "PortfolioOut")):
        assert "enum" in DOC["components"]["schemas"][component]["properties"][enum_field], enum_field
    answer = DOC["components"]["schemas"]["AllocationOut"]["properties"]
    assert answer["limited_by"]["enum"] == ["min_risky_fraction", "max_risky_fraction", None]
    assert answer["preference_source"]["enum"] == ["member", "glide_path"]
