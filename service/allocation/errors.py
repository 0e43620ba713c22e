"""Errors of the allocation layer.

    AllocationError(ValueError)      a member request or plan policy that cannot be answered;
                                     carries the request `field` it is about and a `reason`.

The API layer turns it into a 422 problem; nothing here knows HTTP.
"""

from __future__ import annotations


class AllocationError(ValueError):
    def __init__(self, field: str, reason: str) -> None:
        super().__init__(f"{field}: {reason}")
        self.field = field
        self.reason = reason

    def __reduce__(self) -> tuple[type[AllocationError], tuple[str, str]]:
        # Keeps the two-argument constructor working through pickling: a publication refused in
        # the frontier process comes back as the error it is.
        return (type(self), (self.field, self.reason))
