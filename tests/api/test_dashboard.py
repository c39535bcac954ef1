"""The operators' dashboard through the API: who may open it, what the overview and the
network answer hold, the history's validation, and that no answer, page or file of the
dashboard carries key material or key IDs."""

from __future__ import annotations

import base64
import dataclasses
import re
from datetime import UTC, datetime, timedelta
from importlib import resources
from typing import Any

import pytest

import relaynet
from helpers import SteppedClock
from keystrata.api.app import route_table
from keystrata.links import pools
from keystrata.node import history
from keystrata.observability.dashboard import origin_of
from keystrata.registry.specs import PrincipalRole

DASHBOARD_ROLES = {PrincipalRole.OPERATOR, PrincipalRole.MONITOR}
PAGES = ["/dashboard", "/dashboard/network"]
ASSETS = ["dashboard.css", "common.js", "node.js", "network.js", "icon.svg"]


_person = relaynet.add_person


@pytest.fixture
def net(make_node, db_factory) -> relaynet.RelayNet:
    """The key delivery tests' network, with the test operator at the relay too and the
    test monitor everywhere."""
    net = relaynet.with_ready_key(make_node, db_factory)
    _person(net.relay, "ops-ada", "operator")
    for node in net.nodes.values():
        _person(node, "mon-cal", "monitor")
    return net


def _admitted(route: Any) -> set[PrincipalRole]:
    roles: set[PrincipalRole] = set()
    for dep in route.dependant.dependencies:
        roles |= set(getattr(dep.call, "roles", frozenset()))
    return roles


def test_the_dashboard_admits_operators_and_monitors_only(station, api) -> None:
    routes = [r for r in route_table() if r.path.startswith(("/dashboard", "/api/v1/dashboard"))]
    paths = {r.path for r in routes}
    assert set(PAGES) | {f"/dashboard/assets/{a}" for a in ASSETS} <= paths
    assert {"/api/v1/dashboard/overview", "/api/v1/dashboard/network"} <= paths
    for route in routes:
        assert route.methods == {"GET"} and _admitted(route) == DASHBOARD_ROLES, route.path
    for name, status in (("ops-ada", 200), ("mon-cal", 200), ("aud-ben", 403), ("sae-a1", 403)):
        for path in [*PAGES, "/api/v1/dashboard/overview"]:
            assert api(station)(name).get(path).status_code == status, (name, path)
    for who in ("stranger", None):
        r = api(station)(who).get("/dashboard")
        # No certificate at all: the same 401, with the hint (api/identity.NO_CERTIFICATE).
        assert r.status_code == 401 and r.json()["message"].startswith("unauthorized")


def test_pages_and_files_load_nothing_from_elsewhere(station, api) -> None:
    ops = api(station)("ops-ada")
    page = ops.get("/dashboard")
    assert page.headers["content-type"].startswith("text/html")
    policy = page.headers["content-security-policy"]
    assert "script-src 'self'" in policy and "frame-ancestors 'none'" in policy
    assert "connect-src 'self';" in policy
    folder = resources.files("keystrata.api") / "dashboard"
    for item in folder.iterdir():
        text = item.read_text(encoding="utf-8")
        # The SVG namespace is a name, not a download.
        urls = set(re.findall(r"\b(?:https?:)?//[\w.-]+", text)) - {"http://www.w3.org"}
        assert not urls, (item.name, urls)
    for name in ASSETS:
        r = ops.get(f"/dashboard/assets/{name}")
        assert r.status_code == 200 and r.content == (folder / name).read_bytes()
    for page_name, path in (("index.html", "/dashboard"), ("network.html", "/dashboard/network")):
        assert ops.get(path).content == (folder / page_name).read_bytes()
        for src in re.findall(r'(?:src|href)="([^"]+)"', (folder / page_name).read_text()):
            assert src.startswith("/dashboard"), src
            assert ops.get(src).status_code == 200, src


def test_the_network_page_may_connect_to_the_registered_nodes(station, api) -> None:
    # The seeded registry gives every other node the URL https://127.0.0.1/<node>.
    r = api(station)("ops-ada").get("/dashboard/network")
    assert "connect-src 'self' https://127.0.0.1;" in r.headers["content-security-policy"]


