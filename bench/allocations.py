"""Benchmark: logged allocations over HTTP, each figure beside a floor measured in the same run.

    .venv/bin/python bench/allocations.py [--members 300000] [--seconds 10] [--postgres URL] [--quick]

Starts `mixline serve` as its own process on a fresh SQLite file (and, with --postgres, on a
fresh PostgreSQL database), seeds an invented plan, mix and keys over HTTP, then measures:

1. Single allocations at 16 concurrent connections with wrk (Debian package `wrk`) for a fixed
   time, next to wrk on GET /livez (a trivial endpoint) as the floor. Targets: >= 2,500 req/s and
   p99 <= 15 ms. Requests carry no Idempotency-Key; a second run with a fresh key per request is
   reported beside it. The rate limiter and the JSON access log are on (a limit too high to
   refuse anything; the log goes to a file).
2. Batch: one POST .../allocations/batch with N members (default 300,000, the batch limit), end
   to end over loopback (request sent, every member computed and logged, answer received).
   Floor, same run: orjson parsing of the same request body plus a raw bulk insert (executemany /
   COPY in one transaction, no hashing, no application code) of the very rows the service
   logged. Also the peak resident memory (VmHWM from /proc) of the server process and of its
   batch process. Targets: within 1.5x of the floor, peak memory < 1.5 GB.
3. Singles during a batch: wrk as in 1. while a second batch of N members runs on the same
   server, for as long as the first batch took. Target: p99 <= 25 ms.
4. Members as they are (--kinds, or --kinds-only for this alone): N members who state no
   preference and send years to retirement and income (the plan's glide path and human capital
   decide) against N members with a risk aversion, same server, alternating, three rounds each.
   Target: the former within 1.3x of the latter (best against best: the least disturbed runs).

Every loop here is bounded in count and time and talks only to 127.0.0.1.
"""

from __future__ import annotations

import argparse
import json
import os
import random
import re
import shutil
import socket
import subprocess
import sys
import tempfile
import threading
import time
import urllib.request
from pathlib import Path
from typing import Any

import orjson

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from service.demo import DEMO_MIX

OPERATOR = "bench-operator-key-0123456789abcdefghijklmnop"
PLAN = "bench-plan"


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def call(base: str, method: str, path: str, key: str, body: Any = None, timeout: float = 600) -> tuple[int, bytes]:
    data = body if isinstance(body, bytes) else (None if body is None else orjson.dumps(body))
    req = urllib.request.Request(base + path, data=data, method=method)
    req.add_header("Authorization", f"Bearer {key}")
    req.add_header("Content-Type", "application/json")
    try:
        with urllib.request.urlopen(req, timeout=timeout) as r:
            return r.status, r.read()
    except urllib.error.HTTPError as e:
        return e.code, e.read()


def _peak_rss_mb(pid: int) -> float:
    status = Path(f"/proc/{pid}/status").read_text()
    kb = int(re.search(r"VmHWM:\s+(\d+) kB", status).group(1))  # type: ignore[union-attr]
    return kb / 1024


class Server:
    def __init__(self, database_url: str, workdir: Path) -> None:
        self.port = free_port()
        self.base = f"http://127.0.0.1:{self.port}"
        env = os.environ | {
            "MIXLINE_DATABASE_URL": database_url,
            "MIXLINE_BOOTSTRAP_OPERATOR_KEY": OPERATOR,
            # The rate limiter and the access log run as in production: every request spends a
            # token (from a bucket too large to refuse any) and writes its line to a file.
            "MIXLINE_RATE_LIMIT_PER_SECOND": "1000000",
            "MIXLINE_RATE_LIMIT_BURST": "1000000",
            "MIXLINE_ACCESS_LOG": str(workdir / f"access-{self.port}.jsonl"),
        }
        self.log = open(workdir / f"server-{self.port}.log", "w")
        self.proc = subprocess.Popen(
            [str(ROOT / ".venv/bin/mixline"), "serve", "--port", str(self.port)],
            cwd=workdir, env=env, stdout=self.log, stderr=subprocess.STDOUT,
        )
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            try:
                with urllib.request.urlopen(self.base + "/readyz", timeout=2) as r:
                    if r.status == 200:
                        return
            except OSError:
                time.sleep(0.2)
        raise RuntimeError("server did not become ready; see " + self.log.name)

    def peak_rss_mb(self) -> float:
        return _peak_rss_mb(self.proc.pid)

    def children_peak_rss_mb(self) -> float:
        """The largest peak among the server's child processes (the batch process)."""
        found = [0.0]
        for task in Path(f"/proc/{self.proc.pid}/task").iterdir():
            for child in (task / "children").read_text().split():
                found.append(_peak_rss_mb(int(child)))
        return max(found)

    def stop(self) -> None:
        self.proc.terminate()
        try:
            self.proc.wait(20)
        except subprocess.TimeoutExpired:
            self.proc.kill()
        self.log.close()


