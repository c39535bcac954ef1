"""Every route x every role x no certificate, generated from the app's own route table:
each role reaches only the routes that admit it; unknown callers get the same 401."""

from __future__ import annotations

import pytest
from fastapi.routing import APIRoute

from keystrata.api.app import route_table
from keystrata.api.identity import NO_CERTIFICATE
from keystrata.errors import Forbidden
from keystrata.registry.specs import PrincipalRole

#: Test certificate of each role (see conftest.CLIENTS).
CERT_OF_ROLE = {
    PrincipalRole.OPERATOR: "ops-ada",
    PrincipalRole.AUDITOR: "aud-ben",
    PrincipalRole.QKD_MODULE: "mod-link-a",
    PrincipalRole.SAE: "sae-a1",
    PrincipalRole.PEER: "peer-relay",
    PrincipalRole.MONITOR: "mon-cal",
}


ROLE_REFUSAL = Forbidden.default_message


def _admitted(route: APIRoute) -> frozenset[PrincipalRole]:
    roles: set[PrincipalRole] = set()
    for dep in route.dependant.dependencies:
        roles |= getattr(dep.call, "roles", frozenset())
    return frozenset(roles)


#: Path parameters filled with entries of the seeded registry.
PATH_VALUES = {
    "{link_id}": "link-a",
    "{entry_id}": "x",
    "{pair_id}": "pair-ac",
    "{slave_SAE_ID}": "sae-c1",
    "{master_SAE_ID}": "sae-c1",
}


def _refusal_status(route: APIRoute) -> int:
    """403 for a known principal of another role; 401 on the key delivery routes, where
    ETSI GS QKD 014 knows no 403."""
    statuses = {
        getattr(dep.call, "refusal_status", None) for dep in route.dependant.dependencies
    } - {None}
    assert len(statuses) == 1
    status = statuses.pop()
    assert isinstance(status, int)
    assert (status == 401) == route.path.startswith("/api/v1/keys/")
    return status


def test_every_route_states_its_roles(station) -> None:
    routes = route_table()
    assert routes
    for route in routes:
        assert _admitted(route), f"{route.path} admits no role: every route must state them"


def test_role_matrix(station, api) -> None:
    clients = {name: api(station)(name) for name in [*CERT_OF_ROLE.values(), "stranger"]}
    nobody = api(station)(None)
    checked = 0
    for route in route_table():
        path = route.path
        for name, value in PATH_VALUES.items():
            path = path.replace(name, value)
        admitted = _admitted(route)
        refused = _refusal_status(route)
        for method in route.methods:
            for role, cert in CERT_OF_ROLE.items():
                r = clients[cert].request(method, path, json={})
                status = r.status_code
                if role in admitted:
                    # A 403 of the route's own binding check (test_binding_matrix.py) is
                    # not the role refusal, whose message is Forbidden's default.
                    role_refused = status == 403 and r.json() == {"message": ROLE_REFUSAL}
                    assert status != 401 and not role_refused, (method, path, role, status)
                else:
                    assert status == refused, (method, path, role, status)
            for who, message in ((clients["stranger"], "unauthorized"), (nobody, NO_CERTIFICATE)):
                r = who.request(method, path, json={})
                assert r.status_code == 401, (method, path)
                assert r.json() == {"message": message}
            checked += 1
    assert checked >= 20


#: Roles of the observability routes, as DEVELOPERS.md states them.
OBSERVABILITY_ROLES = {
    "/api/v1/health/live": {PrincipalRole.OPERATOR, PrincipalRole.AUDITOR, PrincipalRole.MONITOR},
    "/api/v1/health/ready": {PrincipalRole.OPERATOR, PrincipalRole.MONITOR},
    "/api/v1/metrics": {PrincipalRole.OPERATOR, PrincipalRole.MONITOR},
}


def test_observability_routes_admit_the_stated_roles() -> None:
    routes = {r.path: r for r in route_table()}
    for path, roles in OBSERVABILITY_ROLES.items():
        assert routes[path].methods == {"GET"}
        assert _admitted(routes[path]) == roles, path
        assert _refusal_status(routes[path]) == 403