def test_the_overview_of_a_station(net, api) -> None:
    a1 = api(net.a)("sae-a1")
    assert a1.post("/api/v1/keys/sae-b1/enc_keys", json={"number": 3, "size": 256}).is_success
    o = api(net.a)("mon-cal").get("/api/v1/dashboard/overview").json()
    assert o["node"] == {
        "id": "station-a",
        "role": "station",
        "version": o["node"]["version"],
        "description": "this node",  # node init's own entry
        "position": None,
    }
    (link,) = o["links"]
    (level,) = pools.pool_levels(net.a.ctx)
    assert link["link_id"] == "link-a" and link["bits_available"] == level.bits_available
    assert link["rate_bps"] == pytest.approx(level.rate_bps)
    assert link["qber"] == pytest.approx(0.02)
    assert link["planned_bps"] is None and link["plan_ratio"] is None  # no profile
    (pair,) = o["pairs"]
    assert pair["pair_id"] == relaynet.PAIR and pair["stations"] == ["station-a", "station-b"]
    assert 0 < pair["owned_bits"] <= pair["ready_bits"]
    assert pair["target_bits"] is None  # the relay's figure
    assert pair["demand_bps"] == pytest.approx(
        3 * 256 / net.a.ctx.settings.ingest.rate_window_seconds
    )
    assert pair["time_until_empty_s"] == pytest.approx(pair["owned_bits"] / pair["demand_bps"])
    (delivered,) = o["deliveries"]
    assert delivered["to_masters"] == {"keys": 3, "bits": 768}
    assert o["alerts"] == [
        {"check": k, "note": v, "failing": False} for k, v in o["checks"].items() if v != "ok"
    ]


PLATFORM = {"latitude_deg": 58.0, "longitude_deg": 12.0, "altitude_m": 20_000.0}
SKY = {"latitude_deg": 58.2, "longitude_deg": 12.1, "height_m": 30.0}
OPTICS = {"rx_aperture_m": 0.3, "clock_hz": 1.0e8}


def test_alerts_are_the_readiness_notes_and_positions_come_from_the_registry(net, api) -> None:
    """A clear summer night at 58 N, months after the last block: the link model plans
    key, none arrives, and the readiness note on it is the overview's alert."""
    ops = api(net.a)("ops-ada")
    assert ops.patch("/api/v1/registry/nodes/relay-1", json={"physical": PLATFORM}).is_success
    assert ops.patch("/api/v1/registry/nodes/station-a", json={"physical": SKY}).is_success
    assert ops.patch("/api/v1/registry/links/link-a", json={"optics": OPTICS}).is_success
    night = SteppedClock(datetime(2027, 6, 21, 23, 30, tzinfo=UTC))
    later = dataclasses.replace(net.a, ctx=dataclasses.replace(net.a.ctx, clock=night))
    o = api(later)("mon-cal").get("/api/v1/dashboard/overview").json()
    (link,) = o["links"]
    assert link["planned_bps"] > 1e5 and link["rate_bps"] == 0 and link["far_below"] is True
    (alert,) = [a for a in o["alerts"] if a["check"] == "links"]
    assert alert == {"check": "links", "note": o["checks"]["links"], "failing": False}
    assert alert["note"].startswith("below plan: link-a at 0 % of plan")
    assert o["node"]["position"] == SKY
    network = ops.get("/api/v1/dashboard/network").json()
    assert {n["id"]: n["position"] for n in network["nodes"]}["relay-1"] == PLATFORM


def test_the_overview_of_the_relay(net, api) -> None:
    net.report_buffers()
    o = api(net.relay)("ops-ada").get("/api/v1/dashboard/overview").json()
    assert o["node"]["role"] == "relay"
    assert [lk["link_id"] for lk in o["links"]] == ["link-a", "link-b"]
    (pair,) = o["pairs"]
    ready = pair["ready_by_station"]
    assert set(ready) == {"station-a", "station-b"} and pair["ready_bits"] == min(ready.values())
    assert pair["target_bits"] > 0 and o["deliveries"] == []


def test_the_network_answer_and_its_origins(make_node, db_factory, api) -> None:
    extra = '[[peers]]\nid = "relay-1"\nurl = "https://127.0.0.1:9443/"\n'
    node = make_node("station-a", "station", db_url=db_factory(), extra=extra)
    relaynet.provision(node)
    _person(node, "ops-ada", "operator")
    ops = api(node)("ops-ada")
    assert ops.patch(
        "/api/v1/registry/nodes/station-b", json={"url": "https://b.example:8443/x"}
    ).is_success
    answer = ops.get("/api/v1/dashboard/network").json()
    by_id = {n["id"]: n for n in answer["nodes"]}
    # The registry's URL, else the [[peers]] URL of the node; this node is "self".
    assert by_id["station-b"]["origin"] == "https://b.example:8443"
    assert by_id["relay-1"]["url"] == "https://127.0.0.1:9443/"
    assert by_id["relay-1"]["origin"] == "https://127.0.0.1:9443"
    assert by_id["station-a"]["self"] is True and by_id["station-a"]["origin"] is None
    assert answer["links"] == [{"id": "link-a", "relay": "relay-1", "station": "station-a"}]
    assert answer["pairs"] == [
        {"id": relaynet.PAIR, "relay": "relay-1", "stations": ["station-a", "station-b"]}
    ]


