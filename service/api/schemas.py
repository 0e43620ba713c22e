"""Request and response models of the HTTP contract (field names as docs/API.md fixes them).

Requests are strict: no NaN or Infinity, no booleans or strings where numbers belong, no unknown
fields. Money is a decimal string; a plain number is accepted too and parsed exactly.
"""

from __future__ import annotations

import math
from typing import Annotated, Any, Literal

from pydantic import (
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    PlainValidator,
    StringConstraints,
    WithJsonSchema,
    model_validator,
)

from service.allocation import (
    MEMBER_ID_PATTERN,
    RESERVED_VERSION_NAMES,
    AllocationError,
    MixState,
    check_decimal_rates,
    check_version_name,
)
from service.allocation.human_capital import MAX_INCOME_GROWTH, MIN_INCOME_GROWTH
from service.allocation.impact import LIMIT_COUNT_KEYS
from service.allocation.mixes import MAX_DECIMAL_RETURN, MAX_DECIMAL_RISK_FREE_RATE, MAX_DECIMAL_VOLATILITY
from service.allocation.money import AMOUNT_PATTERN
from service.allocation.policy import (
    DEFAULT_REBALANCE_BAND,
    MAX_RISK_AVERSION,
    MAX_RISKY_FRACTION_CEILING,
    MAX_YEARS_TO_RETIREMENT,
)
from service.allocation.preferences import (
    LIMIT_NAMES,
    MAX_HORIZON_YEARS,
    MAX_TARGET_VOLATILITY,
    SOURCE_GLIDE_PATH,
    SOURCE_MEMBER,
)
from service.allocation.requests import VERSION_PATTERN
from service.numerics.estimation import COVARIANCE_METHODS, PERIODS_PER_YEAR

from .errors import PROBLEM_KINDS, problem_type

# Separates a sub-field from the reason in a model validator's message (see errors.validation_errors).
FIELD_MARK = "\x1f"

