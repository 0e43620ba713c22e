"""The command line on a real SQLite file: `mixline migrate`, `mixline audit verify` (against
signed heads too), `mixline audit head`, and what `mixline demo` refuses."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from sqlalchemy import text

from service.cli import DEMO_DATABASE_URL, main
from service.store import Database, LogBatch, insert_plan
from service.store.chain import link_hash


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


def _logged_plan(url: str, plan_id: str, rows: int) -> None:
    db = Database(url)
    db.upgrade()
    db.start()
    try:
        with db.writing() as s:
            insert_plan(s, plan_id=plan_id, name="CLI plan", currency="USD", policy={})
        ids = [f"al_{plan_id}_{i}" for i in range(rows)]
        db.writer.append(LogBatch(plan_id, "v1", "2026-12-01T00:00:00.000000Z", ids, ["m"] * rows, [f'{{"n":{i}}}' for i in range(rows)]))
    finally:
        db.close()


def _rebuild_from(url: str, plan_id: str, seq: int, body: str) -> None:
    """What someone with write access to the database could do: change row ``seq`` and
    recompute every hash after it, and the head, so that the chain verifies again."""
    db = Database(url)
    try:
        with db.writing() as s:
            rows = s.execute(text("SELECT seq, allocation_id, member_id, mix_version, created_at, body, prev_hash "
                                  "FROM allocations WHERE plan_id = :p ORDER BY seq"), {"p": plan_id}).all()
            prev = None
            for r in rows:
                if r.seq < seq:
                    continue
                if prev is None:
                    prev = r.prev_hash
                new_body = body if r.seq == seq else r.body
                h = link_hash(prev, plan_id, r.seq, r.allocation_id, r.member_id, r.mix_version, r.created_at, new_body)
                s.execute(text("UPDATE allocations SET body = :b, prev_hash = :ph, row_hash = :h WHERE plan_id = :p AND seq = :s"),
                          {"b": new_body, "ph": prev, "h": h, "p": plan_id, "s": r.seq})
                prev = h
            s.execute(text("UPDATE chain_heads SET last_hash = :h WHERE plan_id = :p"), {"h": prev, "p": plan_id})
    finally:
        db.close()


def test_audit_verify_of_an_unknown_plan_fails(tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    url = f"sqlite:///{tmp_path / 'cli.db'}"
    monkeypatch.setenv("MIXLINE_DATABASE_URL", url)
    _logged_plan(url, "known", 1)
    assert main(["audit", "verify", "--plan", "unknown"]) == 2
    assert "no such plan" in capsys.readouterr().err


def test_audit_verify_against_a_signed_head(tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    url = f"sqlite:///{tmp_path / 'cli.db'}"
    key_file = tmp_path / "signing.pem"
    key = Ed25519PrivateKey.generate()
    key_file.write_bytes(key.private_bytes(serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8, serialization.NoEncryption()))
    monkeypatch.setenv("MIXLINE_DATABASE_URL", url)
    monkeypatch.setenv("MIXLINE_SIGNING_KEY_FILE", str(key_file))
    _logged_plan(url, "p1", 5)
    capsys.readouterr()
    assert main(["audit", "head", "--plan", "p1"]) == 0
    head_file = tmp_path / "head.json"
    head_file.write_text(capsys.readouterr().out)
    head = json.loads(head_file.read_text())
    assert head["plan_id"] == "p1" and head["seq"] == 5 and head["signed_at"].endswith("Z")
    assert main(["audit", "verify", "--head", str(head_file)]) == 0
    assert "extends the head" in capsys.readouterr().out

    # The public key alone (as GET /v1/audit/signing-key gives it) checks it too.
    public_file = tmp_path / "public.pem"
    public_file.write_bytes(key.public_key().public_bytes(serialization.Encoding.PEM, serialization.PublicFormat.SubjectPublicKeyInfo))
    monkeypatch.delenv("MIXLINE_SIGNING_KEY_FILE")
    assert main(["audit", "verify", "--head", str(head_file), "--public-key", str(public_file)]) == 0
    assert main(["audit", "verify", "--head", str(head_file)]) == 2  # no key to check the signature with
    capsys.readouterr()

    # A head changed after signing, or signed by another key, is refused.
    forged = tmp_path / "forged.json"
    forged.write_text(json.dumps(head | {"seq": 4}))
    assert main(["audit", "verify", "--head", str(forged), "--public-key", str(public_file)]) == 1
    other = tmp_path / "other.pem"
    other.write_bytes(Ed25519PrivateKey.generate().public_key().public_bytes(serialization.Encoding.PEM, serialization.PublicFormat.SubjectPublicKeyInfo))
    assert main(["audit", "verify", "--head", str(head_file), "--public-key", str(other)]) == 1
    assert "BAD SIGNATURE" in capsys.readouterr().out

    # Rebuilt from row 3 on: the chain verifies by itself, but no longer extends the signed head.
    _rebuild_from(url, "p1", 3, '{"n":30}')
    assert main(["audit", "verify", "--plan", "p1"]) == 0
    capsys.readouterr()
    assert main(["audit", "verify", "--head", str(head_file), "--public-key", str(public_file)]) == 1
    assert "rebuilt" in capsys.readouterr().out


def test_audit_verify_finds_a_chain_cut_back(tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    url = f"sqlite:///{tmp_path / 'cli.db'}"
    key_file = tmp_path / "signing.pem"
    key_file.write_bytes(Ed25519PrivateKey.generate().private_bytes(serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8, serialization.NoEncryption()))
    monkeypatch.setenv("MIXLINE_DATABASE_URL", url)
    monkeypatch.setenv("MIXLINE_SIGNING_KEY_FILE", str(key_file))
    _logged_plan(url, "p2", 4)
    capsys.readouterr()
    assert main(["audit", "head", "--plan", "p2"]) == 0
    head_file = tmp_path / "head.json"
    head_file.write_text(capsys.readouterr().out)
    db = Database(url)
    with db.writing() as s:  # the last two rows removed and the head moved back to row 2
        s.execute(text("DELETE FROM allocations WHERE plan_id = 'p2' AND seq > 2"))
        s.execute(text("UPDATE chain_heads SET last_seq = 2, last_hash = (SELECT row_hash FROM allocations "
                       "WHERE plan_id = 'p2' AND seq = 2) WHERE plan_id = 'p2'"))
    db.close()
    assert main(["audit", "verify", "--plan", "p2"]) == 0  # consistent by itself
    capsys.readouterr()
    assert main(["audit", "verify", "--head", str(head_file)]) == 1
    assert "cut back" in capsys.readouterr().out


def test_demo_refuses_anything_but_a_local_sqlite_file_of_its_own(tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    served: list[str] = []
    monkeypatch.setattr("service.cli._serve", lambda settings, host, port, migrate: served.append(settings.database_url))
    monkeypatch.setenv("MIXLINE_DATABASE_URL", "postgresql+psycopg://postgres@127.0.0.1:5432/postgres")
    assert main(["demo"]) == 2 and "local SQLite file" in capsys.readouterr().err
    url = f"sqlite:///{tmp_path / 'prod.db'}"
    monkeypatch.setenv("MIXLINE_DATABASE_URL", url)
    monkeypatch.setenv("MIXLINE_ENVIRONMENT", "production")
    monkeypatch.setenv("MIXLINE_SIGNING_KEY_FILE", str(tmp_path / "unused.pem"))
    assert main(["demo"]) == 2 and "production" in capsys.readouterr().err
    monkeypatch.delenv("MIXLINE_ENVIRONMENT")
    monkeypatch.delenv("MIXLINE_SIGNING_KEY_FILE")
    _logged_plan(url, "real-plan", 1)
    assert main(["demo"]) == 2 and "other plans" in capsys.readouterr().err
    db = Database(url)
    with db.reading() as s:
        assert s.execute(text("SELECT count(*) FROM api_keys")).scalar_one() == 0  # nothing seeded
    db.close()
    assert served == []
    # Its own file (the default when MIXLINE_DATABASE_URL is unset): seeded, with keys that expire.
    monkeypatch.delenv("MIXLINE_DATABASE_URL")
    monkeypatch.chdir(tmp_path)
    assert main(["demo"]) == 0 and served == [DEMO_DATABASE_URL]
    db = Database(DEMO_DATABASE_URL)
    with db.reading() as s:
        keys = s.execute(text("SELECT role, expires_at FROM api_keys ORDER BY role")).all()
    db.close()
    assert [k.role for k in keys] == ["committee", "operator", "portal"]
    assert all(k.expires_at is not None for k in keys)