@pytest.mark.parametrize(
    ("url", "origin"),
    [
        # RFC 6454 section 4: scheme, lower-case host, port unless the scheme's default.
        ("https://Example.ORG:443/a/b?c", "https://example.org"),
        ("https://127.0.0.1:8443", "https://127.0.0.1:8443"),
        ("https://[::1]:8443/", "https://[::1]:8443"),
        ("http://127.0.0.1:8443", None),
        ("https://host:99999", None),
        ("not a url", None),
        (None, None),
    ],
)
def test_origin_of(url: str | None, origin: str | None) -> None:
    assert origin_of(url) == origin


@pytest.mark.parametrize(
    ("query", "field"),
    [
        ("series=link_key_bytes", "series"),
        ("", "series"),
        ("series=link_pool_bits&since=yesterday", "since"),
        ("series=link_pool_bits&since=2026-12-01T10:00:00", "since"),
        ("series=link_pool_bits&until=2026-12-01", "until"),
        (
            "series=link_pool_bits&since=2026-12-02T00:00:00Z&until=2026-12-01T00:00:00Z",
            "since",
        ),
        ("series=link_pool_bits&points=1", "points"),
        ("series=link_pool_bits&points=100000", "points"),
        ("series=link_pool_bits&subject=../x", "subject"),
        ("series=link_pool_bits&since=" + "9" * 41, "since"),
    ],
)
def test_bad_history_queries_are_400_naming_the_field(station, api, query, field) -> None:
    r = api(station)("ops-ada").get(f"/api/v1/dashboard/history?{query}")
    assert r.status_code == 400, r.text
    body = r.json()
    assert any(d["field"].split(".")[-1] == field for d in body["details"]), body
    assert "link_key_bytes" not in body["message"] and "yesterday" not in body["message"]


def test_history_answers_the_sampled_points(net, api) -> None:
    history.sample_once(net.a.ctx, "w")
    r = api(net.a)("ops-ada").get("/api/v1/dashboard/history?series=link_pool_bits")
    assert r.status_code == 200, r.text
    body = r.json()
    assert body["unit"] == "bit" and body["series"] == "link_pool_bits"
    ((subject, points),) = [(s["subject"], s["points"]) for s in body["subjects"]]
    (level,) = pools.pool_levels(net.a.ctx)
    assert subject == "link-a" and points[-1][1] == level.bits_available
    assert abs(points[-1][0] - datetime.now(UTC).timestamp()) < 60
    old = (datetime.now(UTC) - timedelta(days=1)).isoformat()
    r = api(net.a)("ops-ada").get(
        "/api/v1/dashboard/history",
        params={"series": "link_pool_bits", "until": old, "subject": "link-a"},
    )
    assert r.json()["subjects"] == []


def _key_strings(answer: dict[str, Any]) -> set[str]:
    """Each key's Base64 value (RFC 4648 section 4), its hex, and each key ID as given
    and without hyphens."""
    out = set()
    for key in answer["keys"]:
        raw = base64.b64decode(key["key"])
        out |= {key["key"], key["key"].rstrip("="), raw.hex(), key["key_ID"]}
        out.add(key["key_ID"].replace("-", ""))
    return out


def test_no_dashboard_answer_holds_key_material_or_key_ids(net, api) -> None:
    a1, b1 = api(net.a)("sae-a1"), api(net.b)("sae-b1")
    first = a1.post("/api/v1/keys/sae-b1/enc_keys", json={"number": 3, "size": 256}).json()
    second = a1.get("/api/v1/keys/sae-b1/enc_keys").json()
    secrets = _key_strings(first) | _key_strings(second)
    net.drain()
    ids = [{"key_ID": k["key_ID"]} for k in first["keys"]]
    fetched = b1.post("/api/v1/keys/sae-a1/dec_keys", json={"key_IDs": ids})
    assert fetched.status_code == 200 and _key_strings(fetched.json()) <= secrets
    net.report_buffers()
    for node in net.nodes.values():
        history.sample_once(node.ctx, "w")
    assert len(secrets) == 4 * 5
    seen = 0
    since = (datetime.now(UTC) - timedelta(hours=1)).isoformat()
    for name, node in net.nodes.items():
        client = api(node)("ops-ada")
        paths = [*PAGES, *(f"/dashboard/assets/{a}" for a in ASSETS)]
        paths += ["/api/v1/dashboard/overview", "/api/v1/dashboard/network"]
        for path in paths:
            r = client.get(path)
            assert r.status_code == 200, (name, path)
            assert not [s for s in secrets if s in r.text], (name, path)
            seen += 1
        for series in history.SERIES:
            r = client.get("/api/v1/dashboard/history", params={"series": series, "since": since})
            assert r.status_code == 200, (name, series, r.text)
            assert not [s for s in secrets if s in r.text], (name, series)
            seen += 1
    assert seen == 3 * (len(PAGES) + len(ASSETS) + 2 + len(history.SERIES))