# What each field means, once: every model's OpenAPI takes a property's description from here
# unless the field states its own (a name that means something else in one model).
# tests/api/test_openapi_document.py checks that every property of the document has one.
FIELD_MEANINGS = {
    # plans, policy, keys
    "plan_id": "the plan's identifier",
    "name": "the plan's name as members see it",
    "currency": "ISO 4217 code of the plan's currency; money is given in it",
    "policy": "the plan's allocation policy",
    "active_version": "the mix version in force; null until one is activated",
    "created_at": "when it was made (RFC 3339, UTC)",
    "max_risky_fraction": "the largest risky fraction any member gets; above 1 is borrowing (needs borrowing_rate)",
    "min_risky_fraction": "the smallest risky fraction any member gets",
    "borrowing_rate": "annual rate paid on borrowed money, at or above the mix's risk-free rate; needed above 1",
    "risk_score_table": "risk score (an integer, as a string key) to risk aversion, for members who state a score",
    "glide_path": "risk aversion by years to retirement for members who state no preference: at least two points "
                  "with distinct years, linear in between, flat beyond the ends",
    "human_capital": "counting members' future earnings (sent as `income`) as part of their wealth",
    "rebalance_band": "no trades while the account's risky fraction is within this distance of the target (0.05 = 5 points)",
    "discount_rate": "annual rate future earnings are discounted at; null: the mix's risk-free rate",
    "equity_like_share": "the share of future earnings that behaves like the risky mix, in [0, 1]",
    "role": "what the key may do: committee (mixes, audit) or portal (allocations); operator is the service's own",
    "expires_in_days": "the key stops working this many days after issue; left out: it never expires",
    "key_id": "the key's public identifier (never secret)",
    "secret": "the bearer secret, shown in this answer only",
    "expires_at": "when the key stops working (RFC 3339, UTC); null: never",
    "revoked_at": "when the key was revoked (RFC 3339, UTC); null: it was not",
    "keys": "the plan's keys, oldest first, revoked and expired included",
    # mixes
    "version": "the mix version's name",
    "assets": "the asset classes of the risky mix",
    "code": "the asset class's code",
    "expected_return": "annual expected return as a decimal (0.05 = 5 %)",
    "volatility": "annual volatility (standard deviation of return) as a decimal",
    "correlation": "correlation matrix in the order of assets (with every asset's volatility)",
    "covariance": "annual covariance matrix in the order of assets",
    "factor_model": "covariance as loadings B, factor covariance F and specific volatilities d: B F B' + diag(d^2)",
    "loadings": "n x k: one row per asset",
    "factor_covariance": "k x k, symmetric positive semi-definite",
    "specific_volatility": "one per asset, > 0",
    "risk_free_rate": "annual return of the safe holding as a decimal",
    "bounds": "asset code to [lowest, highest] weight in the risky mix",
    "long_only": "keep every weight at or above 0",
    "cross_check": "run the three numerical cross-checks; left out: for mixes of at most "
                   "MIXLINE_MAX_CROSS_CHECK_ASSETS assets (250)",
    "content_hash": "SHA-256 of the published inputs in canonical form",
    "asset_codes": "the asset codes in the mix's order",
    "tangency": "the fully invested portfolio with the highest Sharpe ratio",
    "min_variance": "the fully invested portfolio with the lowest volatility",
    "kkt_residual": "largest violation of the tangency's optimality conditions",
    "cross_checks": "how far each numerical route landed from the exact answer",
    "active": "whether this version is the one in force",
    "state": "published (not in force yet), active (in force) or retired (never in force again)",
    "lifecycle": "who published, activated and retired the version, and when",
    "inputs": "the published assumptions as stored (the canonical form that was hashed)",
    "weights": "asset code to weight in the risky mix; weights sum to 1",
    "sharpe_ratio": "(expected return - risk-free rate) / volatility",
    "method": "how it was found: closed_form, active_set (exact), or for a cross-check the numerical route",
    "max_weight_gap": "largest difference in any weight from the exact answer",
    "sharpe_gap": "difference in Sharpe ratio from the exact answer",
    "seconds": "time the cross-check took",
    "published_at": "when the version was published (RFC 3339, UTC)",
    "published_by": "key id that published it",
    "activated_at": "when it was put in force (RFC 3339, UTC); null until then",
    "activated_by": "key id that activated it",
    "retired_at": "when it was retired (RFC 3339, UTC); null until then",
    "retired_by": "key id that retired it",
    "versions": "the plan's versions in the order published",
    "retired_version": "the version this activation retired; null when none was in force",
    "mix": "the version's lifecycle entry",
    "kind": "min_variance, corner, tangency or spaced (an evenly spaced point)",
    "intercept": "the risk-free rate: the allocation line's expected return at zero volatility",
    "slope": "the tangency's Sharpe ratio",
    "spacing": "whether points are spaced evenly in expected return or in volatility",
    "points": "the frontier's points sorted by expected return",
    "allocation_line": "the capital allocation line E[r] = intercept + slope x volatility",
    "member_split": "the marked allocation's split on the frontier",
    # estimation
    "frequency": "how often the returns were observed: daily (252 a year), weekly (52), monthly (12), quarterly (4), annual (1)",
    "returns": "asset code to simple returns per period, as decimals, oldest first",
    "dates": "ISO dates, one per observation, increasing",
    "covariance_method": "sample (unbiased) or shrinkage (Ledoit-Wolf 2004)",
    "expected_returns": "historical (annualised means) or one annual decimal per asset code",
    "repair": "take the nearest correlation matrix when the estimate is not positive definite",
    "observations": "periods in the history",
    "periods_per_year": "periods a year the estimate was annualised by",
    "shrinkage_intensity": "weight of the shrinkage target (null for the sample method)",
    "condition_number": "the estimated covariance's condition number",
    "repaired": "whether the correlation was replaced by the nearest correlation matrix",
    "repair_distance": "Frobenius distance of the repair (null when not repaired)",
    "estimation": "how the mix was estimated",
    # allocations
    "member_id": "the plan's identifier of the member (never a name)",
    "mix_version": "the mix version in force the split follows",
    "amount": "the account's value to split (money)",
    "preference": "the member's stated risk preference, exactly one kind; left out: the plan's glide_path sets "
                  "risk aversion from years_to_retirement",
    "holdings": "what the account holds now, risky and safe (instead of amount)",
    "contribution": "new money to direct without selling (money)",
    "years_to_retirement": "years until the member retires, in [0, 60] (never a birth date: the log is permanent)",
    "income": "future earnings, counted as wealth where the plan's policy has human_capital",
    "annual": "earnings a year, paid at each year's end until retirement (money)",
    "growth": "annual growth of the earnings as a decimal (0.02 = 2 %); left out: 0",
    "holdings_by_asset": 'what the account holds, one amount per asset code of the mix and "safe"',
    "members": "the members to allocate, each as in a single allocation without mix_version",
    "risk_aversion": "the coefficient A in y = (mu - r_f) / (A sigma^2); 0 asks for as much risk as the policy allows",
    "target_volatility": "the account's annual volatility asked for, as a decimal",
    "max_loss": "the largest loss, as a fraction of the account, to be exceeded with probability at most 1 - confidence",
    "confidence": "probability in (0.5, 1) that the loss stays within max_loss",
    "horizon_years": "years the loss bound is about; left out: 1",
    "risk_score": "a score of the plan's risk_score_table",
    "allocation_id": "the logged allocation's identifier",
    "mix_content_hash": "content_hash of the mix version used",
    "preference_source": "member: the preference was stated; glide_path: the plan's glide path set it",
    "risk_aversion_used": "the risk aversion the split follows (stated, a risk score's or the glide path's); null for "
                          "target_volatility and max_loss",
    "risky_fraction": "y: the share of the account in the risky mix (above 1: borrowing)",
    "safe_fraction": "1 - y: the share in the safe holding",
    "unconstrained_risky_fraction": "y before the policy band; null when no finite fraction answers",
    "limited_by": "the policy bound that limited y, or null",
    "amounts": "the amount split into risky and safe (money), summing to amount",
    "risky": "money in the risky mix",
    "safe": "money in the safe holding",
    "by_asset": "asset code to money, summing to amounts.risky",
    "disclosures_version": "version of the disclosure texts shown (texts never change within a version)",
    "disclosures": "the texts shown with the answer",
    "contribution_split": "how to direct the contribution without selling",
    "after_contribution": "the holdings after the contribution as directed",
    "explanation": "plain-language explanation; null only for records made before explanations",
    "text": "plain language built from the answer's numbers, rounded for reading",
    "value": "present value of the member's future earnings (money)",
    "ratio_to_account": "value / account; null when the account is empty",
    "trades": 'with holdings_by_asset: signed money per asset code and "safe" ("+" buys, "-" sells), summing to the '
              "contribution (zero without one); null within the plan's rebalance_band",
    "count": "how many there are",
    "results": "one answer per member, in the members' order",
    "allocations": "the member's allocations, newest first",
    # impact
    "from_version": "the version in force",
    "to_version": "the candidate version",
    "risky_fraction_change": "after - before, over the members",
    "mean": "mean", "p05": "5th percentile", "p50": "median", "p95": "95th percentile",
    "max_abs": "largest absolute change",
    "largest_moves": "the ten largest changes by size",
    "before": "the risky fraction (or count) under the version in force",
    "after": "the risky fraction (or count) under the candidate",
    "refused_under_candidate": "members whose loss bound no risky fraction meets under the candidate",
    # audit and operations
    "ok": "whether the whole chain verifies",
    "checked": "rows checked",
    "head_hash": "the chain head's hash",
    "first_bad": "the first row that does not fit; null when ok",
    "seq": "sequence number in the plan's chain",
    "reason": "what is wrong",
    "hash": "the row hash at seq",
    "signed_at": "when the head was signed (RFC 3339, UTC)",
    "signature": "Ed25519 signature (base64) of mixline-audit-head-v1, plan_id, seq, hash and signed_at joined by U+001F",
    "algorithm": "the signature algorithm",
    "public_key": "the raw 32-byte public key in base64",
    "public_key_pem": "the public key as PEM",
    "ephemeral": "true when the process signs with a key made at start-up (development only)",
    "status": "live or ready",
    "checks": "each readiness check and its result",
    # problems
    "type": "urn:mixline:problem:<kind>",
    "title": "the kind in words",
    "detail": "the field and what is wrong with it",
    "instance": "the request path",
    "request_id": "the request's X-Request-ID, also in the access log",
    "errors": "every field that is wrong (at most 1,000)",
    "error_count": "how many fields are wrong in all",
    "field": "the field, as members[i].field in a batch",
}


