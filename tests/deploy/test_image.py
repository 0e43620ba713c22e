"""deploy/Containerfile builds from a base pinned by digest and installs only what
deploy/requirements.lock pins, with hashes; the lock agrees with pyproject.toml."""

from __future__ import annotations

import re
import tomllib
from pathlib import Path

from packaging.requirements import Requirement
from packaging.utils import canonicalize_name
from packaging.version import Version

ROOT = Path(__file__).resolve().parents[2]
CONTAINERFILE = (ROOT / "deploy" / "Containerfile").read_text()
LOCK = (ROOT / "deploy" / "requirements.lock").read_text()
PYPROJECT = tomllib.loads((ROOT / "pyproject.toml").read_text())


def locked() -> dict[str, tuple[Version, int]]:
    """name -> (pinned version, number of hashes), from pip-compile's format."""
    found: dict[str, tuple[Version, int]] = {}
    for entry in re.split(r"\n(?=\S)", LOCK):
        first = entry.split("\n", 1)[0]
        if not first or first.startswith("#"):
            continue
        match = re.fullmatch(r"([A-Za-z0-9._-]+)==(\S+) \\", first)
        assert match, f"not an exact pin with hashes: {first!r}"
        found[canonicalize_name(match.group(1))] = (Version(match.group(2)), entry.count("--hash=sha256:"))
    return found


def test_the_base_image_is_pinned_by_digest() -> None:
    (base,) = re.findall(r"^ARG BASE=(\S+)$", CONTAINERFILE, flags=re.MULTILINE)
    assert re.fullmatch(r"[\w./-]+:[\w.-]+@sha256:[0-9a-f]{64}", base), base
    stages = re.findall(r"^FROM (\S+)", CONTAINERFILE, flags=re.MULTILINE)
    assert stages and all(s == "${BASE}" for s in stages), stages


def test_python_packages_come_from_the_lock_with_hashes() -> None:
    installs = [line for line in CONTAINERFILE.splitlines() if "pip install" in line]
    assert any("--require-hashes" in line and "-r deploy/requirements.lock" in line for line in installs)
    # The service itself is built without fetching build requirements (they are in the lock).
    assert all("--require-hashes" in line or "--no-build-isolation" in line for line in installs), installs
    assert all(count >= 1 for _, count in locked().values())


def test_the_lock_satisfies_pyproject() -> None:
    pins = locked()
    wanted = [Requirement(r) for r in PYPROJECT["project"]["dependencies"]]
    wanted += [Requirement(r) for r in PYPROJECT["build-system"]["requires"]]
    missing = [str(r) for r in wanted if canonicalize_name(r.name) not in pins]
    assert not missing, f"not in deploy/requirements.lock (re-run pip-compile, DEVELOPERS.md): {missing}"
    outside = [f"{r} locked at {pins[canonicalize_name(r.name)][0]}" for r in wanted
               if not r.specifier.contains(pins[canonicalize_name(r.name)][0], prereleases=True)]
    assert not outside, outside


def test_every_runtime_dependency_has_an_upper_bound() -> None:
    for text in PYPROJECT["project"]["dependencies"]:
        requirement = Requirement(text)
        assert any(s.operator in ("<", "<=", "==", "~=") for s in requirement.specifier), text
