"""Request and response models of the HTTP contract (field names as docs/API.md fixes them).

Requests are strict: no NaN or Infinity, no booleans or strings where numbers belong, no unknown
fields. Money is a decimal string; a plain number is accepted too and parsed exactly.
"""

from __future__ import annotations

import math
from typing import Annotated, Any, Literal

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    PlainValidator,
    StringConstraints,
    WithJsonSchema,
    model_validator,
)

from service.allocation import (
    MEMBER_ID_PATTERN,
    AllocationError,
    check_decimal_rates,
    check_version_name,
)
from service.allocation.policy import DEFAULT_REBALANCE_BAND
from service.allocation.preferences import SOURCE_GLIDE_PATH, SOURCE_MEMBER
from service.allocation.requests import VERSION_PATTERN

# Separates a sub-field from the reason in a model validator's message (see errors.validation_errors).
FIELD_MARK = "\x1f"


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

Code = Annotated[str, StringConstraints(pattern=r"^[A-Za-z0-9][A-Za-z0-9_.\-]{0,31}$")]
IDENTIFIER_PATTERN = f"^{VERSION_PATTERN}$"
Identifier = Annotated[str, StringConstraints(pattern=IDENTIFIER_PATTERN)]
MemberId = Annotated[str, StringConstraints(min_length=1, max_length=128, pattern=f"^{MEMBER_ID_PATTERN}$")]
Money = Annotated[
    str | int | float,
    PlainValidator(_money),
    WithJsonSchema({"anyOf": [{"type": "string"}, {"type": "number"}], "examples": ["1250.00"]}),
    Field(description='decimal string such as "1250.00"; a number is accepted'),
]
Currency = Annotated[str, StringConstraints(pattern=r"^[A-Z]{3}$")]


class Strict(BaseModel):
    model_config = ConfigDict(strict=True, extra="forbid", allow_inf_nan=False, frozen=True)


class Problem(BaseModel):
    """RFC 9457 problem details."""

    type: str
    title: str
    status: int
    detail: str
    instance: str | None = None
    errors: list[dict[str, str]] | None = None
    active_version: str | None = Field(
        default=None, description="on a 409 about versions: the version in force (null when none is yet)"
    )


# ---- plans and keys -------------------------------------------------------------------------


class GlidePointIn(Strict):
    years_to_retirement: float = Field(description="years to retirement at this point (>= 0, at most 60)")
    risk_aversion: float = Field(description="the risk aversion for members this far from retirement")


class HumanCapitalIn(Strict):
    discount_rate: float | None = Field(
        default=None, description="annual rate future earnings are discounted at; null: the mix's risk-free rate"
    )
    equity_like_share: float = Field(
        default=0.0, description="the share of future earnings that behaves like the risky mix, in [0, 1]"
    )


class PolicyIn(Strict):
    max_risky_fraction: float = 1.0
    min_risky_fraction: float = 0.0
    borrowing_rate: float | None = None
    risk_score_table: dict[str, float] | None = None
    glide_path: list[GlidePointIn] | None = Field(
        default=None,
        description="risk aversion by years to retirement for members who state no preference: at least two "
        "points with distinct years, linear in between, flat beyond the ends",
    )
    human_capital: HumanCapitalIn | None = Field(
        default=None, description="count members' future earnings (sent as `income`) as part of their wealth"
    )
    rebalance_band: float = Field(
        default=DEFAULT_REBALANCE_BAND,
        description="no trades while the account's risky fraction is within this distance of the target (0.05 = 5 points)",
    )


class PlanIn(Strict):
    plan_id: Identifier
    name: Annotated[str, StringConstraints(min_length=1, max_length=200)]
    currency: Currency
    policy: PolicyIn = PolicyIn()


class PlanOut(BaseModel):
    plan_id: str
    name: str
    currency: str
    policy: dict[str, object]
    active_version: str | None
    created_at: str


class KeyIn(Strict):
    role: Literal["committee", "portal"]
    expires_in_days: Annotated[int, Field(ge=1, le=3660)] | None = Field(
        default=None, description="the key stops working this many days after issue; unset: it never expires"
    )


class KeyOut(BaseModel):
    key_id: str
    plan_id: str
    role: str
    secret: str
    created_at: str
    expires_at: str | None


class KeyInfoOut(BaseModel):
    key_id: str
    plan_id: str
    role: str
    created_at: str
    expires_at: str | None
    revoked_at: str | None


class KeyListOut(BaseModel):
    plan_id: str
    keys: list[KeyInfoOut]


# ---- risky mixes ----------------------------------------------------------------------------


# Annual decimals. Values that look like percentages are refused by the mix rules
# (allocation.check_decimal_rates), with a reason that says so; these ranges only keep arithmetic
# far from overflow.
ExpectedReturn = Annotated[float, Field(ge=-1.0, le=1e6)]
Volatility = Annotated[float, Field(gt=0.0, le=1e6)]
Rate = Annotated[float, Field(gt=-1.0, le=1e6)]
MatrixEntry = Annotated[float, Field(ge=-1e6, le=1e6)]


