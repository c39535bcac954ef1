"""Attacks through a web browser that holds a client certificate (an operator's, for the
dashboard, or an SAE's): a page of another site makes the browser send requests to the
node, and the browser presents the certificate. The headers below are the ones Chromium
sends for such requests (Fetch Standard and the Fetch Metadata Request Headers draft:
``Origin`` on cross-origin requests other than no-cors GETs, ``Sec-Fetch-Site``,
``Sec-Fetch-Mode``, ``Sec-Fetch-Dest`` on every request; from memory, checked in
Chromium by tests/e2e/test_dashboard_browser.py)."""

from __future__ import annotations

import pytest

import relaynet
from helpers import ledger_events, snapshot

EVIL = "https://evil.example"

#: An <img src="..."> on a page of another site: a no-cors GET, no Origin header.
IMAGE = {"sec-fetch-site": "cross-site", "sec-fetch-mode": "no-cors", "sec-fetch-dest": "image"}
#: A <form method=post enctype=text/plain> on a page of another site.
FORM = {
    "origin": EVIL,
    "sec-fetch-site": "cross-site",
    "sec-fetch-mode": "navigate",
    "sec-fetch-dest": "document",
    "content-type": "text/plain",
}
#: fetch(url, {credentials: "include"}) from a page of another site.
FETCH = {"origin": EVIL, "sec-fetch-site": "cross-site", "sec-fetch-mode": "cors"}

#: The page is drawn from the routes, the browser rules run before any route: what is
#: checked here does not depend on the database.
pytestmark = pytest.mark.one_backend


@pytest.fixture
def net(make_node, db_factory) -> relaynet.RelayNet:
    return relaynet.with_ready_key(make_node, db_factory)


def test_a_foreign_page_cannot_take_key_with_an_saes_browser(net, api) -> None:
    """An <img> pointing at Get key would hand key out (and spend it) for the SAE whose
    certificate the browser holds; the node refuses it, as ETSI GS QKD 014 refuses: 401."""
    a1 = api(net.a)("sae-a1")
    before = snapshot(net.a.ctx)["key_alloc"]
    r = a1.get("/api/v1/keys/sae-b1/enc_keys?number=2", headers=IMAGE)
    assert r.status_code == 401 and r.json() == {"message": "unauthorized"}, r.text
    assert snapshot(net.a.ctx)["key_alloc"] == before
    assert ledger_events(net.a.ctx)[-1] == "auth.refused"
    # The same SAE without a browser's marks gets its key.
    assert a1.get("/api/v1/keys/sae-b1/enc_keys?number=2").status_code == 200


def test_a_foreign_page_cannot_provision_with_an_operators_browser(net, api) -> None:
    ops = api(net.a)("ops-ada")
    body = '{"principal_id": "sae-evil", "role": "sae", "cert_subject": "x"}'
    before = snapshot(net.a.ctx)["principal"]
    for method, path in (
        ("POST", "/api/v1/registry/principals"),
        ("DELETE", "/api/v1/registry/principals/sae-a1"),
        ("POST", "/api/v1/pairs/pair-ab/hold/release"),
    ):
        r = ops.request(method, path, content=body, headers=FORM)
        assert r.status_code == 403, (method, path, r.status_code, r.text)
        assert "cross-origin" in r.json()["message"]
    assert snapshot(net.a.ctx)["principal"] == before


def test_a_foreign_page_cannot_read_the_dashboard(net, api) -> None:
    r = api(net.a)("ops-ada").get("/api/v1/dashboard/overview", headers=FETCH)
    assert r.status_code == 403
    assert "access-control-allow-origin" not in r.headers


def test_the_page_of_a_registered_node_reads_the_dashboard_and_nothing_else(net, api) -> None:
    """station-a's registry holds relay-1 with a URL, whose origin may read station-a's
    dashboard JSON (CORS with credentials), and only that."""
    ops = api(net.a)("ops-ada")
    url = "https://127.0.0.1:8440"
    assert ops.patch("/api/v1/registry/nodes/relay-1", json={"url": url + "/"}).is_success
    origin = url
    headers = {"origin": origin, "sec-fetch-site": "same-site", "sec-fetch-mode": "cors"}
    r = ops.get("/api/v1/dashboard/overview", headers=headers)
    assert r.status_code == 200, r.text
    # Fetch Standard, section 3.2.5: the exact origin, credentials allowed, Vary: Origin.
    assert r.headers["access-control-allow-origin"] == origin
    assert r.headers["access-control-allow-credentials"] == "true"
    assert "origin" in r.headers["vary"].lower()
    for path in ("/api/v1/links/pools", "/api/v1/registry/principals"):
        r = ops.get(path, headers=headers)
        assert r.status_code == 403 and "access-control-allow-origin" not in r.headers, path
    # A role the dashboard does not admit is refused by the route, and the page of the
    # registered origin may read that answer.
    r = api(net.a)("aud-ben").get("/api/v1/dashboard/overview", headers=headers)
    assert r.status_code == 403 and r.headers["access-control-allow-origin"] == origin


def test_a_navigation_from_another_site_opens_only_the_dashboard_pages(net, api) -> None:
    nav = {"sec-fetch-site": "cross-site", "sec-fetch-mode": "navigate"}
    ops = api(net.a)("ops-ada")
    for page in ("/dashboard", "/dashboard/network"):
        assert ops.get(page, headers=nav).status_code == 200, page
    assert ops.get("/api/v1/registry/principals", headers=nav).status_code == 403


def test_the_nodes_own_pages_and_non_browsers_pass(net, api) -> None:
    ops = api(net.a)("ops-ada")
    own = {"sec-fetch-site": "same-origin", "sec-fetch-mode": "cors"}
    assert ops.get("/api/v1/dashboard/overview", headers=own).status_code == 200
    assert ops.get("/api/v1/links/pools", headers=own).status_code == 200
    post = {**own, "origin": "https://testserver"}
    r = ops.patch(
        "/api/v1/registry/principals/sae-a1", json={"description": "desk 4"}, headers=post
    )
    assert r.status_code == 200, r.text
