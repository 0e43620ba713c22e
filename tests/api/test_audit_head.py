"""Signed audit heads over HTTP, checked with the published public key and by the command line
(both databases)."""

from __future__ import annotations

import base64
import json
from pathlib import Path

import pytest
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey
from sqlalchemy import text

from service.cli import main
from service.demo import DEMO_ALLOCATION
from service.store.signed_heads import signed_text

from .conftest import World

pytestmark = pytest.mark.anyio


async def test_head_is_signed_and_checks_against_the_chain(
    world: World, new_plan_id: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    keys = await world.plan(new_plan_id)
    await world.publish(new_plan_id, keys)
    url = f"/v1/plans/{new_plan_id}"
    empty = (await world.client.get(f"{url}/audit/head", headers=keys["committee"])).json()
    assert empty["seq"] == 0 and empty["hash"] == "0" * 64
    for i in range(3):
        r = await world.client.post(f"{url}/allocations", json=DEMO_ALLOCATION | {"member_id": f"m-{i}"}, headers=keys["portal"])
        assert r.status_code == 201
    r = await world.client.get(f"{url}/audit/head", headers=keys["committee"])
    assert r.status_code == 200
    head = r.json()
    assert set(head) == {"plan_id", "seq", "hash", "signed_at", "key_id", "signature"}
    verified = (await world.client.get(f"{url}/audit/verify", headers=keys["committee"])).json()
    assert head["plan_id"] == new_plan_id and head["seq"] == 3 and head["hash"] == verified["head_hash"]
    assert head["signed_at"].endswith("Z")

    published = await world.client.get("/v1/audit/signing-key", headers=keys["portal"])
    assert published.status_code == 200
    key = published.json()
    assert key["algorithm"] == "Ed25519" and key["key_id"] == head["key_id"] and key["ephemeral"] is True
    # Checked with the raw public key alone (cryptography's Ed25519, RFC 8032), over the documented text.
    public = Ed25519PublicKey.from_public_bytes(base64.b64decode(key["public_key"]))
    public.verify(base64.b64decode(head["signature"]), signed_text(head["plan_id"], head["seq"], head["hash"], head["signed_at"]))

    assert (await world.client.get("/v1/audit/signing-key")).status_code == 401
    assert (await world.client.get(f"{url}/audit/head", headers=keys["portal"])).status_code == 403
    other = await world.plan(new_plan_id + "-o")
    assert (await world.client.get(f"{url}/audit/head", headers=other["committee"])).status_code == 404

    # The command line checks the database against the exported head with the published key.
    head_file, key_file = tmp_path / "head.json", tmp_path / "signing-key.pem"
    head_file.write_text(json.dumps(head))
    key_file.write_text(key["public_key_pem"])
    monkeypatch.setenv("MIXLINE_DATABASE_URL", world.database.url)
    capsys.readouterr()
    assert main(["audit", "verify", "--head", str(head_file), "--public-key", str(key_file)]) == 0
    more = await world.client.post(f"{url}/allocations", json=DEMO_ALLOCATION, headers=keys["portal"])
    assert more.status_code == 201
    assert main(["audit", "verify", "--head", str(head_file), "--public-key", str(key_file)]) == 0  # grown: fine
    with world.database.writing() as s:  # cut back to two rows
        s.execute(text("DELETE FROM allocations WHERE plan_id = :p AND seq > 2"), {"p": new_plan_id})
        s.execute(text("UPDATE chain_heads SET last_seq = 2, last_hash = (SELECT row_hash FROM allocations "
                       "WHERE plan_id = :p AND seq = 2) WHERE plan_id = :p"), {"p": new_plan_id})
    capsys.readouterr()
    assert main(["audit", "verify", "--head", str(head_file), "--public-key", str(key_file)]) == 1
    assert "cut back" in capsys.readouterr().out
