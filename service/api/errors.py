"""RFC 9457 problem details: the one error shape every 4xx/5xx of mixline has.

    ProblemError                   root; carries status, title, detail and optional field errors
    ├── Unauthorized         401   no, wrong, expired or revoked key
    ├── Forbidden            403   right key, wrong role
    ├── NotFound             404   absent, or another plan's (never 403 across plans)
    ├── ConflictError        409   version with other content; same idempotency key in flight
    ├── PayloadTooLarge      413   batch or body over the configured limit
    ├── UnsupportedMediaType 415   a body that is not JSON (or CSV where a route takes it)
    ├── Unprocessable        422   well-formed but unanswerable input
    ├── TooManyRequests      429   a key's rate limit, or too many failed authentications
    ├── DatabaseUnavailable  503   the database cannot be reached (a route that needs it)
    └── NotReady             503   readiness failed

One problem type per kind of error: every 422 is urn:mixline:problem:validation, whether the
schema, the allocation rules or the numerics refused the input; every 404 is
urn:mixline:problem:not-found, whether a route or a record is missing. Domain errors from below
become problems here: a LifecycleConflict (a version not in force, a retired version activated,
the only version in force retired) 409 with ``active_version``; any other AllocationError and
numerics' InputError 422; request validation errors become 422
with one entry per field; a database that cannot be reached becomes 503 with Retry-After. No
handler ever echoes the offending input back, so a NaN or a megabyte of garbage can never break
the error response itself. Every problem body names the request's `request_id`, the id the
access log and the incident log carry.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Iterator, Mapping, Sequence
from typing import Any

import orjson
from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from sqlalchemy import exc as database_errors
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.responses import Response

from service.allocation import AllocationError, LifecycleConflict, MemberErrors
from service.allocation.money import AMOUNT_PATTERN
from service.allocation.requests import TooManyMembers
from service.numerics import InputError
from service.store import IdempotencyLeaseLost

from .request_context import current_request

PROBLEM_MEDIA_TYPE = "application/problem+json"
FIELD_MARK = "\x1f"  # the same mark as schemas.FIELD_MARK (errors must not import schemas)
log = logging.getLogger("mixline.api")
# How long a client should wait before retrying while the database cannot be reached.
DATABASE_RETRY_AFTER_SECONDS = 2

# The Idempotency-Key header's form: an RFC 8941 sf-string ("..."), as the draft asks, or a bare
# token. Kept here, beside its words, because idempotency.py (which reads keys with it and
# declares it in the OpenAPI) imports this module.
IDEMPOTENCY_KEY_PATTERN = r'^(?:"([ !#-\[\]-~]{1,255})"|([!#-~]{1,255}))$'
IDEMPOTENCY_KEY_WORDS = "1 to 255 printable ASCII characters in double quotes, or without quotes, spaces and double quotes"

# What the identifier patterns of schemas.py allow, in words: a message never shows a regex.
# tests/api/test_errors.py checks that every pattern in the OpenAPI document is described here.
PATTERN_WORDS = {
    r"^[A-Za-z0-9][A-Za-z0-9._\-]{0,63}$":
        "1 to 64 letters, digits, '.', '_' or '-', starting with a letter or digit",
    r"^[A-Za-z0-9][A-Za-z0-9_.\-]{0,31}$":
        "1 to 32 letters, digits, '.', '_' or '-', starting with a letter or digit",
    r"^[!#-\[\]-~]{1,128}$":
        "1 to 128 printable ASCII characters without space, double quote or backslash",
    r"^[A-Z]{3}$": "three capital letters (an ISO 4217 currency code such as USD)",
    f"^{AMOUNT_PATTERN}$": 'digits, optionally a point and decimals, such as "1250.00"',
    f"^[+-]?{AMOUNT_PATTERN}$": 'an amount with its sign, such as "+12.34" or "-12.34"',
    r"^(0|-?[1-9][0-9]*)$": "an integer written plainly, such as 3 or -1",
    r"^[!-~]{1,128}$": "1 to 128 visible ASCII characters",
    r"^[0-9]+$": "a whole number of seconds",
    IDEMPOTENCY_KEY_PATTERN: IDEMPOTENCY_KEY_WORDS,
}


# Every kind of problem the service answers (the `type` is urn:mixline:problem:<kind>); the
# OpenAPI's Problem.type enumerates them and docs/API.md's table lists them.
PROBLEM_KINDS = (
    "bad-idempotency-key", "unauthorized", "forbidden", "not-found", "method-not-allowed", "not-acceptable",
    "conflict", "version-not-in-force", "version-state", "payload-too-large", "unsupported-media-type",
    "validation", "rate-limited", "database-unavailable", "not-ready", "internal",
)


def problem_type(slug: str) -> str:
    return f"urn:mixline:problem:{slug}"


class ProblemError(Exception):
    status = 500
    title = "Internal error"
    slug = "internal"

    def __init__(
        self,
        detail: str,
        *,
        errors: Sequence[dict[str, str]] | None = None,
        headers: dict[str, str] | None = None,
    ) -> None:
        super().__init__(detail)
        self.detail = detail
        self.errors = list(errors) if errors else None
        self.headers = headers


class Unauthorized(ProblemError):
    status, title, slug = 401, "Unauthorized", "unauthorized"


class Forbidden(ProblemError):
    status, title, slug = 403, "Forbidden", "forbidden"


class NotFound(ProblemError):
    status, title, slug = 404, "Not found", "not-found"


class ConflictError(ProblemError):
    status, title, slug = 409, "Conflict", "conflict"


class PayloadTooLarge(ProblemError):
    status, title, slug = 413, "Payload too large", "payload-too-large"


class UnsupportedMediaType(ProblemError):
    status, title, slug = 415, "Unsupported media type", "unsupported-media-type"


class Unprocessable(ProblemError):
    status, title, slug = 422, "Invalid request", "validation"


class TooManyRequests(ProblemError):
    status, title, slug = 429, "Too many requests", "rate-limited"

    def __init__(self, detail: str, *, retry_after: float) -> None:
        super().__init__(detail, headers={"Retry-After": str(max(1, math.ceil(retry_after)))})


class DatabaseUnavailable(ProblemError):
    status, title, slug = 503, "Database unavailable", "database-unavailable"

    def __init__(self, detail: str = "the database cannot be reached; retry shortly") -> None:
        super().__init__(detail, headers={"Retry-After": str(DATABASE_RETRY_AFTER_SECONDS)})


class NotReady(ProblemError):
    status, title, slug = 503, "Not ready", "not-ready"

    def __init__(self, detail: str) -> None:
        super().__init__(detail, headers={"Retry-After": str(DATABASE_RETRY_AFTER_SECONDS)})


def database_unreachable(exc: BaseException) -> bool:
    """True for the errors of a database that cannot be reached (or of a connection lost to
    it), as opposed to a bad statement: those are the service's own failures (500)."""
    if isinstance(exc, database_errors.DBAPIError) and exc.connection_invalidated:
        return True
    if type(exc).__name__ == "OperationalError" and type(exc).__module__.split(".")[0] in ("psycopg", "sqlite3"):
        return True  # a driver's own error that reached us unwrapped
    return isinstance(
        exc,
        database_errors.OperationalError
        | database_errors.InterfaceError
        | database_errors.DisconnectionError
        | database_errors.TimeoutError,
    )