class AssetIn(Strict):
    code: Code
    expected_return: ExpectedReturn
    volatility: Volatility | None = None


Matrix = list[list[MatrixEntry]]


class FactorModelIn(Strict):
    """Covariance B F B' + diag(specific_volatility^2); shapes and F's spectrum are checked
    with the numbers (service.numerics.build_inputs)."""

    loadings: Annotated[list[list[MatrixEntry]], Field(min_length=1, description="n x k: one row per asset")]
    factor_covariance: Annotated[Matrix, Field(description="k x k, symmetric positive semi-definite")]
    specific_volatility: Annotated[list[Volatility], Field(min_length=1, description="one per asset, > 0")]


class MixIn(Strict):
    version: str
    assets: Annotated[list[AssetIn], Field(min_length=1)]
    correlation: Matrix | None = None
    covariance: Matrix | None = None
    factor_model: FactorModelIn | None = None
    risk_free_rate: Rate
    bounds: dict[str, Annotated[list[float], Field(min_length=2, max_length=2)]] | None = None
    long_only: bool = True
    cross_check: Annotated[bool | None, Field(description=(
        "run the three numerical cross-checks; left out: run them for mixes of at most "
        "MIXLINE_MAX_CROSS_CHECK_ASSETS assets (250), whose checks take seconds, not minutes"))] = None

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


class PortfolioOut(BaseModel):
    weights: dict[str, float]
    expected_return: float
    volatility: float
    sharpe_ratio: float
    method: str


class CrossCheckOut(BaseModel):
    method: str
    sharpe_ratio: float
    max_weight_gap: float
    sharpe_gap: float
    seconds: float


class MixOut(BaseModel):
    version: str
    content_hash: str
    risk_free_rate: float
    asset_codes: list[str]
    tangency: PortfolioOut
    min_variance: PortfolioOut
    kkt_residual: float
    cross_checks: list[CrossCheckOut]
    active: bool | None = None
    state: Literal["published", "active", "retired"] | None = None
    lifecycle: MixVersionOut | None = None
    inputs: dict[str, Any] | None = Field(
        default=None, description="the published assumptions as stored (the canonical form that was hashed)"
    )


class MixVersionOut(BaseModel):
    """One version's lifecycle; *_by are the key ids that did it."""

    version: str
    state: Literal["published", "active", "retired"]
    content_hash: str
    published_at: str
    published_by: str | None
    activated_at: str | None
    activated_by: str | None
    retired_at: str | None
    retired_by: str | None


class MixListOut(BaseModel):
    plan_id: str
    active_version: str | None
    versions: list[MixVersionOut]


class ActivationOut(BaseModel):
    plan_id: str
    active_version: str
    content_hash: str
    retired_version: str | None = None
    mix: MixVersionOut | None = None


class FrontierPointOut(BaseModel):
    kind: Literal["min_variance", "corner", "tangency", "spaced"]
    expected_return: float
    volatility: float
    sharpe_ratio: float
    weights: dict[str, float]


class AllocationLineOut(BaseModel):
    intercept: float
    slope: float


class MemberSplitOut(BaseModel):
    allocation_id: str
    risky_fraction: float
    expected_return: float
    volatility: float


class FrontierOut(BaseModel):
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

    frequency: str = Field(description="daily, weekly, monthly, quarterly or annual")
    returns: Annotated[dict[Code, list[float | None]], Field(min_length=1)]
    dates: list[str] | None = Field(default=None, description="ISO dates, one per observation, increasing")
    covariance_method: str = Field(default="sample", description="sample (unbiased) or shrinkage (Ledoit-Wolf 2004)")
    expected_returns: str | dict[Code, float] = Field(
        default="historical", description="historical (annualised means) or one annual decimal per asset code"
    )
    risk_free_rate: Rate
    repair: bool = Field(default=False, description="take the nearest correlation matrix when the estimate is not positive definite")


class EstimationOut(BaseModel):
    observations: int
    periods_per_year: int
    covariance_method: str
    shrinkage_intensity: float | None
    condition_number: float
    repaired: bool
    repair_distance: float | None
    expected_returns: str


class EstimateOut(BaseModel):
    mix: dict[str, Any] = Field(description="a body for POST .../mixes, without its version")
    estimation: EstimationOut


# ---- allocations ----------------------------------------------------------------------------


class PreferenceIn(Strict):
    """Exactly one kind: risk_aversion | target_volatility | max_loss (+confidence) | risk_score.

    Documentation of the member reader's rules (service.allocation.members), which validates."""

    risk_aversion: float | None = None
    target_volatility: float | None = None
    max_loss: float | None = None
    confidence: float | None = None
    horizon_years: float | None = None
    risk_score: int | None = None


class HoldingsIn(Strict):
    risky: Money
    safe: Money


