"""Reading, hashing and solving one publish request: the CPU half of publishing a mix.

The same function runs in a worker thread for an ordinary body and in the frontier process for a
large one (``MixCatalog.publish`` chooses by size). A 2,000-asset factor model is 1 MB of
numbers and a 1,000-asset dense mix 20 MB: parsing, hashing, solving and rendering them holds
the GIL for 35-220 ms, and every single allocation on the serving process waited that long
(p99 39 ms while such mixes were published back to back). What comes back is only what the
serving process needs to store and answer: the canonical text, the solved mix, the answer body
and the stored text.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, replace
from typing import Any

from service.allocation import (
    AllocationError,
    Policy,
    canonical_inputs,
    canonical_text,
    check_rates,
    content_hash,
    cross_checks_wanted,
    is_finite_document,
    published_document,
    solve,
)
from service.numerics import InputError, SolvedMix
from service.store import json_text

from .bodies import parse_body
from .errors import PayloadTooLarge
from .schemas import MixIn

#: Bodies at least this long are read and solved in the frontier process (a 2,000-asset factor
#: model is 1.0 MB, a 200-asset dense mix about 0.5 MB). A smaller one takes a few
#: milliseconds; the process hop would cost more than the GIL it holds.
PUBLICATION_PROCESS_MIN_BYTES = 768 * 1024


@dataclass(frozen=True)
class PublishLimits:
    """The settings a publication is checked against (picklable, for the frontier process)."""

    max_assets: int
    max_cross_check_assets: int
    max_condition_number: float


@dataclass(frozen=True)
class Publication:
    """A publish request read and hashed and, unless refused, solved and rendered.

    ``refused`` is an error found after the content hash: it is answered only if the version is
    new, since publishing an existing version again answers as the first publication did (or 409
    for other content) before any check of the mix itself."""

    version: str
    digest: str
    n_assets: int
    #: the canonical inputs, as hashed and stored
    text: bytes
    solved: SolvedMix | None = None
    #: the answer body
    doc: dict[str, Any] | None = None
    #: the stored document's text
    stored: str | None = None
    refused: AllocationError | InputError | None = None


def prepare_publication(
    raw: bytes, policy: Policy, limits: PublishLimits, solved_before: Mapping[str, SolvedMix]
) -> Publication:
    """Parse and validate ``raw``, hash it canonically, check it against the plan's policy and
    solve it (``solved_before`` holds mixes solved already, by content hash)."""
    request = parse_body(MixIn, raw)
    if len(request.assets) > limits.max_assets:
        raise PayloadTooLarge(f"{len(request.assets)} assets; this service solves at most {limits.max_assets}")
    canonical = canonical_inputs(
        assets=[a.model_dump() for a in request.assets],
        risk_free_rate=request.risk_free_rate,
        correlation=request.correlation,
        covariance=request.covariance,
        bounds=request.bounds,
        long_only=request.long_only,
        # The validated lists as they are (model_dump would copy 100,000 numbers once more).
        factor_model=None if request.factor_model is None else dict(request.factor_model),
    )
    text = canonical_text(canonical)
    digest = content_hash(text)
    read = Publication(version=request.version, digest=digest, n_assets=len(request.assets), text=text)
    try:
        check_rates(policy, request.risk_free_rate)
        checks = cross_checks_wanted(request.cross_check, len(request.assets), limits.max_cross_check_assets)
        # The same content solved before (another plan, or an earlier version) is not solved again.
        solved = solved_before.get(digest)
        if solved is None or (checks and not solved.cross_checks):
            solved = solve(canonical, cross_check=checks, max_condition_number=limits.max_condition_number)
        doc = published_document(request.version, digest, solved)
        if not is_finite_document(doc):
            raise AllocationError("covariance", "the solution is not finite; the inputs are degenerate")
    except (AllocationError, InputError) as refusal:
        return replace(read, refused=refusal)
    # Rendered here, not in the write transaction: on SQLite that transaction holds the one
    # write lock the log writer waits for (a 2,000-asset mix is a few MB of text).
    stored = json_text({"published": doc, "numerics": solved.to_document()})
    return replace(read, solved=solved, doc=doc, stored=stored)
