"""kill -9 under load: every acknowledged allocation is found again, batches stay all or nothing,
and the chain verifies. Three rounds on each database, `mixline serve` as a real process.

Singles come from 12 threads and batches of 40 from 2 more; the server is killed with SIGKILL
while they run, then started again on the same database. An answer counts as acknowledged only
when its 201 was fully received; after every round, each acknowledged allocation must read back
as exactly the answer given, and each batch that was not acknowledged must be wholly visible or
wholly invisible (a staged batch cut off by the kill is invisible).
"""

from __future__ import annotations

import threading
import time
from pathlib import Path
from typing import Any

import httpx
import pytest

from service.demo import DEMO_MIX
from tests.api.test_replicas import OPERATOR, Replica

pytestmark = pytest.mark.slow

ROUNDS = 3
BATCH = 40


def call(base: str, method: str, path: str, key: str, body: Any = None, **params: Any) -> httpx.Response:
    return httpx.request(method, base + path, json=body, params=params or None,
                         headers={"Authorization": f"Bearer {key}"}, timeout=30)


def test_kill_nine_under_load_loses_no_acknowledged_allocation(db_url: str, tmp_path: Path, new_plan_id: str) -> None:
    server = Replica(db_url, tmp_path)
    plan = new_plan_id
    try:
        assert call(server.base, "POST", "/v1/plans", OPERATOR, {"plan_id": plan, "name": "Crash", "currency": "USD"}).status_code == 201
        keys = {role: call(server.base, "POST", f"/v1/plans/{plan}/keys", OPERATOR, {"role": role}).json()["secret"]
                for role in ("committee", "portal")}
        assert call(server.base, "POST", f"/v1/plans/{plan}/mixes", keys["committee"], DEMO_MIX | {"cross_check": False}).status_code == 201
        assert call(server.base, "POST", f"/v1/plans/{plan}/mixes/{DEMO_MIX['version']}/activate", keys["committee"]).status_code == 200
        acknowledged: dict[str, bytes] = {}
        checked: set[str] = set()
        lock = threading.Lock()
        unanswered_batches: list[list[str]] = []
        for round_ in range(ROUNDS):
            stop = threading.Event()
            base = server.base

            def singles(t: int, base: str = base, stop: threading.Event = stop, round_: int = round_) -> None:
                with httpx.Client(base_url=base, headers={"Authorization": f"Bearer {keys['portal']}"}, timeout=10) as c:
                    i = 0
                    while not stop.is_set():
                        i += 1
                        body = {"member_id": f"r{round_}-t{t}-{i}", "mix_version": DEMO_MIX["version"],
                                "amount": f"{1000 + i}.00", "preference": {"risk_aversion": 2 + i % 7}}
                        try:
                            r = c.post(f"/v1/plans/{plan}/allocations", json=body)
                        except httpx.HTTPError:
                            return  # the server is gone: nothing more to acknowledge
                        if r.status_code == 201:
                            with lock:
                                acknowledged[r.json()["allocation_id"]] = r.content

            def batches(t: int, base: str = base, stop: threading.Event = stop, round_: int = round_) -> None:
                with httpx.Client(base_url=base, headers={"Authorization": f"Bearer {keys['portal']}"}, timeout=10) as c:
                    i = 0
                    while not stop.is_set():
                        i += 1
                        members = [{"member_id": f"r{round_}-b{t}-{i}-{j}", "amount": "500.00",
                                    "preference": {"target_volatility": 0.05}} for j in range(BATCH)]
                        try:
                            r = c.post(f"/v1/plans/{plan}/allocations/batch",
                                       json={"mix_version": DEMO_MIX["version"], "members": members})
                        except httpx.HTTPError:
                            with lock:
                                unanswered_batches.append([m["member_id"] for m in members])
                            return
                        if r.status_code == 201:
                            with lock:
                                for res in r.json()["results"]:
                                    acknowledged[res["allocation_id"]] = b""  # read back below
                        else:
                            with lock:
                                unanswered_batches.append([m["member_id"] for m in members])

            workers = [threading.Thread(target=singles, args=(t,)) for t in range(12)]
            workers += [threading.Thread(target=batches, args=(t,)) for t in range(2)]
            for w in workers:
                w.start()
            time.sleep(0.8 + 0.3 * round_)
            server.proc.kill()  # SIGKILL: no shutdown of any kind
            server.proc.wait(10)
            stop.set()
            for w in workers:
                w.join(30)
            server.log.close()
            server = Replica(db_url, tmp_path)
            fresh = {a: answer for a, answer in acknowledged.items() if a not in checked}
            with httpx.Client(base_url=server.base, headers={"Authorization": f"Bearer {keys['portal']}"}, timeout=30) as c:
                for allocation_id, answer in fresh.items():
                    back = c.get(f"/v1/plans/{plan}/allocations/{allocation_id}")
                    assert back.status_code == 200, (round_, allocation_id, back.text)
                    if answer:
                        assert back.content == answer  # exactly the answer that was acknowledged
                for member_ids in unanswered_batches:
                    # The first and the last member tell: a batch is visible whole or not at all.
                    seen = {c.get(f"/v1/plans/{plan}/allocations", params={"member_id": m}).json()["count"]
                            for m in (member_ids[0], member_ids[-1])}
                    assert seen in ({0}, {1}), (round_, seen)
            checked.update(fresh)
            unanswered_batches.clear()
        assert len(acknowledged) > 100  # the load was real
        verify = call(server.base, "GET", f"/v1/plans/{plan}/audit/verify", keys["committee"]).json()
        assert verify["ok"] is True and verify["checked"] >= len(acknowledged), verify
    finally:
        server.stop()
