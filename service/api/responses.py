"""Response helpers: JSON bodies written once with orjson, and the error responses OpenAPI declares."""

from __future__ import annotations

from typing import Any

import orjson
from starlette.background import BackgroundTask
from starlette.responses import Response

from .errors import PROBLEM_MEDIA_TYPE

_DESCRIPTIONS = {
    400: "Malformed request",
    401: "Missing or wrong key",
    403: "Right key, wrong role",
    404: "Not found (or another plan's)",
    409: "Conflict",
    406: "None of the accepted media types can be given",
    413: "Too large",
    415: "Unsupported media type",
    422: "Invalid or unanswerable input",
    503: "Not ready",
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
            "description": _DESCRIPTIONS.get(status, "Error"),
            "content": {PROBLEM_MEDIA_TYPE: {"schema": {"$ref": "#/components/schemas/Problem"}}},
        }
        for status in statuses
    }


AUTHED = (401, 403, 404, 422)