def _describe(schema: dict[str, Any]) -> None:
    for name, prop in schema.get("properties", {}).items():
        if "description" not in prop and name in FIELD_MEANINGS:
            prop["description"] = FIELD_MEANINGS[name]


def at(field: str, reason: str) -> ValueError:
    """A model-level validation error that names the field it is about."""
    return ValueError(f"{field}{FIELD_MARK}{reason}")


def _money(value: Any) -> str | int | float:
    if isinstance(value, bool) or not isinstance(value, str | int | float):
        raise ValueError('must be a decimal string such as "1250.00" or a number')
    if isinstance(value, float) and not math.isfinite(value):
        raise ValueError("must be a finite amount")
    money: str | int | float = value
    return money


def _whole(value: Any) -> Any:
    """2.0 is the integer 2 (JSON Schema's `integer` is any number without a fraction)."""
    if type(value) is float and value.is_integer():
        return int(value)
    return value


Code = Annotated[str, StringConstraints(pattern=r"^[A-Za-z0-9][A-Za-z0-9_.\-]{0,31}$")]
IDENTIFIER_PATTERN = f"^{VERSION_PATTERN}$"
Identifier = Annotated[str, StringConstraints(pattern=IDENTIFIER_PATTERN)]
MemberId = Annotated[str, StringConstraints(min_length=1, max_length=128, pattern=f"^{MEMBER_ID_PATTERN}$")]
MONEY_TEXT = {"type": "string", "format": "decimal", "pattern": f"^{AMOUNT_PATTERN}$", "examples": ["1250.00"]}
Money = Annotated[
    str | int | float,
    PlainValidator(_money),
    WithJsonSchema({"anyOf": [MONEY_TEXT, {"type": "number", "minimum": 0}],
                    "description": 'decimal string such as "1250.00" (to the currency\'s minor unit); a number is '
                                   "accepted and read exactly"}),
]
# Money in answers: always a string, to the minor unit.
MoneyOut = Annotated[str, WithJsonSchema(MONEY_TEXT)]
SignedMoneyOut = Annotated[str, WithJsonSchema(
    {"type": "string", "format": "decimal", "pattern": f"^[+-]?{AMOUNT_PATTERN}$", "examples": ["+12.34", "-12.34"]}
)]
Timestamp = Annotated[str, WithJsonSchema(
    {"type": "string", "format": "date-time", "examples": ["2026-12-02T02:28:06.295767Z"]}
)]
Currency = Annotated[str, StringConstraints(pattern=r"^[A-Z]{3}$")]
SCORE_PATTERN = r"^(0|-?[1-9][0-9]*)$"  # an integer written plainly (allocation.policy's rule)
Role = Literal["operator", "committee", "portal"]
# The lifecycle's states as the lifecycle rule names them, documented inline as an enum.
MixStateName = Annotated[str, WithJsonSchema({"type": "string", "enum": [s.value for s in MixState], "title": "State"})]


