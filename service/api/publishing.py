"""Reading, hashing and solving one publish request: the CPU half of publishing a mix.

Two steps: ``read_publication`` (parse, validate, canonical form, hash: enough to tell a repeat
from a new version) and ``solve_publication`` (policy checks, solve, answer and stored text, for
a new version only). A worker thread runs them for an ordinary body, the frontier process for a
large one (``MixCatalog.publish`` chooses by size; ``read_here`` and ``solve_here`` are the same
two functions there, the canonical inputs kept in that process between them). A 2,000-asset
factor model is 1 MB of numbers and a 1,000-asset dense mix 20 MB: parsing, hashing, solving and
rendering them holds the GIL for 35-220 ms, and every single allocation on the serving process
waited that long (p99 39 ms while such mixes were published back to back). What comes back is
only what the serving process needs to look the version up, store it and answer: the version
and hash, the canonical text, the solved mix, the answer body and the stored text.
"""

from __future__ import annotations

from collections import OrderedDict
from collections.abc import Mapping
from dataclasses import dataclass
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
class Reading:
    """A publish request read, validated, put in canonical form and hashed: enough to tell a new
    version from a repeat. ``canonical`` stays where it was read (not pickled back)."""

    version: str
    digest: str
    n_assets: int
    #: the canonical inputs, as hashed and stored
    text: bytes
    risk_free_rate: float
    cross_check: bool | None


@dataclass(frozen=True)
class Publication:
    """A new version checked against the plan's policy and, unless refused, solved and rendered.

    ``refused`` is an error found after the content hash, answered only because the version is
    new (a repeat answers as the first publication did, or 409, before any check of the mix).
    It does not carry the reading again: from the frontier process that would be the canonical
    text a second time (21 MB for a 1,000-asset dense mix)."""

    solved: SolvedMix | None = None
    #: the answer body
    doc: dict[str, Any] | None = None
    #: the stored document's text
    stored: str | None = None
    refused: AllocationError | InputError | None = None


def read_publication(raw: bytes, limits: PublishLimits) -> tuple[Reading, dict[str, Any]]:
    """Parse and validate ``raw``, put it in canonical form and hash it."""
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
    reading = Reading(request.version, content_hash(text), len(request.assets), text, request.risk_free_rate,
                      request.cross_check)
    return reading, canonical


def solve_publication(
    reading: Reading, canonical: Mapping[str, Any], policy: Policy, limits: PublishLimits,
    solved_before: Mapping[str, SolvedMix],
) -> Publication:
    """Check a new version against the plan's policy and solve it (``solved_before`` holds mixes
    solved already, by content hash); render its answer and its stored text."""
    try:
        check_rates(policy, reading.risk_free_rate)
        checks = cross_checks_wanted(reading.cross_check, reading.n_assets, limits.max_cross_check_assets)
        # The same content solved before (another plan, or an earlier version) is not solved again.
        solved = solved_before.get(reading.digest)
        if solved is None or (checks and not solved.cross_checks):
            solved = solve(canonical, cross_check=checks, max_condition_number=limits.max_condition_number)
        doc = published_document(reading.version, reading.digest, solved)
        if not is_finite_document(doc):
            raise AllocationError("covariance", "the solution is not finite; the inputs are degenerate")
    except (AllocationError, InputError) as refusal:
        return Publication(refused=refusal)
    # Rendered here, not in the write transaction: on SQLite that transaction holds the one
    # write lock the log writer waits for (a 2,000-asset mix is a few MB of text).
    stored = json_text({"published": doc, "numerics": solved.to_document()})
    return Publication(solved, doc, stored)


# ---- the two steps in the frontier process ------------------------------------------------------

#: Canonical inputs read in this process and not yet solved, by content hash: the frontier
#: process keeps what it read until the serving process asks for the solve (a repeat of a known
#: version never does, hence the bound). Empty in the serving process.
_READ_HERE: OrderedDict[str, dict[str, Any]] = OrderedDict()
_READ_HERE_MAX = 4


class NotReadHere(LookupError):
    """The frontier process no longer holds the reading (restarted, or evicted)."""


def read_here(raw: bytes, limits: PublishLimits) -> Reading:
    reading, canonical = read_publication(raw, limits)
    _READ_HERE[reading.digest] = canonical
    while len(_READ_HERE) > _READ_HERE_MAX:
        _READ_HERE.popitem(last=False)
    return reading


def solve_here(reading: Reading, policy: Policy, limits: PublishLimits) -> Publication:
    canonical = _READ_HERE.pop(reading.digest, None)
    if canonical is None:
        raise NotReadHere(reading.digest)
    # No cache of solved mixes here: the same content published again elsewhere is solved again.
    return solve_publication(reading, canonical, policy, limits, {})
