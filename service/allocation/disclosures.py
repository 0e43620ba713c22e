"""The disclosures every recommendation carries, in one place so that no answer goes without them."""

from __future__ import annotations

# The log records which texts a member was shown by this version; texts never change in place,
# a new wording gets a new version and the old one stays here.
DISCLOSURES_VERSION = "2026-12"

DISCLOSURES: tuple[str, ...] = (
    "This split follows from the plan's stated capital-market assumptions (expected returns, "
    "volatilities, correlations and the risk-free rate); they are estimates, and actual returns "
    "will differ, including losses.",
    "It is a model output for the risk preference given, not individual financial advice; it does "
    "not know your whole situation (other savings, debts, income, tax, time to retirement).",
    "Consider your whole financial situation before acting on it.",
    "The plan's rules, the law where you live and advice from a licensed adviser take precedence "
    "over this recommendation.",
)

BORROWING_DISCLOSURE = (
    "A risky fraction above 1 means borrowing at the plan's borrowing rate to hold more than the "
    "account in the risky mix; losses can exceed what a fully funded split would lose."
)


_BY_VERSION = {DISCLOSURES_VERSION: (DISCLOSURES, BORROWING_DISCLOSURE)}


def disclosures_for(risky_fraction: float, version: str = DISCLOSURES_VERSION) -> list[str]:
    general, borrowing = _BY_VERSION[version]
    notes = list(general)
    if risky_fraction > 1.0:
        notes.append(borrowing)
    return notes