class Documented(BaseModel):
    model_config = ConfigDict(json_schema_extra=_describe)


class Strict(Documented):
    model_config = ConfigDict(strict=True, extra="forbid", allow_inf_nan=False, frozen=True)


class FieldErrorOut(Documented):
    field: str
    reason: str


class Problem(Documented):
    """RFC 9457 problem details."""

    type: Annotated[str, WithJsonSchema({"type": "string", "enum": [problem_type(k) for k in PROBLEM_KINDS]})]
    title: str
    status: Annotated[int, Field(ge=400, le=599)]
    detail: str
    instance: str | None = None
    request_id: str | None = None
    errors: list[FieldErrorOut] | None = None
    error_count: int | None = None
    active_version: str | None = Field(
        default=None, description="on a 409 about versions: the version in force (null when none is yet)"
    )


# ---- plans and keys -------------------------------------------------------------------------


def bounded(default: Any = ..., **keywords: Any) -> Any:
    """A field whose bounds the OpenAPI states while the rule that enforces them lives below
    (allocation.policy, preferences, ...): the same constants, one check, its own message."""
    return Field(default, json_schema_extra=keywords)


class GlidePointIn(Strict):
    years_to_retirement: float = bounded(
        minimum=0, maximum=MAX_YEARS_TO_RETIREMENT, description="years to retirement at this point"
    )
    risk_aversion: float = bounded(
        minimum=0, maximum=MAX_RISK_AVERSION, description="the risk aversion for members this far from retirement"
    )


