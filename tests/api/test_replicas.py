"""Two real `mixline serve` processes on one PostgreSQL database agree on the version in force:
after an activation on one, the other refuses the old version and accepts the new within 5 s
(the contract's figure; the service reads the active version at most 1 s old by default)."""

from __future__ import annotations

import copy
import os
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest

from service.demo import DEMO_MIX

pytestmark = [pytest.mark.postgres, pytest.mark.slow]

OPERATOR = "replica-test-operator-key-0123456789abcdef"
AGREE_WITHIN_S = 5.0  # API.md, "Risky-mix lifecycle" (replicas agree within 5 s)


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


class Replica:
    def __init__(self, database_url: str, workdir: Path) -> None:
        self.port = free_port()
        self.base = f"http://127.0.0.1:{self.port}"
        env = os.environ | {"MIXLINE_DATABASE_URL": database_url, "MIXLINE_BOOTSTRAP_OPERATOR_KEY": OPERATOR}
        self.log = open(workdir / f"replica-{self.port}.log", "w")
        mixline = Path(sys.executable).with_name("mixline")
        self.proc = subprocess.Popen(
            [str(mixline), "serve", "--port", str(self.port), "--no-migrate"],
            cwd=workdir, env=env, stdout=self.log, stderr=subprocess.STDOUT,
        )
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            try:
                if httpx.get(self.base + "/readyz", timeout=2).status_code == 200:
                    return
            except httpx.HTTPError:
                pass
            if self.proc.poll() is not None:
                break
            time.sleep(0.2)
        self.stop()
        raise RuntimeError(f"replica on port {self.port} did not become ready; see {self.log.name}")

    def stop(self) -> None:
        self.proc.terminate()
        try:
            self.proc.wait(20)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait(5)
        self.log.close()


@pytest.fixture
def replicas(postgres_url: str, tmp_path: Path) -> Iterator[tuple[Replica, Replica]]:
    started: list[Replica] = []
    try:
        started.append(Replica(postgres_url, tmp_path))
        started.append(Replica(postgres_url, tmp_path))
        yield started[0], started[1]
    finally:
        for r in started:
            r.stop()


def call(replica: Replica, method: str, path: str, key: str, body: Any = None) -> httpx.Response:
    return httpx.request(method, replica.base + path, json=body, headers={"Authorization": f"Bearer {key}"}, timeout=30)


def test_an_activation_on_one_replica_is_in_force_on_the_other(
    replicas: tuple[Replica, Replica], new_plan_id: str
) -> None:
    a, b = replicas
    plan = new_plan_id
    assert call(a, "POST", "/v1/plans", OPERATOR, {"plan_id": plan, "name": "Replicas", "currency": "USD"}).status_code == 201
    keys = {}
    for role in ("committee", "portal"):
        r = call(a, "POST", f"/v1/plans/{plan}/keys", OPERATOR, {"role": role})
        keys[role] = r.json()["secret"]
    for version, rf in (("2026-q4", 0.031), ("2027-q1", 0.029)):
        body = copy.deepcopy(DEMO_MIX) | {"version": version, "risk_free_rate": rf, "cross_check": False}
        assert call(a, "POST", f"/v1/plans/{plan}/mixes", keys["committee"], body).status_code == 201
    assert call(a, "POST", f"/v1/plans/{plan}/mixes/2026-q4/activate", keys["committee"]).status_code == 200

    def allocate(replica: Replica, version: str) -> httpx.Response:
        member = {"member_id": "m-1", "mix_version": version, "amount": "1000.00", "preference": {"risk_aversion": 3}}
        return call(replica, "POST", f"/v1/plans/{plan}/allocations", keys["portal"], member)

    # B has read (and may keep for a moment) 2026-q4 as the version in force.
    first = allocate(b, "2026-q4")
    assert first.status_code == 201, first.text
    assert call(a, "POST", f"/v1/plans/{plan}/mixes/2027-q1/activate", keys["committee"]).status_code == 200
    activated = time.monotonic()
    old_refused = new_accepted = None
    while time.monotonic() - activated < AGREE_WITHIN_S + 2:
        if old_refused is None:
            old = allocate(b, "2026-q4")
            if old.status_code == 409:
                assert old.json()["active_version"] == "2027-q1"
                old_refused = time.monotonic() - activated
            else:
                assert old.status_code == 201, old.text
        if new_accepted is None:
            new = allocate(b, "2027-q1")
            if new.status_code == 201:
                new_accepted = time.monotonic() - activated
            else:
                assert new.status_code == 409, new.text
        if old_refused is not None and new_accepted is not None:
            break
        time.sleep(0.1)
    print(f"replica B: old version refused after {old_refused} s, new accepted after {new_accepted} s")
    assert old_refused is not None and old_refused <= AGREE_WITHIN_S, old_refused
    assert new_accepted is not None and new_accepted <= AGREE_WITHIN_S, new_accepted
    # A agrees at once (it made the change), and both logs verify as one chain.
    assert allocate(a, "2026-q4").status_code == 409
    verified = call(a, "GET", f"/v1/plans/{plan}/audit/verify", keys["committee"]).json()
    assert verified["ok"] is True