class IncomeIn(Strict):
    annual: Money = Field(description="earnings a year, paid at each year's end until retirement")
    growth: float | None = Field(
        default=None, description="annual growth of the earnings, in [-0.2, 0.2] (0.02 = 2 %); left out: 0"
    )


class MemberIn(Strict):
    member_id: MemberId
    amount: Money | None = None
    preference: PreferenceIn | None = Field(
        default=None, description="left out: the plan's glide_path sets risk aversion from years_to_retirement"
    )
    holdings: HoldingsIn | None = None
    contribution: Money | None = None
    years_to_retirement: float | None = Field(
        default=None, description="years until the member retires, in [0, 60] (never a birth date: the log is permanent)"
    )
    income: IncomeIn | None = Field(
        default=None, description="future earnings, counted as wealth where the plan's policy has human_capital"
    )
    holdings_by_asset: dict[str, Money] | None = Field(
        default=None,
        description='what the account holds now, one amount per asset code of the mix and "safe"; '
        "the answer then gives the trades to the split (instead of `holdings`)",
    )


class AllocationIn(MemberIn):
    mix_version: Identifier


class BatchIn(Strict):
    mix_version: Identifier
    members: Annotated[list[MemberIn], Field(min_length=1)]


class MoneySplitOut(BaseModel):
    risky: str
    safe: str


class ExplanationOut(BaseModel):
    text: str = Field(description="plain language built from the answer's numbers, rounded for reading")
    version: str = Field(description="the wording's version; texts of a version never change")


class HumanCapitalOut(BaseModel):
    value: str = Field(description="present value of the member's future earnings (money)")
    ratio_to_account: float | None = Field(description="value / account; null when the account is empty")


class _AnswerFields(BaseModel):
    allocation_id: str
    plan_id: str
    member_id: str
    mix_version: str
    mix_content_hash: str
    preference: dict[str, float | int] | None = Field(description="as stated; null when the glide path set it")
    preference_source: Annotated[
        str, WithJsonSchema({"type": "string", "enum": [SOURCE_MEMBER, SOURCE_GLIDE_PATH]}),
        Field(description="member: the preference was stated; glide_path: the plan's glide path set it"),
    ]
    risk_aversion_used: float | None = Field(
        description="the risk aversion the split follows (a risk score's or the glide path's); null for "
        "target_volatility and max_loss"
    )
    risky_fraction: float
    safe_fraction: float
    unconstrained_risky_fraction: float | None
    limited_by: str | None
    currency: str
    amount: str
    amounts: MoneySplitOut
    by_asset: dict[str, str]
    expected_return: float
    volatility: float
    disclosures_version: str
    created_at: str
    holdings: MoneySplitOut | None = None
    contribution: str | None = None
    contribution_split: MoneySplitOut | None = None
    after_contribution: MoneySplitOut | None = None
    explanation: ExplanationOut | None = Field(description="null only for records made before explanations")
    years_to_retirement: float | None = None
    human_capital: HumanCapitalOut | None = None
    holdings_by_asset: dict[str, str] | None = None
    trades: dict[str, str] | None = Field(
        default=None,
        description='with holdings_by_asset: signed money per asset code and "safe" ("+" buys, "-" sells), '
        "summing to the contribution (zero without one); null within the plan's rebalance_band",
    )


class AllocationOut(_AnswerFields):
    disclosures: list[str]


class BatchResultOut(_AnswerFields):
    """Every field of a single answer; the disclosure texts are given once, at the top of the batch."""


class BatchOut(BaseModel):
    plan_id: str
    mix_version: str
    mix_content_hash: str
    created_at: str
    count: int
    disclosures_version: str
    disclosures: list[str]
    results: list[BatchResultOut]


class ChangeSummaryOut(BaseModel):
    mean: float
    p05: float
    p50: float
    p95: float
    max_abs: float


class MoveOut(BaseModel):
    member_id: str
    before: float
    after: float


class ImpactOut(BaseModel):
    """A candidate version's effect on the members whose latest allocation is under the active one."""

    plan_id: str
    from_version: str
    to_version: str
    members: int
    risky_fraction_change: ChangeSummaryOut
    limited_by: dict[str, dict[str, int]]
    largest_moves: list[MoveOut]
    refused_under_candidate: int


class AllocationListOut(BaseModel):
    plan_id: str
    member_id: str
    count: int
    allocations: list[AllocationOut]


# ---- audit and operations -------------------------------------------------------------------


class BadRowOut(BaseModel):
    seq: int | None
    allocation_id: str | None
    reason: str


class AuditOut(BaseModel):
    plan_id: str
    ok: bool
    checked: int
    head_hash: str
    first_bad: BadRowOut | None


class SignedHeadOut(BaseModel):
    plan_id: str
    seq: int
    hash: str
    signed_at: str
    key_id: str
    signature: str


class SigningKeyOut(BaseModel):
    algorithm: Literal["Ed25519"]
    key_id: str
    public_key: str
    public_key_pem: str
    ephemeral: bool


class HealthOut(BaseModel):
    status: str
    checks: dict[str, str] | None = None