class HumanCapitalIn(Strict):
    discount_rate: float | None = bounded(None, exclusiveMinimum=-0.5, exclusiveMaximum=1)
    equity_like_share: float = bounded(0.0, minimum=0, maximum=1)


class PolicyIn(Strict):
    max_risky_fraction: float = bounded(1.0, minimum=0, maximum=MAX_RISKY_FRACTION_CEILING)
    min_risky_fraction: float = bounded(0.0, minimum=0, maximum=MAX_RISKY_FRACTION_CEILING)
    borrowing_rate: float | None = bounded(None, exclusiveMinimum=-1, exclusiveMaximum=1)
    risk_score_table: dict[str, float] | None = bounded(
        None, propertyNames={"pattern": SCORE_PATTERN},
        additionalProperties={"type": "number", "minimum": 0, "maximum": MAX_RISK_AVERSION},
    )
    glide_path: list[GlidePointIn] | None = bounded(None, minItems=2)
    human_capital: HumanCapitalIn | None = None
    rebalance_band: float = bounded(DEFAULT_REBALANCE_BAND, minimum=0, maximum=1)


class PlanIn(Strict):
    plan_id: Identifier
    name: Annotated[str, StringConstraints(min_length=1, max_length=200)]
    currency: Currency
    policy: PolicyIn = PolicyIn()


class GlidePointOut(Documented):
    years_to_retirement: float = Field(description="years to retirement at this point")
    risk_aversion: float = Field(description="the risk aversion for members this far from retirement")


class HumanCapitalTermsOut(Documented):
    discount_rate: float | None
    equity_like_share: float


class PolicyOut(Documented):
    """The policy as stored (plans made before a field existed may lack it: its default applies)."""

    min_risky_fraction: float = 0.0
    max_risky_fraction: float = 1.0
    borrowing_rate: float | None = None
    risk_score_table: dict[str, float] = {}
    glide_path: list[GlidePointOut] | None = Field(default=None, description="sorted by years to retirement")
    human_capital: HumanCapitalTermsOut | None = None
    rebalance_band: float = DEFAULT_REBALANCE_BAND


class PlanOut(Documented):
    plan_id: str
    name: str
    currency: str
    policy: PolicyOut
    active_version: str | None
    created_at: Timestamp


class KeyIn(Strict):
    role: Literal["committee", "portal"]
    expires_in_days: Annotated[Annotated[int, Field(ge=1, le=3660)] | None, BeforeValidator(_whole)] = None


class KeyOut(Documented):
    key_id: str
    plan_id: str
    role: Role
    secret: str
    created_at: Timestamp
    expires_at: Timestamp | None


class KeyInfoOut(Documented):
    key_id: str
    plan_id: str | None
    role: Role
    created_at: Timestamp
    expires_at: Timestamp | None
    revoked_at: Timestamp | None


class KeyListOut(Documented):
    plan_id: str
    keys: list[KeyInfoOut]


# ---- risky mixes ----------------------------------------------------------------------------


# Annual decimals. Values that look like percentages are refused by the mix rules
# (allocation.check_decimal_rates), with a reason that says so; these ranges only keep arithmetic
# far from overflow.
ExpectedReturn = Annotated[float, Field(ge=-1.0, le=1e6, json_schema_extra={"maximum": MAX_DECIMAL_RETURN})]
Volatility = Annotated[float, Field(gt=0.0, le=1e6, json_schema_extra={"maximum": MAX_DECIMAL_VOLATILITY})]
Rate = Annotated[float, Field(gt=-1.0, le=1e6, json_schema_extra={"maximum": MAX_DECIMAL_RISK_FREE_RATE})]
MatrixEntry = Annotated[float, Field(ge=-1e6, le=1e6)]