def seed(server: Server) -> dict[str, str]:
    status, body = call(server.base, "POST", "/v1/plans", OPERATOR,
                        {"plan_id": PLAN, "name": "Bench plan", "currency": "USD",
                         "policy": {"risk_score_table": {"1": 10.0, "2": 6.0, "3": 3.0},
                                    "glide_path": [{"years_to_retirement": 40, "risk_aversion": 2.0},
                                                   {"years_to_retirement": 10, "risk_aversion": 5.0},
                                                   {"years_to_retirement": 0, "risk_aversion": 9.0}],
                                    "human_capital": {"discount_rate": None, "equity_like_share": 0.1}}})
    assert status == 201, body
    keys = {}
    for role in ("committee", "portal"):
        status, body = call(server.base, "POST", f"/v1/plans/{PLAN}/keys", OPERATOR, {"role": role})
        assert status == 201, body
        keys[role] = json.loads(body)["secret"]
    status, body = call(server.base, "POST", f"/v1/plans/{PLAN}/mixes", keys["committee"], DEMO_MIX | {"cross_check": False})
    assert status == 201, body
    status, body = call(server.base, "POST", f"/v1/plans/{PLAN}/mixes/{DEMO_MIX['version']}/activate", keys["committee"])
    assert status == 200, body
    return keys


def members(n: int, seed_value: int = 280) -> list[dict[str, Any]]:
    """Invented members: a spread of preferences and account sizes."""
    rng = random.Random(seed_value)
    out = []
    for i in range(n):
        r = rng.random()
        if r < 0.55:
            pref: dict[str, Any] = {"risk_aversion": rng.choice([1, 2, 3, 4, 5, 6, 8])}
        elif r < 0.75:
            pref = {"risk_score": rng.randint(1, 3)}
        elif r < 0.9:
            pref = {"target_volatility": round(rng.uniform(0.02, 0.12), 3)}
        else:
            pref = {"max_loss": round(rng.uniform(0.05, 0.3), 2), "confidence": 0.95}
        out.append({"member_id": f"m-{i:07d}", "amount": f"{rng.randint(100, 900000)}.{rng.randint(0, 99):02d}", "preference": pref})
    return out


def aversion_members(n: int, seed_value: int) -> list[dict[str, Any]]:
    rng = random.Random(seed_value)
    return [{"member_id": f"a-{seed_value}-{i:07d}", "amount": f"{rng.randint(100, 900000)}.{rng.randint(0, 99):02d}",
             "preference": {"risk_aversion": rng.choice([1, 2, 3, 4, 5, 6, 8])}} for i in range(n)]


def glide_members(n: int, seed_value: int) -> list[dict[str, Any]]:
    """Invented members who state no preference: years to retirement and an income each."""
    rng = random.Random(seed_value)
    return [{"member_id": f"g-{seed_value}-{i:07d}", "amount": f"{rng.randint(100, 900000)}.{rng.randint(0, 99):02d}",
             "years_to_retirement": rng.randint(0, 45),
             "income": {"annual": f"{rng.randint(18000, 140000)}.00", "growth": round(rng.uniform(0.0, 0.03), 3)}}
            for i in range(n)]


def bench_member_kinds(server: Server, keys: dict[str, str], n: int, rounds: int = 3) -> dict[str, Any]:
    """Glide-path members with income against risk-aversion members, alternating on one server."""
    seconds: dict[str, list[float]] = {"risk_aversion": [], "glide_path_income": []}
    for r in range(rounds):
        for name, make in (("risk_aversion", aversion_members), ("glide_path_income", glide_members)):
            body = orjson.dumps({"mix_version": DEMO_MIX["version"], "members": make(n, 500 + r)})
            start = time.perf_counter()
            status, answer = call(server.base, "POST", f"/v1/plans/{PLAN}/allocations/batch", keys["portal"], body)
            seconds[name].append(time.perf_counter() - start)
            assert status == 201, answer[:500]
    a, g = sorted(seconds["risk_aversion"]), sorted(seconds["glide_path_income"])
    return {"members": n, "seconds": seconds, "ratio_of_best": g[0] / a[0], "peak_rss_mb": server.peak_rss_mb(),
            "batch_process_peak_rss_mb": server.children_peak_rss_mb()}