def problem_response(
    status: int,
    title: str,
    detail: str,
    *,
    slug: str,
    errors: Sequence[dict[str, str]] | None = None,
    headers: dict[str, str] | None = None,
    instance: str | None = None,
    extra: dict[str, Any] | None = None,
) -> Response:
    body: dict[str, Any] = {"type": problem_type(slug), "title": title, "status": status, "detail": detail}
    if extra:
        body.update(extra)
    if instance:
        body["instance"] = instance
    info = current_request.get()
    if info is not None:
        body["request_id"] = info.request_id
    if errors:
        body["errors"] = list(errors)
    return Response(orjson.dumps(body), status_code=status, media_type=PROBLEM_MEDIA_TYPE, headers=headers)


def field_error(field: str, reason: str) -> dict[str, str]:
    return {"field": field, "reason": reason}


def _location(loc: Sequence[Any]) -> str:
    parts = list(loc)
    if parts and parts[0] in ("body", "query", "path"):
        parts = parts[1:]
    out = ""
    for p in parts:
        if isinstance(p, int):
            out += f"[{p}]"
        else:
            # pydantic puts union member names and function-validator tags in loc; they are not fields.
            text = str(p)
            # "[key]" marks an error in a mapping's key, which the key before it already names.
            if text.startswith("function-") or text in {"str", "int", "float", "list[float]", "[key]"}:
                continue
            out += ("." if out else "") + text
    return out or "body"