def _one_of_matrices(schema: dict[str, Any]) -> None:
    """Exactly one of correlation (then every asset has its volatility), covariance or factor_model:
    three closed kinds of the whole body, each with every property (generated clients and
    schema-driven tools read a oneOf of complete objects best)."""
    _describe(schema)
    properties, required = schema.pop("properties"), schema.pop("required", [])
    names = ("correlation", "covariance", "factor_model")
    branches = []
    for name in names:
        own = {**properties, **{other: {"type": "null"} for other in names if other != name}}
        own[name] = {k: v for k, v in properties[name].items() if k not in ("default",)}
        own[name]["anyOf"] = [kind for kind in own[name].get("anyOf", []) if kind != {"type": "null"}]
        if name == "correlation":
            own["assets"] = {**properties["assets"], "items": {"allOf": [
                properties["assets"]["items"], {"required": ["volatility"], "properties": {"volatility": {"type": "number"}}},
            ]}}
        branches.append({"title": f"with {name}", "type": "object", "properties": own,
                         "required": [*required, name], "additionalProperties": False})
    schema.pop("additionalProperties", None)
    schema.pop("type", None)
    schema["oneOf"] = branches


class AssetIn(Strict):
    code: Code
    expected_return: ExpectedReturn
    volatility: Volatility | None = None


Matrix = list[list[MatrixEntry]]


class FactorModelIn(Strict):
    """Covariance B F B' + diag(specific_volatility^2); shapes and F's spectrum are checked
    with the numbers (service.numerics.build_inputs)."""

    loadings: Annotated[list[list[MatrixEntry]], Field(min_length=1)]
    factor_covariance: Matrix
    specific_volatility: Annotated[list[Volatility], Field(min_length=1)]


class MixIn(Strict):
    model_config = ConfigDict(json_schema_extra=_one_of_matrices)

    version: str = bounded(pattern=IDENTIFIER_PATTERN, **{"not": {"enum": sorted(RESERVED_VERSION_NAMES)}})
    assets: Annotated[list[AssetIn], Field(min_length=1)]
    correlation: Matrix | None = None
    covariance: Matrix | None = None
    factor_model: FactorModelIn | None = None
    risk_free_rate: Rate
    bounds: dict[str, Annotated[list[float], Field(min_length=2, max_length=2)]] | None = None
    long_only: bool = True
    cross_check: bool | None = None

    @model_validator(mode="after")
    def _one_matrix(self) -> MixIn:
        try:
            check_version_name(self.version)
            check_decimal_rates(
                [a.expected_return for a in self.assets],
                [a.volatility for a in self.assets],
                self.risk_free_rate,
                self.covariance,
            )
        except AllocationError as error:
            raise at(error.field, error.reason) from None
        given = [k for k in ("correlation", "covariance", "factor_model") if getattr(self, k) is not None]
        if len(given) != 1:
            said = f"{' and '.join(given)} were given" if given else "none was given"
            raise at(given[-1] if given else "covariance",
                     f"give exactly one of correlation (with volatilities), covariance or factor_model; {said}")
        if self.correlation is not None:
            for i, a in enumerate(self.assets):
                if a.volatility is None:
                    raise at(f"assets[{i}].volatility", "required when a correlation matrix is given")
        return self


# The names numerics.estimation knows, declared; that module checks them (with its own message).
Frequency = Annotated[str, WithJsonSchema({"type": "string", "enum": list(PERIODS_PER_YEAR)})]
CovarianceMethod = Annotated[str, WithJsonSchema({"type": "string", "enum": list(COVARIANCE_METHODS)})]


class PortfolioOut(Documented):
    weights: dict[str, float]
    expected_return: float
    volatility: float
    sharpe_ratio: float
    method: Literal["closed_form", "active_set"]


class CrossCheckOut(Documented):
    method: str = Field(description="the numerical route checked against the exact answer")
    sharpe_ratio: float
    max_weight_gap: float
    sharpe_gap: float
    seconds: float


class MixOut(Documented):
    version: str
    content_hash: str
    risk_free_rate: float
    asset_codes: list[str]
    tangency: PortfolioOut
    min_variance: PortfolioOut
    kkt_residual: float
    cross_checks: list[CrossCheckOut]
    active: bool | None = None
    state: MixStateName | None = None
    lifecycle: MixVersionOut | None = None
    inputs: dict[str, Any] | None = None


class MixVersionOut(Documented):
    """One version's lifecycle; *_by are the key ids that did it."""

    version: str
    state: MixStateName
    content_hash: str
    published_at: Timestamp
    published_by: str | None
    activated_at: Timestamp | None
    activated_by: str | None
    retired_at: Timestamp | None
    retired_by: str | None


class MixListOut(Documented):
    plan_id: str
    active_version: str | None
    versions: list[MixVersionOut]


