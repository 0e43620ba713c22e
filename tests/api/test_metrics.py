"""/metrics: Prometheus text with process, runtime, build and log-writer metrics, no `_created`
series, `plan_id` on both per-plan counters, and declared as text in OpenAPI."""

from __future__ import annotations

import os
import shutil
from typing import Any

import anyio
import pytest
from prometheus_client.parser import text_string_to_metric_families

from service.demo import DEMO_ALLOCATION, DEMO_MIX
from service.version import VERSION

from .conftest import World

pytestmark = pytest.mark.anyio


def samples(text: str) -> dict[str, list[Any]]:
    found: dict[str, list[Any]] = {}
    for family in text_string_to_metric_families(text):
        for sample in family.samples:
            found.setdefault(sample.name, []).append(sample)
    return found


async def exercise(world: World, plan_id: str) -> None:
    keys: dict[str, Any] = await world.plan(plan_id)
    await world.publish(plan_id, keys)
    r = await world.client.post(f"/v1/plans/{plan_id}/allocations", json=DEMO_ALLOCATION, headers=keys["portal"])
    assert r.status_code == 201, r.text
    members = [{**DEMO_ALLOCATION, "member_id": f"m-{i}"} for i in range(3)]
    for m in members:
        m.pop("mix_version")
    r = await world.client.post(
        f"/v1/plans/{plan_id}/allocations/batch",
        json={"mix_version": DEMO_MIX["version"], "members": members}, headers=keys["portal"],
    )
    assert r.status_code == 201, r.text


async def test_metrics_cover_process_runtime_build_and_the_log_writer(world: World, new_plan_id: str) -> None:
    await exercise(world, new_plan_id)
    # The writer reports a group just after the commit that answered the request: wait for it.
    with anyio.fail_after(5):
        while True:
            r = await world.client.get("/metrics")
            found = samples(r.text)
            if found["mixline_log_writer_group_rows_sum"][0].value >= 4:
                break
            await anyio.sleep(0.01)
    assert r.status_code == 200
    assert r.headers["content-type"].startswith("text/plain; version=0.0.4")
    # Process and runtime collectors (prometheus_client's; process_* needs Linux /proc).
    for name in ("process_cpu_seconds_total", "process_resident_memory_bytes", "python_info", "python_gc_collections_total"):
        assert name in found, name
    (build,) = found["mixline_build_info"]
    assert build.labels == {"version": VERSION}
    assert not [n for n in found if n.endswith("_created")]
    # One single allocation and a batch of three: 4 rows logged (counted by this test's writer only).
    (logged,) = [s for s in found["mixline_allocations_logged_total"] if s.labels["plan_id"] == new_plan_id]
    assert logged.value == 4
    (published,) = [s for s in found["mixline_mixes_published_total"] if s.labels["plan_id"] == new_plan_id]
    assert published.value == 1
    for sibling in ("mixline_allocations_logged_total", "mixline_mixes_published_total"):
        assert all(set(s.labels) == {"plan_id"} for s in found[sibling]), sibling
    (rows_sum,) = found["mixline_log_writer_group_rows_sum"]
    assert rows_sum.value == 4
    (groups,) = found["mixline_log_writer_group_rows_count"]
    assert groups.value >= 2  # the single and the batch were sent one after the other
    (commits,) = found["mixline_log_writer_commit_seconds_count"]
    assert commits.value == groups.value
    (commit_seconds,) = found["mixline_log_writer_commit_seconds_sum"]
    assert commit_seconds.value > 0
    (depth,) = found["mixline_log_writer_queue_jobs"]
    assert depth.value >= 0


async def test_metrics_are_declared_as_prometheus_text_not_json(world: World) -> None:
    doc = (await world.client.get("/openapi.json")).json()
    ok = doc["paths"]["/metrics"]["get"]["responses"]["200"]
    assert list(ok["content"]) == ["text/plain"]
    assert ok["content"]["text/plain"]["schema"] == {"type": "string"}
    assert "exposition" in ok["description"]


@pytest.mark.skipif(shutil.which("promtool") is None and os.environ.get("MIXLINE_REQUIRE_PROMTOOL") != "1",
                    reason="promtool is absent (Debian package `prometheus`; .ci/run fetches it)")
async def test_promtool_finds_no_problem(world: World, new_plan_id: str) -> None:
    await exercise(world, new_plan_id)
    text = (await world.client.get("/metrics")).text
    with anyio.fail_after(60):
        result = await anyio.run_process(["promtool", "check", "metrics"], input=text.encode(), check=False)
    said = (result.stdout + result.stderr).decode()
    assert result.returncode == 0, said
    assert said.strip() == "", said  # promtool prints every lint it finds
