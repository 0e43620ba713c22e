"""RFC 9457 problem details: the one error shape every 4xx/5xx of mixline has.

    ProblemError                  root; carries status, title, detail and optional field errors
    ├── Unauthorized        401   no or wrong key
    ├── Forbidden           403   right key, wrong role
    ├── NotFound            404   absent, or another plan's (never 403 across plans)
    ├── ConflictError       409   version with other content; same idempotency key in flight
    ├── PayloadTooLarge     413   batch or body over the configured limit
    ├── Unprocessable       422   well-formed but unanswerable input
    └── NotReady            503   readiness failed

Domain errors from below become problems here: a LifecycleConflict (a version not in force, a
retired version activated, the only version in force retired) 409 with ``active_version``;
any other AllocationError and numerics' InputError 422; request
validation errors become 422 with one entry per field. No handler ever echoes the offending input
back, so a NaN or a megabyte of garbage can never break the error response itself.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from typing import Any

import orjson
from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.responses import Response

from service.allocation import AllocationError, LifecycleConflict, MemberErrors
from service.allocation.requests import TooManyMembers
from service.numerics import InputError

PROBLEM_MEDIA_TYPE = "application/problem+json"
FIELD_MARK = "\x1f"  # the same mark as schemas.FIELD_MARK (errors must not import schemas)
log = logging.getLogger("mixline.api")


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


class Unprocessable(ProblemError):
    status, title, slug = 422, "Unprocessable request", "unprocessable"


class NotReady(ProblemError):
    status, title, slug = 503, "Not ready", "not-ready"


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
            422, "Unprocessable request", f"{exc.field}: {exc.reason}", slug="unprocessable",
            errors=[field_error(exc.field, exc.reason)], instance=path,
        )
    if isinstance(exc, RequestValidationError):
        found = validation_errors(exc)
        first = found[0] if found else field_error("body", "invalid")
        more = f" (and {len(found) - 1} more)" if len(found) > 1 else ""
        return problem_response(
            422, "Invalid request", f"{first['field']}: {first['reason']}{more}", slug="validation",
            errors=found, instance=path,
        )
    if isinstance(exc, StarletteHTTPException):
        titles = {404: "Not found", 405: "Method not allowed", 413: "Payload too large"}
        return problem_response(
            exc.status_code, titles.get(exc.status_code, "HTTP error"), str(exc.detail),
            slug=f"http-{exc.status_code}", headers=getattr(exc, "headers", None), instance=path,
        )
    log.error("unhandled error on %s %s", method, path, exc_info=exc)
    return problem_response(
        500, "Internal error", "the service failed to answer; the failure is logged",
        slug="internal", instance=path,
    )


def install(app: FastAPI) -> None:
    async def handle(request: Request, exc: Exception) -> Response:
        return response_for(exc, request.url.path, request.method)

    for kind in (ProblemError, AllocationError, InputError, RequestValidationError, StarletteHTTPException, Exception):
        app.add_exception_handler(kind, handle)
