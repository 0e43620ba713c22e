"""POST /v1/plans/{plan_id}/mixes/estimate (committee): a mix body estimated from a return history,
sent as JSON or as text/csv with the options as query parameters. Nothing is stored. HTTP only."""

from __future__ import annotations

import math
from typing import Annotated, Any

from fastapi import APIRouter, Query, Request
from fastapi.exceptions import RequestValidationError
from pydantic import ValidationError
from starlette.concurrency import run_in_threadpool
from starlette.responses import Response

from service.allocation import estimate_mix

from .bodies import parse_body
from .deps import CallerDep, StateDep
from .errors import Unprocessable, UnsupportedMediaType, field_error
from .history_csv import read_history_csv
from .responses import AUTHED, json_response, problems
from .schemas import CovarianceMethod, EstimateIn, EstimateOut, Frequency

router = APIRouter(prefix="/v1/plans/{plan_id}/mixes", tags=["mixes"])
CSV_OPTIONS = ("frequency", "covariance_method", "expected_returns", "risk_free_rate", "repair")


def _given_returns(text: str) -> str | dict[str, float]:
    """`historical`, or `CODE:0.061,CODE:0.042` (annual decimals) in a query parameter."""
    if text == "historical":
        return text
    given: dict[str, float] = {}
    for part in text.split(","):
        code, sep, value = part.partition(":")
        try:
            rate = float(value) if sep else math.nan
        except ValueError:
            rate = math.nan
        if not math.isfinite(rate):
            reason = "give 'historical' or CODE:rate pairs separated by commas, e.g. HARBOR_EQ:0.07,CIVIC_BOND:0.035"
            raise Unprocessable(f"expected_returns: {reason}", errors=[field_error("expected_returns", reason)])
        given[code.strip()] = rate
    return given


def _from_csv(raw: bytes, options: dict[str, Any]) -> tuple[EstimateIn, list[str]]:
    dates, series, lines = read_history_csv(raw)
    for name in ("frequency", "risk_free_rate"):
        if options[name] is None:
            reason = "required as a query parameter when the history is sent as text/csv"
            raise Unprocessable(f"{name}: {reason}", errors=[field_error(name, reason)])
    doc = {
        "frequency": options["frequency"],
        "returns": series,
        "dates": dates,
        "covariance_method": options["covariance_method"],
        "expected_returns": _given_returns(options["expected_returns"]),
        "risk_free_rate": options["risk_free_rate"],
        "repair": options["repair"],
    }
    try:
        return EstimateIn.model_validate(doc), lines
    except ValidationError as error:
        errors = [{**e, "loc": ("body", *e["loc"])} for e in error.errors(include_url=False, include_input=False)]
        raise RequestValidationError(errors) from None


@router.post(
    "/estimate", response_model=EstimateOut, operation_id="estimate_mix",
    responses=problems(*AUTHED, 415),
    openapi_extra={
        "requestBody": {
            "required": True,
            "content": {
                "application/json": {"schema": {"$ref": "#/components/schemas/EstimateIn"}},
                "text/csv": {"schema": {"type": "string", "description": "date,CODE,CODE,... then one row per period"}},
            },
        }
    },
)
async def estimate(
    plan_id: str,
    request: Request,
    caller: CallerDep,
    state: StateDep,
    frequency: Annotated[Frequency | None, Query(description="text/csv only: daily, weekly, monthly, quarterly, annual")] = None,
    covariance_method: Annotated[CovarianceMethod, Query(description="text/csv only: sample or shrinkage")] = "sample",
    expected_returns: Annotated[str, Query(description="text/csv only: historical, or CODE:rate,CODE:rate")] = "historical",
    risk_free_rate: Annotated[float | None, Query(description="text/csv only: annual decimal")] = None,
    repair: Annotated[bool, Query(description="text/csv only: take the nearest correlation matrix if needed")] = False,
) -> Response:
    caller.require(plan_id, "committee")
    await state.plan_soon(plan_id)
    media = request.headers.get("content-type", "").split(";")[0].strip().lower()
    raw = await request.body()
    lines: list[str] | None = None
    if media == "application/json":
        # The options of a JSON history are its fields; a query parameter beside it would be
        # silently ignored, so it is refused.
        beside = [name for name in CSV_OPTIONS if name in request.query_params]
        if beside:
            reason = "a query parameter for a text/csv history only; a JSON history gives it in the body"
            raise Unprocessable(f"{beside[0]}: {reason}", errors=[field_error(name, reason) for name in beside])
        # A history of 2,000 assets is hundreds of thousands of numbers: parsed off the event loop.
        body = await run_in_threadpool(parse_body, EstimateIn, raw)
    elif media == "text/csv":
        body, lines = await run_in_threadpool(_from_csv, raw, {
            "frequency": frequency, "covariance_method": covariance_method, "expected_returns": expected_returns,
            "risk_free_rate": risk_free_rate, "repair": repair,
        })
    else:
        raise UnsupportedMediaType(f"send the history as application/json or text/csv, not {media or 'no content type'}")
    if len(body.returns) > state.settings.max_assets:
        raise Unprocessable(f"returns: at most {state.settings.max_assets} assets",
                            errors=[field_error("returns", f"at most {state.settings.max_assets} assets")])
    # Estimation (and a repair above all) is CPU work: off the event loop.
    doc = await run_in_threadpool(
        lambda: estimate_mix(
            returns=body.returns, frequency=body.frequency, covariance_method=body.covariance_method,
            expected_returns=body.expected_returns, risk_free_rate=body.risk_free_rate, repair=body.repair,
            max_condition_number=state.settings.max_condition_number, dates=body.dates, date_locations=lines,
        )
    )
    return json_response(doc)
