"""Errors the store raises on purpose.

    Exception
     └── Conflict      a row with the same key already exists (plan, key, mix version)

Anything else (a foreign key naming a missing plan, a lost connection) surfaces as the
SQLAlchemy / driver exception it is.
"""


class Conflict(Exception):
    """An insert met an existing row with the same unique key."""
