"""/docs is Swagger UI served from the service itself: no script, style or font from elsewhere."""

from __future__ import annotations

import os
import re
import shutil
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import httpx
import pytest

from .conftest import World

pytestmark = pytest.mark.anyio


async def test_docs_page_loads_only_its_own_assets(world: World) -> None:
    r = await world.client.get("/docs")
    assert r.status_code == 200
    assert r.headers["content-type"].startswith("text/html")
    urls = re.findall(r'(?:src|href)="([^"]+)"', r.text)
    assert len(urls) == 3, urls  # the script, the styles and the icon
    assert all(u.startswith("/docs/assets/") for u in urls), urls
    assert "http://" not in r.text and "https://" not in r.text
    assert '"validatorUrl": null' in r.text  # no badge fetched from a public validator
    kinds = {}
    for url in urls:
        asset = await world.client.get(url)
        assert asset.status_code == 200, url
        assert len(asset.content) > 500, url
        kinds[url.rsplit("/", 1)[1]] = asset.headers["content-type"].split(";")[0]
    assert kinds == {"swagger-ui-bundle.js": "text/javascript", "swagger-ui.css": "text/css", "favicon-32x32.png": "image/png"}


async def test_only_the_named_assets_are_served(world: World) -> None:
    for name in ("index.html", "swagger-initializer.js", "..%2F__init__.py", "nothing.js"):
        r = await world.client.get(f"/docs/assets/{name}")
        assert r.status_code == 404, name
        assert r.headers["content-type"].startswith("application/problem+json")
    assert (await world.client.get("/redoc")).status_code == 404  # its page would load a CDN script


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@pytest.mark.slow
@pytest.mark.skipif(shutil.which("chromium") is None, reason="headless Chromium is absent (Debian package `chromium`)")
def test_docs_render_in_a_browser_that_reaches_nothing_else(tmp_path: Path) -> None:
    """A real browser, every host but the service unresolvable: the operations still render."""
    port = _free_port()
    env = {**os.environ, "MIXLINE_DATABASE_URL": f"sqlite:///{tmp_path / 'docs.db'}"}
    server = subprocess.Popen(
        [sys.executable, "-m", "service.cli", "serve", "--port", str(port)],
        env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
    )
    try:
        deadline = time.monotonic() + 30
        while True:
            try:
                if httpx.get(f"http://127.0.0.1:{port}/livez", timeout=1).status_code == 200:
                    break
            except httpx.TransportError:
                pass
            assert time.monotonic() < deadline, "the server did not start"
            assert server.poll() is None, "the server exited"
            time.sleep(0.2)
        with tempfile.TemporaryDirectory() as profile:
            result = subprocess.run(
                [
                    "chromium", "--headless", "--no-sandbox", "--disable-gpu",
                    "--disable-background-networking", "--disable-component-update", "--disable-sync",
                    "--no-first-run", f"--user-data-dir={profile}",
                    "--host-resolver-rules=MAP * ~NOTFOUND, EXCLUDE 127.0.0.1",
                    "--virtual-time-budget=10000", "--dump-dom", f"http://127.0.0.1:{port}/docs",
                ],
                capture_output=True, text=True, timeout=120, check=False,
            )
        dom = result.stdout
        assert "opblock-summary-path" in dom, result.stderr[-2000:]  # Swagger UI drew operations
        assert "/v1/plans/{plan_id}/allocations" in dom
        assert "/readyz" in dom
    finally:
        server.terminate()
        server.wait(timeout=30)