class ActivationOut(Documented):
    plan_id: str
    active_version: str
    content_hash: str
    retired_version: str | None = None
    mix: MixVersionOut | None = None


class FrontierPointOut(Documented):
    kind: Literal["min_variance", "corner", "tangency", "spaced"]
    expected_return: float
    volatility: float
    sharpe_ratio: float
    weights: dict[str, float]


class AllocationLineOut(Documented):
    intercept: float
    slope: float


class MemberSplitOut(Documented):
    allocation_id: str
    risky_fraction: float
    expected_return: float
    volatility: float


class FrontierOut(Documented):
    version: str
    content_hash: str
    spacing: Literal["return", "volatility"]
    points: list[FrontierPointOut]
    tangency: PortfolioOut
    min_variance: PortfolioOut
    allocation_line: AllocationLineOut
    member_split: MemberSplitOut | None = None


class EstimateIn(Strict):
    """A return history (simple returns per period, as decimals), one series per asset code."""

    frequency: Frequency
    returns: Annotated[dict[Code, list[float | None]], Field(min_length=1)]
    dates: list[str] | None = None
    covariance_method: CovarianceMethod = "sample"
    expected_returns: Annotated[str, WithJsonSchema({"type": "string", "enum": ["historical"]})] | dict[Code, float] = (
        "historical")
    risk_free_rate: Rate
    repair: bool = False


class EstimationOut(Documented):
    observations: int
    periods_per_year: Annotated[int, WithJsonSchema({"type": "integer", "enum": sorted(set(PERIODS_PER_YEAR.values()))})]
    covariance_method: CovarianceMethod
    shrinkage_intensity: float | None
    condition_number: float
    repaired: bool
    repair_distance: float | None
    expected_returns: str = Field(description="historical, or given (one annual decimal per asset code was given)")


class EstimatedAssetOut(Documented):
    code: str
    expected_return: float
    volatility: float


class EstimatedMixOut(Documented):
    assets: list[EstimatedAssetOut]
    correlation: list[list[float]]
    risk_free_rate: float
    long_only: bool


class EstimateOut(Documented):
    mix: EstimatedMixOut = Field(description="a body for POST .../mixes, without its version")
    estimation: EstimationOut


# ---- allocations ----------------------------------------------------------------------------


def _preference_kinds() -> dict[str, Any]:
    """The preference as the member reader (allocation.members) takes it: exactly one kind, its own
    fields only (another kind's field may be present as null, which the reader ignores); the
    ranges are preferences.check_preferences'."""
    fields: dict[str, dict[str, Any]] = {
        "risk_aversion": {"type": "number", "minimum": 0, "maximum": MAX_RISK_AVERSION},
        "target_volatility": {"type": "number", "minimum": 0, "maximum": MAX_TARGET_VOLATILITY},
        "max_loss": {"type": "number", "exclusiveMinimum": 0, "maximum": 1},
        "confidence": {"type": "number", "exclusiveMinimum": 0.5, "exclusiveMaximum": 1},
        "horizon_years": {"type": "number", "exclusiveMinimum": 0, "maximum": MAX_HORIZON_YEARS},
        "risk_score": {"type": "integer"},
    }
    kinds = {"risk_aversion": ("risk_aversion",), "target_volatility": ("target_volatility",),
             "max_loss": ("max_loss", "confidence", "horizon_years"), "risk_score": ("risk_score",)}
    branches = []
    for kind, own in kinds.items():
        properties = {
            name: ({**schema, "description": FIELD_MEANINGS[name]} if name in own else {"type": "null"})
            for name, schema in fields.items()
        }
        required = [kind, "confidence"] if kind == "max_loss" else [kind]
        branches.append({"title": kind, "type": "object", "properties": properties, "required": required,
                         "additionalProperties": False})
    return {"oneOf": branches}


Preference = Annotated[dict[str, Any], WithJsonSchema(_preference_kinds())]


class HoldingsIn(Strict):
    risky: Money
    safe: Money


class IncomeIn(Strict):
    annual: Money
    growth: float | None = bounded(None, minimum=MIN_INCOME_GROWTH, maximum=MAX_INCOME_GROWTH)


