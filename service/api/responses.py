"""Response helpers: JSON bodies written once with orjson, and the error responses OpenAPI declares."""

from __future__ import annotations

from typing import Any

import orjson
from starlette.background import BackgroundTask
from starlette.responses import Response

from .errors import PROBLEM_MEDIA_TYPE

# What each error status means here (the OpenAPI's response descriptions; app.install_openapi
# gives every one of them the problem+json content).
DESCRIPTIONS = {
    400: "Malformed Idempotency-Key",
    401: "Missing, unknown, expired or revoked key",
    403: "Right key, wrong role",
    404: "Not found (or another plan's)",
    406: "None of the accepted media types can be given",
    409: "Conflict",
    413: "Body, batch or mix over its limit",
    415: "A body that is not JSON (or CSV where the operation takes it)",
    422: "Invalid or unanswerable input",
    429: "Rate limited",
    500: "A failure of the service itself, logged under the problem's request_id",
    503: "The database cannot be reached",
}


def json_response(
    body: Any, status_code: int = 200, headers: dict[str, str] | None = None, background: BackgroundTask | None = None
) -> Response:
    return Response(
        orjson.dumps(body), status_code=status_code, media_type="application/json", headers=headers, background=background
    )


def raw_json_response(body: bytes | memoryview, status_code: int = 200, headers: dict[str, str] | None = None) -> Response:
    return Response(body, status_code=status_code, media_type="application/json", headers=headers)


def problems(*statuses: int) -> dict[int | str, dict[str, Any]]:
    """Declare error responses as problem+json (schema-based fuzzers check the media type)."""
    return {
        status: {
            "description": DESCRIPTIONS[status],
            "content": {PROBLEM_MEDIA_TYPE: {"schema": {"$ref": "#/components/schemas/Problem"}}},
        }
        for status in statuses
    }


AUTHED = (401, 403, 404, 422)