def raw_insert_floor(database_url: str, rows: list[tuple[Any, ...]]) -> float:
    """Insert the same rows into an empty copy of the allocations table (same columns and
    indexes), one transaction, timed: the database's own cost of logging them."""
    from sqlalchemy import create_engine

    engine = create_engine(database_url)
    with engine.connect() as conn:
        dbapi = conn.connection.driver_connection
        cols = "plan_id, seq, allocation_id, member_id, mix_version, created_at, body, prev_hash, row_hash"
        if engine.dialect.name == "sqlite":
            # The same table definition and the same indexes as the log, under another name.
            dbapi.execute("DROP TABLE IF EXISTS floor_rows")
            ddl = dbapi.execute(
                "SELECT sql FROM sqlite_master WHERE tbl_name = 'allocations' AND sql IS NOT NULL "
                "ORDER BY type DESC").fetchall()
            for (statement,) in ddl:
                statement = re.sub(r"\ballocations\b", "floor_rows", statement)
                statement = re.sub(r"(INDEX|CONSTRAINT) (\w+)", lambda m: f"{m.group(1)} floor_{m.group(2)}", statement)
                dbapi.execute(statement)
            dbapi.commit()
            # As the service's writer does: no automatic WAL checkpoint inside the commit.
            dbapi.execute("PRAGMA wal_autocheckpoint=0")
            start = time.perf_counter()
            dbapi.execute("BEGIN IMMEDIATE")
            dbapi.executemany(f"INSERT INTO floor_rows ({cols}) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)", rows)
            dbapi.commit()
            elapsed = time.perf_counter() - start
            dbapi.execute("DROP TABLE floor_rows")
            dbapi.commit()
        else:
            with dbapi.cursor() as cur:
                cur.execute("DROP TABLE IF EXISTS floor_rows")
                # Same columns, constraints and indexes; no foreign keys (nothing to check them against).
                cur.execute("CREATE TABLE floor_rows (LIKE allocations INCLUDING DEFAULTS INCLUDING INDEXES)")
            dbapi.commit()
            start = time.perf_counter()
            with dbapi.cursor() as cur:
                with cur.copy(f"COPY floor_rows ({cols}) FROM STDIN") as copy:
                    for row in rows:
                        copy.write_row(row)
            dbapi.commit()
            elapsed = time.perf_counter() - start
            with dbapi.cursor() as cur:
                cur.execute("DROP TABLE floor_rows")
            dbapi.commit()
    engine.dispose()
    return elapsed


def logged_rows(database_url: str) -> list[tuple[Any, ...]]:
    from sqlalchemy import create_engine, text

    engine = create_engine(database_url)
    with engine.connect() as conn:
        rows = conn.execute(text(
            "SELECT plan_id, seq, allocation_id, member_id, mix_version, created_at, body, prev_hash, row_hash "
            "FROM allocations WHERE plan_id = :p ORDER BY seq"), {"p": PLAN}).all()
    engine.dispose()
    return [tuple(r) for r in rows]


def bench_batch(server: Server, keys: dict[str, str], database_url: str, n: int) -> dict[str, float]:
    body = orjson.dumps({"mix_version": DEMO_MIX["version"], "members": members(n)})
    start = time.perf_counter()
    status, answer = call(server.base, "POST", f"/v1/plans/{PLAN}/allocations/batch", keys["portal"], body)
    elapsed = time.perf_counter() - start
    assert status == 201, answer[:500]
    count = orjson.loads(answer)["count"]
    assert count == n, count
    peak, child_peak = server.peak_rss_mb(), server.children_peak_rss_mb()
    start = time.perf_counter()
    orjson.loads(body)
    parse = time.perf_counter() - start
    rows = [r for r in logged_rows(database_url)][-n:]
    insert = raw_insert_floor(database_url, rows)
    floor = parse + insert
    return {"members": n, "seconds": elapsed, "floor_parse": parse, "floor_insert": insert, "floor": floor,
            "ratio": elapsed / floor, "peak_rss_mb": peak, "batch_process_peak_rss_mb": child_peak,
            "body_mb": len(body) / 1e6, "answer_mb": len(answer) / 1e6}