@pytest.mark.parametrize("name", ["stranger", None])
def test_refusals_are_in_the_ledger(station, api, name: str | None) -> None:
    from helpers import ledger_events

    before = len(ledger_events(station.ctx))
    assert api(station)(name).get("/api/v1/node").status_code == 401
    events = ledger_events(station.ctx)
    assert len(events) == before + 1 and events[-1] == "auth.refused"


def test_retired_principal_is_unknown(station, api) -> None:
    ops = api(station)("ops-ada")
    assert ops.delete("/api/v1/registry/principals/aud-ben").status_code == 200
    assert api(station)("aud-ben").get("/api/v1/node").status_code == 401


def test_pinned_fingerprint_must_match(station, api, pki) -> None:
    from keystrata.crypto.certificates import fingerprint_sha256

    ops = api(station)("ops-ada")
    wrong = "0" * 64
    assert (
        ops.patch("/api/v1/registry/principals/aud-ben", json={"cert_sha256": wrong}).status_code
        == 200
    )
    assert api(station)("aud-ben").get("/api/v1/node").status_code == 401
    right = fingerprint_sha256(pki.cert("aud-ben").read_bytes())
    assert (
        ops.patch("/api/v1/registry/principals/aud-ben", json={"cert_sha256": right}).status_code
        == 200
    )
    assert api(station)("aud-ben").get("/api/v1/node").status_code == 200


def test_proxy_mode_reads_and_checks_a_forwarded_certificate(station, pki) -> None:
    """Behind a TLS-terminating proxy (off by default), the certificate comes in a header
    and is checked against the network CA here."""
    import dataclasses
    from urllib.parse import quote

    import httpx
    from anyio.from_thread import start_blocking_portal

    from keystrata.server import compose

    settings = station.ctx.settings
    proxied = settings.model_copy(
        update={
            "server": settings.server.model_copy(
                update={"proxy_client_cert_header": "x-client-cert"}
            )
        }
    )
    app = compose(dataclasses.replace(station.ctx, settings=proxied))

    async def call(pem: str | None) -> int:
        headers = {} if pem is None else {"x-client-cert": quote(pem)}
        async with httpx.AsyncClient(
            transport=httpx.ASGITransport(app=app), base_url="https://testserver"
        ) as client:
            return (await client.get("/api/v1/node", headers=headers)).status_code

    foreign = (pki.foreign_dir / "ops-ada.crt").read_text()  # same subject, other CA
    with start_blocking_portal() as portal:
        assert portal.call(call, pki.pem("ops-ada")) == 200
        assert portal.call(call, foreign) == 401
        assert portal.call(call, None) == 401
        assert portal.call(call, "not a certificate") == 401
    # Without proxy mode the same header is ignored.
    plain = compose(station.ctx)
    app = plain
    with start_blocking_portal() as portal:
        assert portal.call(call, pki.pem("ops-ada")) == 401


#: Roles that may read the API's own description (the OpenAPI document): the operator
#: who provisions and the monitor who watches; it maps every route, so strangers, SAEs,
#: modules and peers have no use for it.
DOCUMENT_ROLES = {PrincipalRole.OPERATOR, PrincipalRole.MONITOR}


def test_the_openapi_document_is_for_operators_and_monitors(station, api) -> None:
    """A stranger with a certificate of the network's CA, and every other role, is
    refused the document; the documentation page drawn from it (/docs,
    tests/api/test_docs_page.py) has the same roles, and /redoc is not served at all
    (attack test: any TLS client got the whole map of the API)."""
    for name, message in (("stranger", "unauthorized"), (None, NO_CERTIFICATE)):
        r = api(station)(name).get("/openapi.json")
        assert r.status_code == 401 and r.json() == {"message": message}, r.text
    for role, cert in CERT_OF_ROLE.items():
        r = api(station)(cert).get("/openapi.json")
        if role in DOCUMENT_ROLES:
            assert r.status_code == 200 and r.json()["openapi"].startswith("3."), r.text
        else:
            assert r.status_code == 403, (role, r.status_code)
    assert api(station)("ops-ada").get("/redoc").status_code == 404
    routes = {r.path: r for r in route_table()}
    assert _admitted(routes["/openapi.json"]) == DOCUMENT_ROLES
    assert _admitted(routes["/docs"]) == DOCUMENT_ROLES
