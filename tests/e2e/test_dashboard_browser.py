"""The dashboard in a real browser: Debian's Chromium, driven by Playwright, opens the
network page of a running demo network's relay with the demo operator's client
certificate, as an operator would. The page asks every node itself over mutual TLS;
Playwright's own TLS layer (which presents the client certificates) checks each node's
certificate against the demo CA, given to it as ``NODE_EXTRA_CA_CERTS``.

Two screenshots some seconds apart are kept in ``build/artifacts/dashboard/``, beside one
of a station's own page. The test checks the map (the platform, three stations, three
links), that live figures changed between the two screenshots, that no script failed,
and that no key taken with the SDK during the test (its Base64 value, hex or key ID)
is anywhere in the pages.

Without /usr/bin/chromium the test is skipped, unless ``CI`` is set (then it fails).
"""

from __future__ import annotations

import base64
import contextlib
import json
import os
import signal
import ssl
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest

from keystrata.demo import scenario
from keystrata_client import KeyClient, KeystrataClientError, TlsIdentity

CHROMIUM = Path("/usr/bin/chromium")
ARTIFACTS = Path(__file__).resolve().parents[2] / "build" / "artifacts" / "dashboard"
#: Seconds between the two screenshots: the page reads every node each 5 s.
BETWEEN = 8.0


@pytest.fixture
def sync_api() -> Any:
    """Playwright's sync API, once Debian's Chromium is known to be there (asked before a
    demo is started for nothing)."""
    if not CHROMIUM.exists():
        if os.environ.get("CI"):
            pytest.fail(f"{CHROMIUM} is missing (Debian package chromium); CI must run this")
        pytest.skip(f"{CHROMIUM} is missing: install Debian's chromium package to run this")
    try:
        from playwright import sync_api
    except ImportError:
        if os.environ.get("CI"):
            raise
        pytest.skip("playwright is not installed (pip install -e .[dev])")
    return sync_api


def _wait_for(what: str, check: Any, timeout: float, proc: subprocess.Popen[str]) -> Any:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        assert proc.poll() is None, f"the demo exited while waiting for {what}"
        try:
            found = check()
        except (OSError, ValueError, httpx.HTTPError, KeystrataClientError):
            found = None
        if found:
            return found
        time.sleep(0.5)
    raise AssertionError(f"timed out waiting for {what}")


def _children(pid: int) -> list[int]:
    out = []
    for task in Path(f"/proc/{pid}/task").glob("*"):
        try:
            out += [int(p) for p in (task / "children").read_text().split()]
        except OSError:
            continue
    return out


@pytest.fixture
def demo(tmp_path: Path) -> Iterator[tuple[Path, dict[str, Any], subprocess.Popen[str]]]:
    """A running demo network whose nodes sample their history every second."""
    workdir = tmp_path / "demo"
    log = (tmp_path / "demo.log").open("w")
    env = {**os.environ, "KEYSTRATA_DASHBOARD__SAMPLE_SECONDS": "1"}
    proc = subprocess.Popen(
        [sys.executable, "-m", "keystrata", "demo", "--duration", "240", "--workdir", str(workdir)],
        stdout=log,
        stderr=subprocess.STDOUT,
        text=True,
        env=env,
    )
    try:
        manifest = _wait_for(
            "demo.json", lambda: json.loads((workdir / "demo.json").read_text()), 90, proc
        )
        yield workdir, manifest, proc
    finally:
        # A second SIGTERM stops the demo and its nodes at once (the first would drain
        # and audit, which the demo tests check); if it does not, it and they are killed
        # by process ID (read while the demo lives, so the IDs are still its children's).
        if proc.poll() is None:
            proc.send_signal(signal.SIGTERM)
            time.sleep(0.5)
            if proc.poll() is None:
                proc.send_signal(signal.SIGTERM)
            try:
                proc.wait(timeout=120)
            except subprocess.TimeoutExpired:
                for pid in _children(proc.pid):
                    with contextlib.suppress(ProcessLookupError):
                        os.kill(pid, signal.SIGKILL)
                proc.kill()
                proc.wait()
        log.close()


def _identity(workdir: Path, manifest: dict[str, Any], name: str) -> TlsIdentity:
    (p,) = [p for p in manifest["principals"] if p["id"] == name]
    return TlsIdentity(
        ca=workdir / manifest["ca"], cert=workdir / p["cert"], key=workdir / p["key"]
    )


def _take_keys(workdir: Path, manifest: dict[str, Any], proc: Any) -> set[str]:
    """Keys of pair karsvik-tollmere taken as an SAE would, with the SDK: Get key at
    Karsvik, Get key with key IDs at Tollmere. Returns every form a key could show in."""
    url = {n["id"]: n["url"] for n in manifest["nodes"]}
    master, slave = scenario.station("karsvik").saes[0], scenario.station("tollmere").saes[0]
    with KeyClient(url["karsvik"], _identity(workdir, manifest, master)) as client:
        taken = _wait_for(
            "ready key at karsvik", lambda: client.get_keys(slave, number=3, size=256), 90, proc
        )
    with KeyClient(url["tollmere"], _identity(workdir, manifest, slave)) as client:
        ids = [k.key_id for k in taken.keys]
        fetched = _wait_for(
            "the keys at tollmere", lambda: client.get_keys_with_ids(master, ids), 60, proc
        )
    assert {(k.key_id, k.key) for k in fetched.keys} == {(k.key_id, k.key) for k in taken.keys}
    out: set[str] = set()
    for k in taken.keys:
        b64 = base64.b64encode(k.key).decode()
        out |= {b64, b64.rstrip("="), k.key.hex(), k.key_id, k.key_id.replace("-", "")}
    return out