class MemberIn(Strict):
    member_id: MemberId
    amount: Money | None = None
    preference: Preference | None = None
    holdings: HoldingsIn | None = None
    contribution: Money | None = None
    years_to_retirement: float | None = bounded(None, minimum=0, maximum=MAX_YEARS_TO_RETIREMENT)
    income: IncomeIn | None = None
    holdings_by_asset: dict[str, Money] | None = None


class AllocationIn(MemberIn):
    mix_version: Identifier


class BatchIn(Strict):
    mix_version: Identifier
    members: Annotated[list[MemberIn], Field(min_length=1)]


class MoneySplitOut(Documented):
    risky: MoneyOut
    safe: MoneyOut


class ExplanationOut(Documented):
    text: str
    version: str = Field(description="the wording's version; texts of a version never change")


class HumanCapitalOut(Documented):
    value: MoneyOut
    ratio_to_account: float | None


class _AnswerFields(Documented):
    allocation_id: str
    plan_id: str
    member_id: str
    mix_version: str
    mix_content_hash: str
    preference: Preference | None = Field(description="as stated; null when the glide path set it")
    preference_source: Annotated[str, WithJsonSchema({"type": "string", "enum": [SOURCE_MEMBER, SOURCE_GLIDE_PATH]})]
    risk_aversion_used: float | None
    risky_fraction: float
    safe_fraction: float
    unconstrained_risky_fraction: float | None
    limited_by: Annotated[str | None, WithJsonSchema({"enum": [*[n for n in LIMIT_NAMES if n], None]})]
    currency: str
    amount: MoneyOut
    amounts: MoneySplitOut
    by_asset: dict[str, MoneyOut]
    expected_return: float = Field(description="the account's annual expected return at this split")
    volatility: float = Field(description="the account's annual volatility at this split")
    disclosures_version: str
    created_at: Timestamp
    holdings: MoneySplitOut | None = None
    contribution: MoneyOut | None = None
    contribution_split: MoneySplitOut | None = None
    after_contribution: MoneySplitOut | None = None
    explanation: ExplanationOut | None
    years_to_retirement: float | None = None
    human_capital: HumanCapitalOut | None = None
    holdings_by_asset: dict[str, MoneyOut] | None = None
    trades: dict[str, SignedMoneyOut] | None = None


class AllocationOut(_AnswerFields):
    disclosures: list[str]


class BatchResultOut(_AnswerFields):
    """Every field of a single answer; the disclosure texts are given once, at the top of the batch."""


class BatchOut(Documented):
    plan_id: str
    mix_version: str
    mix_content_hash: str
    created_at: Timestamp
    count: int
    disclosures_version: str
    disclosures: list[str]
    results: list[BatchResultOut]


class ChangeSummaryOut(Documented):
    mean: float
    p05: float
    p50: float
    p95: float
    max_abs: float


class MoveOut(Documented):
    member_id: str
    before: float
    after: float


class ImpactOut(Documented):
    """A candidate version's effect on the members whose latest allocation is under the active one."""

    plan_id: str
    from_version: str
    to_version: str
    members: int = Field(description="members compared")
    risky_fraction_change: ChangeSummaryOut
    limited_by: Annotated[dict[str, dict[str, int]], WithJsonSchema({
        "type": "object", "propertyNames": {"enum": ["before", "after"]},
        "additionalProperties": {"type": "object", "propertyNames": {"enum": list(LIMIT_COUNT_KEYS)},
                                 "additionalProperties": {"type": "integer"}},
    })] = Field(description="how many members each bound limited, before and after")
    largest_moves: list[MoveOut]
    refused_under_candidate: int


class AllocationListOut(Documented):
    plan_id: str
    member_id: str
    count: int
    allocations: list[AllocationOut]


# ---- audit and operations -------------------------------------------------------------------


class BadRowOut(Documented):
    seq: int | None
    allocation_id: str | None
    reason: str


class AuditOut(Documented):
    plan_id: str
    ok: bool
    checked: int
    head_hash: str
    first_bad: BadRowOut | None


class SignedHeadOut(Documented):
    plan_id: str
    seq: int
    hash: str
    signed_at: Timestamp
    key_id: str
    signature: str


class SigningKeyOut(Documented):
    algorithm: Literal["Ed25519"]
    key_id: str
    public_key: str
    public_key_pem: str
    ephemeral: bool


class HealthOut(Documented):
    status: Literal["live", "ready"]
    checks: dict[str, str] | None = None