def validation_errors(exc: RequestValidationError) -> list[dict[str, str]]:
    errors = []
    for e in exc.errors():
        reason = str(e.get("msg", "invalid"))
        if reason.startswith("Value error, "):
            reason = reason[len("Value error, ") :]
        if e.get("type") == "json_invalid":
            # FastAPI puts the character offset in loc, pydantic a parser message in ctx; the
            # body itself is never echoed.
            position = next((p for p in e.get("loc", ()) if isinstance(p, int)), None)
            parser = (e.get("ctx") or {}).get("error")
            where = f"at character {position}" if position is not None else str(parser or "")
            errors.append(field_error("body", f"invalid JSON {where}".strip()))
            continue
        field = _location(e.get("loc", ()))
        if e.get("type") == "string_pattern_mismatch":
            pattern = str((e.get("ctx") or {}).get("pattern", ""))
            reason = f"must be {PATTERN_WORDS.get(pattern, 'in the form the API document gives')}"
        if FIELD_MARK in reason:
            sub, reason = reason.split(FIELD_MARK, 1)
            field = sub if field == "body" else f"{field}.{sub}"
        errors.append(field_error(field, reason))
    return errors


def response_for(exc: BaseException, path: str, method: str = "") -> Response:
    """The problem response for any exception (the one mapping every route uses)."""
    if isinstance(exc, ProblemError):
        return problem_response(
            exc.status, exc.title, exc.detail, slug=exc.slug, errors=exc.errors, headers=exc.headers,
            instance=path,
        )
    if isinstance(exc, LifecycleConflict):
        slug = "version-not-in-force" if exc.field == "mix_version" else "version-state"
        return problem_response(
            409, "Conflict", f"{exc.field}: {exc.reason}", slug=slug, errors=[field_error(exc.field, exc.reason)],
            instance=path, extra={"active_version": exc.active_version},
        )
    if isinstance(exc, IdempotencyLeaseLost):
        return response_for(
            ConflictError(
                "this request outlived its Idempotency-Key lease and another request with the key "
                "was answered meanwhile; nothing of this one was logged. Retry with the same key for "
                "that answer",
                headers={"Retry-After": "1"},
            ),
            path, method,
        )
    if isinstance(exc, MemberErrors):
        listed = [field_error(field, reason) for field, reason in exc.listed]
        opening = f"{listed[0]['field']}: {listed[0]['reason']}"
        if exc.count == 1:
            detail = opening
        else:
            shown = f"; {exc.count - len(listed)} more not listed" if exc.count > len(listed) else ""
            detail = f"{exc.count} problems in {exc.members} member(s){shown}; the first: {opening}"
        return problem_response(
            422, "Invalid request", detail, slug="validation", errors=listed, instance=path,
            extra={"error_count": exc.count},
        )
    if isinstance(exc, TooManyMembers):
        return problem_response(
            413, "Payload too large", f"{exc.field}: {exc.reason}", slug="payload-too-large",
            errors=[field_error(exc.field, exc.reason)], instance=path,
        )
    if isinstance(exc, AllocationError | InputError):
        return problem_response(
            Unprocessable.status, Unprocessable.title, f"{exc.field}: {exc.reason}", slug=Unprocessable.slug,
            errors=[field_error(exc.field, exc.reason)], instance=path,
        )
    if isinstance(exc, RequestValidationError):
        found = validation_errors(exc)
        first = found[0] if found else field_error("body", "invalid")
        more = f" (and {len(found) - 1} more)" if len(found) > 1 else ""
        return problem_response(
            Unprocessable.status, Unprocessable.title, f"{first['field']}: {first['reason']}{more}",
            slug=Unprocessable.slug, errors=found, instance=path,
        )
    if isinstance(exc, StarletteHTTPException) and exc.status_code == 400:
        # FastAPI's answer to a body its JSON reader cannot decode (bytes that are not UTF-8):
        # a malformed body is a validation problem like any other.
        reason = "is not valid JSON (UTF-8 text)"
        return problem_response(
            Unprocessable.status, Unprocessable.title, f"body: {reason}", slug=Unprocessable.slug,
            errors=[field_error("body", reason)], instance=path,
        )
    if isinstance(exc, StarletteHTTPException):
        # The same types as ours: a missing route and a missing record are one kind to a client.
        kinds = {
            404: (NotFound.title, NotFound.slug),
            405: ("Method not allowed", "method-not-allowed"),
            413: (PayloadTooLarge.title, PayloadTooLarge.slug),
        }
        # Starlette raises nothing else here; an unforeseen status is still one of our kinds.
        title, slug = kinds.get(exc.status_code, ("Invalid request", "validation"))
        return problem_response(
            exc.status_code, title, str(exc.detail), slug=slug, headers=getattr(exc, "headers", None),
            instance=path,
        )
    info = current_request.get()
    if database_unreachable(exc):
        if info is not None and info.log is not None:
            info.log.outage(_first_line(exc))
        else:
            log.warning("database unreachable: %s", _first_line(exc))
        return response_for(DatabaseUnavailable(), path, method)
    if info is not None and info.log is not None:
        info.log.incident(exc, method=method, route=path, request_id=info.request_id)
    else:
        log.error("unhandled error on %s %s", method, path, exc_info=exc)
    return problem_response(
        500, "Internal error",
        "the service failed to answer; the failure is logged under this request_id",
        slug="internal", instance=path,
    )


