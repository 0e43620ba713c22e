"""The one error the numerics layer raises for unsolvable user input.

Hierarchy::

    ValueError
     +-- InputError      a mix input that cannot be solved (names the request field)

A ``RuntimeError`` from this package is never about user input: it means an exact
method failed its own optimality check, which is a bug.
"""

from __future__ import annotations

__all__ = ["InputError"]


class InputError(ValueError):
    """A mix input that cannot be solved.

    ``field`` is a dotted/indexed path in the publish-request vocabulary, for example
    ``"covariance"``, ``"correlation[2][1]"``, ``"assets[3].volatility"``,
    ``"bounds.EQ_WORLD"`` or ``"risk_free_rate"``; ``reason`` is a human sentence that
    carries the offending numbers.
    """

    field: str
    reason: str

    def __init__(self, field: str, reason: str) -> None:
        super().__init__(f"{field}: {reason}")
        self.field = field
        self.reason = reason

    def __reduce__(self) -> tuple[type[InputError], tuple[str, str]]:
        # Keeps the two-argument constructor working through pickling (process pools).
        return (type(self), (self.field, self.reason))