def bench_singles_during_batch(server: Server, keys: dict[str, str], n: int, seconds: float, workdir: Path) -> dict[str, float]:
    """Single allocations at 16 connections while one batch of n members runs on the same server."""
    body = orjson.dumps({"mix_version": DEMO_MIX["version"], "members": members(n, seed_value=281)})
    script = single_script(workdir, keys)
    url = f"{server.base}/v1/plans/{PLAN}/allocations"
    outcome: dict[str, Any] = {}

    def batch() -> None:
        started = time.perf_counter()
        status, answer = call(server.base, "POST", f"/v1/plans/{PLAN}/allocations/batch", keys["portal"], body)
        outcome["status"], outcome["seconds"] = status, time.perf_counter() - started

    runner = threading.Thread(target=batch)
    runner.start()
    # wrk covers the batch's whole run (measured alone just before), no longer.
    singles = wrk(url, max(1, round(seconds)), script)
    runner.join()
    assert outcome["status"] == 201, outcome
    return singles | {"batch_seconds": outcome["seconds"]}


def single_script(workdir: Path, keys: dict[str, str]) -> Path:
    plain = workdir / "single.lua"
    plain.write_text(
        'wrk.method = "POST"\n'
        f"wrk.body = '{json.dumps({'member_id': 'm-bench', 'mix_version': DEMO_MIX['version'], 'amount': '48250.00', 'preference': {'risk_aversion': 4}})}'\n"
        'wrk.headers["Content-Type"] = "application/json"\n'
        f'wrk.headers["Authorization"] = "Bearer {keys["portal"]}"\n'
    )
    return plain


def wrk(url: str, seconds: int, script: Path | None) -> dict[str, float]:
    cmd = ["wrk", "-t2", "-c16", f"-d{seconds}s", "--latency"]
    if script is not None:
        cmd += ["-s", str(script)]
    out = subprocess.run(cmd + [url], capture_output=True, text=True, timeout=seconds + 60).stdout
    rps = float(re.search(r"Requests/sec:\s+([\d.]+)", out).group(1))  # type: ignore[union-attr]

    def ms(label: str) -> float:
        m = re.search(rf"{label}%\s+([\d.]+)(us|ms|s)\b", out)
        assert m, out
        value, unit = float(m.group(1)), m.group(2)
        return value / 1000 if unit == "us" else value * 1000 if unit == "s" else value

    non2xx = re.search(r"Non-2xx or 3xx responses: (\d+)", out)
    return {"rps": rps, "p50_ms": ms("50"), "p99_ms": ms("99"), "non_2xx": float(non2xx.group(1)) if non2xx else 0.0}


def bench_singles(server: Server, keys: dict[str, str], seconds: int, workdir: Path) -> dict[str, dict[str, float]]:
    plain = single_script(workdir, keys)
    keyed = workdir / "single_keyed.lua"
    keyed.write_text(plain.read_text() + (
        # Each wrk thread has its own Lua state: give each its own id so keys never collide.
        "local threads = 0\n"
        "function setup(thread) thread:set('tid', threads); threads = threads + 1 end\n"
        "local counter = 0\n"
        "request = function()\n"
        "  counter = counter + 1\n"
        "  wrk.headers['Idempotency-Key'] = string.format('\"bench-%s-%d-%d\"', tid, os.time(), counter)\n"
        "  return wrk.format()\n"
        "end\n"
    ))
    url = f"{server.base}/v1/plans/{PLAN}/allocations"
    wrk(url, 2, plain)  # warm-up, not reported: first requests load keys and the mix
    return {
        "floor_livez": wrk(f"{server.base}/livez", seconds, None),
        "allocations": wrk(url, seconds, plain),
        "allocations_with_idempotency_key": wrk(url, seconds, keyed),
    }