def _first_line(exc: BaseException) -> str:
    text = str(getattr(exc, "orig", None) or exc).strip()
    return text.splitlines()[0][:200] if text else type(exc).__name__


def _routes(routes: Sequence[Any]) -> Iterator[Any]:
    """Every route of the application, included routers opened (FastAPI keeps them as branches)."""
    for route in routes:
        inner = getattr(route, "original_router", None)
        if inner is not None:
            yield from _routes(inner.routes)
        else:
            yield route


def allowed_methods(app: FastAPI, scope: Mapping[str, Any]) -> list[str]:
    """The methods of the path the request names: a path may be served by routes of several
    routers (the allocation routes are), and a 405's Allow names them all. Where templates of
    different shape match (`.../allocations/batch` and `.../allocations/{allocation_id}`), the
    one with the fewest parameters is the path meant (`batch` is a path word, not an id)."""
    matching: dict[int, set[str]] = {}
    for route in _routes(app.router.routes):
        regex = getattr(route, "path_regex", None)
        if regex is not None and regex.match(scope["path"]) and getattr(route, "methods", None):
            matching.setdefault(route.path.count("{"), set()).update(route.methods)
    return sorted(matching[min(matching)]) if matching else []


def install(app: FastAPI) -> None:
    async def handle(request: Request, exc: Exception) -> Response:
        if isinstance(exc, StarletteHTTPException) and exc.status_code == 405:
            allowed = allowed_methods(app, request.scope)
            exc = StarletteHTTPException(
                405, f"{request.method} is not allowed on this path; it allows {', '.join(allowed)}",
                headers={"Allow": ", ".join(allowed)},
            )
        return response_for(exc, request.url.path, request.method)

    for kind in (ProblemError, AllocationError, InputError, RequestValidationError, StarletteHTTPException, Exception):
        app.add_exception_handler(kind, handle)