def _live(page: Any) -> dict[str, str]:
    figures = page.eval_on_selector_all(
        "[data-live]", "els => els.map(e => [e.dataset.live, e.textContent])"
    )
    return dict(figures)


def test_the_network_page_of_a_running_demo(sync_api, demo, monkeypatch) -> None:
    workdir, manifest, proc = demo
    ca = workdir / manifest["ca"]
    operator = next(p for p in manifest["principals"] if p["role"] == "operator")
    relay = next(n for n in manifest["nodes"] if n["role"] == "relay")
    stations = [s.node_id for s in scenario.STATIONS]
    links = [s.link_id for s in scenario.STATIONS]
    ident = _identity(workdir, manifest, operator["id"])

    tls = ssl.create_default_context(cafile=str(ca))
    tls.load_cert_chain(str(ident.cert), str(ident.key))

    def provisioned() -> bool:
        with httpx.Client(verify=tls) as c:
            network = c.get(relay["url"] + "/api/v1/dashboard/network").json()
        return len(network["links"]) == 3 and len(network["nodes"]) == 4

    _wait_for("the demo's registry at the relay", provisioned, 90, proc)
    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    monkeypatch.setenv("NODE_EXTRA_CA_CERTS", str(ca))
    certs = [
        {
            "origin": n["url"],
            "certPath": str(workdir / operator["cert"]),
            "keyPath": str(workdir / operator["key"]),
        }
        for n in manifest["nodes"]
    ]
    errors: list[str] = []
    with sync_api.sync_playwright() as p:
        browser = p.chromium.launch(executable_path=str(CHROMIUM), headless=True)
        try:
            context = browser.new_context(
                client_certificates=certs,
                ignore_https_errors=False,
                viewport={"width": 1400, "height": 1000},
            )
            page = context.new_page()
            page.on("pageerror", lambda exc: errors.append(str(exc)))
            answer = page.goto(relay["url"] + "/dashboard/network")
            assert answer is not None and answer.status == 200
            # Every node answered the page (each over its own mutual TLS).
            page.wait_for_function(
                "() => document.querySelectorAll('#nodes td.good').length === 4", timeout=60_000
            )
            page.wait_for_selector("#plots figure", timeout=60_000)
            secrets = _take_keys(workdir, manifest, proc)
            # Some history, and a refresh that includes the keys just taken.
            page.wait_for_timeout(10_000)
            page.screenshot(path=str(ARTIFACTS / "network-1.png"), full_page=True)
            first = _live(page)
            page.wait_for_timeout(BETWEEN * 1000)
            page.screenshot(path=str(ARTIFACTS / "network-2.png"), full_page=True)
            second = _live(page)

            platform = page.locator("#map [data-kind=platform]")
            assert platform.count() == 1 and platform.get_attribute("data-id") == scenario.RELAY
            shown = page.locator("#map [data-kind=station]")
            assert sorted(shown.nth(i).get_attribute("data-id") for i in range(3)) == sorted(
                stations
            )
            assert shown.count() == 3
            drawn = page.locator("#map [data-kind=link]")
            assert drawn.count() == 3
            assert sorted(drawn.nth(i).get_attribute("data-id") for i in range(3)) == sorted(links)
            for i in range(3):
                assert drawn.nth(i).get_attribute("data-state") != "unknown"  # the relay answered
            assert page.locator("#plots figure").count() >= 3 * len(links)

            # Rows may appear (a pair's first delivery), never go.
            assert set(first) <= set(second) and len(first) >= 20
            changed = [k for k in first if first[k] != second[k]]
            assert changed, "no live figure changed between the two screenshots"
            assert any(k.startswith(("pool-", "rate-", "map-rate-")) for k in changed), changed

            station_page = context.new_page()
            station_page.on("pageerror", lambda exc: errors.append(str(exc)))
            karsvik = next(n for n in manifest["nodes"] if n["id"] == "karsvik")
            station_page.goto(karsvik["url"] + "/dashboard")
            station_page.wait_for_selector("#plots figure", timeout=60_000)
            station_page.screenshot(path=str(ARTIFACTS / "station-karsvik.png"), full_page=True)

            for shown_page in (page, station_page):
                text = shown_page.content() + shown_page.inner_text("body")
                leaked = [s for s in secrets if s in text]
                assert not leaked, f"{len(leaked)} key strings in {shown_page.url}"
        finally:
            browser.close()
    assert errors == []
    for name in ("network-1.png", "network-2.png", "station-karsvik.png"):
        assert (ARTIFACTS / name).stat().st_size > 10_000, name
