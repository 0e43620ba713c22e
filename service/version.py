"""The service's version: the one in pyproject.toml, read from the installed distribution.

OpenAPI's ``info.version``, the ``mixline_build_info`` metric and the image tag in deploy/ all
come from (or are checked against) this one number; tests/test_version.py holds them equal.
"""

from __future__ import annotations

from importlib.metadata import PackageNotFoundError, version

DISTRIBUTION = "mixline"

try:
    VERSION = version(DISTRIBUTION)
except PackageNotFoundError:  # a source tree on sys.path without `pip install -e .`
    VERSION = "0+unknown"