def run(label: str, database_url: str, workdir: Path, args: argparse.Namespace) -> dict[str, Any]:
    server = Server(database_url, workdir)
    try:
        keys = seed(server)
        result: dict[str, Any] = {"store": label}
        # Singles first: after a 280,000-row batch SQLite checkpoints a WAL of ~250 MB in the
        # background for some seconds, which is not the steady state the singles target is about.
        if not shutil.which("wrk"):
            result["singles"] = "wrk not installed (apt-get install wrk)"
        elif args.seconds and not args.kinds_only:
            result["singles"] = bench_singles(server, keys, args.seconds, workdir)
        if args.members and not args.kinds_only:
            result["batch"] = bench_batch(server, keys, database_url, args.members)
            if shutil.which("wrk") and args.seconds:
                result["singles_during_batch"] = bench_singles_during_batch(
                    server, keys, args.members, result["batch"]["seconds"], workdir
                )
        if args.members and (args.kinds or args.kinds_only):
            result["member_kinds"] = bench_member_kinds(server, keys, args.members)
        return result
    finally:
        server.stop()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--members", type=int, default=300_000, help="batch size (0 skips the batch); 300,000 is the batch limit")
    parser.add_argument("--seconds", type=int, default=10, help="each wrk run (0 skips single allocations)")
    parser.add_argument("--postgres", default=None, help="admin URL, e.g. postgresql+psycopg://postgres@127.0.0.1:5432/postgres")
    parser.add_argument("--quick", action="store_true", help="20,000 members, 3 s per wrk run")
    parser.add_argument("--kinds", action="store_true", help="also glide-path + income members against risk-aversion members")
    parser.add_argument("--kinds-only", action="store_true", help="only that comparison")
    parser.add_argument("--skip-sqlite", action="store_true", help="only the PostgreSQL run (with --postgres)")
    args = parser.parse_args()
    if args.quick:
        args.members, args.seconds = 20_000, 3
    results = []
    with tempfile.TemporaryDirectory(prefix="mixline-bench-") as tmp:
        workdir = Path(tmp)
        if not args.skip_sqlite:
            results.append(run("sqlite", f"sqlite:///{workdir}/bench.db", workdir, args))
        if args.postgres:
            import psycopg
            from sqlalchemy.engine import make_url

            name = f"mixline_bench_{os.getpid()}"
            admin = make_url(args.postgres).set(drivername="postgresql").render_as_string(hide_password=False)
            with psycopg.connect(admin, autocommit=True) as c:
                c.execute(f'CREATE DATABASE "{name}"')
            try:
                results.append(run("postgresql", make_url(args.postgres).set(database=name).render_as_string(hide_password=False), workdir, args))
            finally:
                with psycopg.connect(admin, autocommit=True) as c:
                    c.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')
    for r in results:
        print(f"\n== {r['store']} ==")
        s = r.get("singles")
        if isinstance(s, dict):
            for name, f in s.items():
                print(f"  {name:34s} {f['rps']:8.0f} req/s  p50 {f['p50_ms']:6.2f} ms  p99 {f['p99_ms']:6.2f} ms  non-2xx {f['non_2xx']:.0f}")
            ratio = s["allocations"]["rps"] / s["floor_livez"]["rps"]
            print(f"  allocations / trivial-endpoint floor: {ratio:.2f}  (target >= 2,500 req/s, p99 <= 15 ms)")
        b = r.get("batch")
        if b:
            print(f"  batch {b['members']:,} members ({b['body_mb']:.1f} MB): {b['seconds']:.3f} s end to end; "
                  f"floor {b['floor']:.3f} s (parse {b['floor_parse']:.3f} + raw insert {b['floor_insert']:.3f}); "
                  f"ratio {b['ratio']:.2f} (target <= 1.5); peak RSS: server {b['peak_rss_mb']:.0f} MB, batch process "
                  f"{b['batch_process_peak_rss_mb']:.0f} MB (target < 1536 each); answer {b['answer_mb']:.0f} MB")
        d = r.get("singles_during_batch")
        if d:
            print(f"  singles during the batch ({d['batch_seconds']:.2f} s): {d['rps']:.0f} req/s  p50 {d['p50_ms']:.2f} ms  "
                  f"p99 {d['p99_ms']:.2f} ms  non-2xx {d['non_2xx']:.0f}  (target p99 <= 25 ms)")
        k = r.get("member_kinds")
        if k:
            best = {name: min(v) for name, v in k["seconds"].items()}
            print(f"  {k['members']:,} glide-path members with income: best {best['glide_path_income']:.3f} s; "
                  f"{k['members']:,} risk-aversion members: best {best['risk_aversion']:.3f} s; "
                  f"ratio {k['ratio_of_best']:.2f} (target <= 1.3); peak RSS: server {k['peak_rss_mb']:.0f} MB, "
                  f"batch process {k['batch_process_peak_rss_mb']:.0f} MB")
    print("\n" + json.dumps(results, indent=2))


if __name__ == "__main__":
    main()
