"""The command line: `mixline migrate` and `mixline audit verify` on a real SQLite file."""

from __future__ import annotations

from pathlib import Path

import pytest
from sqlalchemy import text

from service.cli import main
from service.store import Database, LogBatch, insert_plan


def test_audit_verify_names_the_first_bad_row(tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    url = f"sqlite:///{tmp_path / 'cli.db'}"
    monkeypatch.setenv("MIXLINE_DATABASE_URL", url)
    assert main(["migrate"]) == 0
    db = Database(url)
    db.start()
    try:
        with db.writing() as s:
            insert_plan(s, plan_id="cli-plan", name="CLI plan", currency="USD", policy={})
        ids = [f"al_{i}" for i in range(5)]
        db.writer.append(LogBatch("cli-plan", "v1", "2026-12-01T00:00:00.000000Z", ids, ["m"] * 5, [f'{{"n":{i}}}' for i in range(5)]))
    finally:
        db.close()
    capsys.readouterr()
    assert main(["audit", "verify"]) == 0
    assert "cli-plan: ok, 5 rows" in capsys.readouterr().out
    db = Database(url)
    with db.writing() as s:
        s.execute(text("UPDATE allocations SET body = :b WHERE allocation_id = 'al_2'"), {"b": '{"n":99}'})
    db.close()
    assert main(["audit", "verify", "--plan", "cli-plan"]) == 1
    out = capsys.readouterr().out
    assert "BROKEN" in out and "seq 3" in out and "al_2" in out
