"""The API documentation page (``/docs``): drawn by the node from its OpenAPI document,
self-contained, and only for the roles that may read the document itself.

Attack side first: the page maps every route, parameter and body, so a stranger with a
certificate of the network's CA, an SAE, a QKD module, a peer or an auditor must not
get it; nor may the page load anything from elsewhere (a CDN script would run with the
operator's certificate in the browser) or carry anything a caller chose.
"""

from __future__ import annotations

import base64
import hashlib
import html
import re
from html.parser import HTMLParser
from typing import Any

import pytest

from keystrata.api.app import route_table
from keystrata.registry.specs import PrincipalRole

CERT_OF_ROLE = {
    PrincipalRole.OPERATOR: "ops-ada",
    PrincipalRole.AUDITOR: "aud-ben",
    PrincipalRole.QKD_MODULE: "mod-link-a",
    PrincipalRole.SAE: "sae-a1",
    PrincipalRole.PEER: "peer-relay",
    PrincipalRole.MONITOR: "mon-cal",
}
#: The roles of /openapi.json (tests/api/test_roles.py DOCUMENT_ROLES): the page shows
#: the same document, so the same roles read it.
PAGE_ROLES = {PrincipalRole.OPERATOR, PrincipalRole.MONITOR}

#: The page is drawn from the routes, the browser rules run before any route: what is
#: checked here does not depend on the database.
pytestmark = pytest.mark.one_backend


class _Page(HTMLParser):
    """Everything of the page an outside reader (the standard library's HTML parser)
    finds: tags with their attributes, and text."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.text: list[str] = []
        self.styles: list[str] = []
        self._in_style = False

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append((tag, dict(attrs)))
        self._in_style = tag == "style"

    def handle_endtag(self, tag: str) -> None:
        self._in_style = False

    def handle_data(self, data: str) -> None:
        (self.styles if self._in_style else self.text).append(data)


def _parse(body: str) -> _Page:
    page = _Page()
    page.feed(body)
    page.close()
    return page


def test_only_operators_and_monitors_get_the_page(station, api) -> None:
    for name in ("stranger", None):  # a certificate no principal has; no certificate
        r = api(station)(name).get("/docs")
        assert r.status_code == 401, (name, r.text)
        assert r.json()["message"].startswith("unauthorized"), r.text
        assert "<html" not in r.text
    for role, cert in CERT_OF_ROLE.items():
        r = api(station)(cert).get("/docs")
        if role in PAGE_ROLES:
            assert r.status_code == 200, (role, r.text)
            assert r.headers["content-type"].startswith("text/html")
        else:
            assert r.status_code == 403, (role, r.status_code)
            assert "<html" not in r.text
    assert api(station)("ops-ada").get("/redoc").status_code == 404  # not served


def test_the_page_names_every_route_with_its_roles(station, api) -> None:
    r = api(station)("ops-ada").get("/docs")
    assert r.status_code == 200
    page = _parse(r.text)
    text = " ".join(page.text)
    sections = {a.get("id"): a for t, a in page.tags if t == "section"}
    for route in route_table():
        roles: set[str] = set()
        for dep in route.dependant.dependencies:
            roles |= {r.value for r in getattr(dep.call, "roles", frozenset())}
        assert roles, route.path
        for method in route.methods:
            anchor = "op-" + "".join(c if c.isalnum() else "-" for c in method + route.path)
            assert anchor in sections, (method, route.path)
        assert route.path in text, route.path
    # Each operation's own block names its method, path and roles in that order.
    flat = re.sub(r"\s+", " ", text)
    for route in route_table():
        roles = sorted(
            r.value
            for dep in route.dependant.dependencies
            for r in getattr(dep.call, "roles", frozenset())
        )
        for method in route.methods:
            assert f"{method} {route.path} " in flat, (method, route.path)
        assert f"Roles: {', '.join(roles)}" in flat, (route.path, roles)


def test_the_page_shows_summaries_and_schemas_of_the_document(station, api) -> None:
    from keystrata.server import compose

    document = compose(station.ctx).openapi()
    r = api(station)("mon-cal").get("/docs")
    assert r.status_code == 200
    page = _parse(r.text)
    flat = re.sub(r"\s+", " ", " ".join(page.text))
    for path, operations in document["paths"].items():
        for method, op in operations.items():
            assert op["summary"] in flat, (method, path)
            for param in op.get("parameters", []):
                assert param["name"] in flat, (path, param["name"])
    ids = {a.get("id") for _, a in page.tags}
    links = {a.get("href") for t, a in page.tags if t == "a"}
    for name, schema in document["components"]["schemas"].items():
        assert f"schema-{name}" in ids, name
        for member in schema.get("properties", {}):
            assert member in flat, (name, member)
    # Request and answer schemas of the key delivery routes are linked where used.
    for name in ("KeyRequest", "KeyIds", "KeyContainer", "Status", "ErrorBody"):
        assert f"#schema-{name}" in links, name
    for href in links:  # every link stays on the page
        assert href is not None and href.startswith("#") and href[1:] in ids, href


def test_the_page_is_self_contained_and_its_policy_allows_nothing_else(station, api) -> None:
    r = api(station)("ops-ada").get("/docs")
    page = _parse(r.text)
    tags = [t for t, _ in page.tags]
    assert "script" not in tags and "link" not in tags and "img" not in tags
    assert "iframe" not in tags and "form" not in tags
    for _, attrs in page.tags:
        for name, value in attrs.items():
            assert not name.startswith("on"), name  # no event handler attributes
            if name in ("src", "href", "action"):
                assert value is not None and value.startswith("#"), (name, value)
    # (Descriptions may mention URLs as text; only attributes and styles could load.)
    assert all("url(" not in s and "@import" not in s for s in page.styles)
    policy = r.headers["content-security-policy"]
    assert "default-src 'none'" in policy and "frame-ancestors 'none'" in policy
    assert "script-src" not in policy  # falls back to default-src 'none'
    # CSP Level 3, section 8.4: a hash-source is "sha256-" and the Base64 of the SHA-256
    # of the style element's text; computed here from the page as served.
    (style,) = page.styles
    digest = base64.b64encode(hashlib.sha256(style.encode()).digest()).decode()
    assert f"style-src 'sha256-{digest}'" in policy
    assert r.headers["x-content-type-options"] == "nosniff"


@pytest.mark.parametrize("where", ["path", "query"])
def test_nothing_of_the_request_reaches_the_page(station, api, where: str) -> None:
    """The page is the same for every request: a markup string in the URL is neither
    echoed nor able to change it."""
    probe = '"><script>alert(1)</script>'
    plain = api(station)("ops-ada").get("/docs").text
    if where == "query":
        r = api(station)("ops-ada").get("/docs", params={"q": probe})
        assert r.status_code == 200 and r.text == plain
    else:
        r = api(station)("ops-ada").get("/docs/" + probe)
        assert r.status_code == 404
    assert "<script" not in r.text and "alert(1)" not in r.text


def test_text_of_the_document_is_escaped() -> None:
    """The renderer escapes what the document says (a description holding markup)."""
    from keystrata.api import docs_page

    hostile = "<b onmouseover=x>&"
    document: dict[str, Any] = {
        "info": {"title": hostile, "version": "1"},
        "paths": {"/p": {"get": {"summary": hostile, "responses": {}}}},
        "components": {"schemas": {"S": {"description": hostile, "properties": {"a": {}}}}},
    }
    route = docs_page.RouteFacts("/p", ("GET",), hostile, hostile, ("operator",), True)
    out = docs_page.render(document, [route], hostile)
    assert hostile not in out and html.escape(hostile) in out
    assert not [a for _, a in _parse(out).tags if any(k.startswith("on") for k in a)]


def test_every_reference_of_the_document_resolves(station, api) -> None:
    """A JSON pointer ``$ref`` (RFC 6901) that names nothing leaves a body undocumented:
    every one must point at a schema the document holds."""
    document = api(station)("ops-ada").get("/openapi.json").json()
    refs: list[str] = []

    def walk(node: Any) -> None:
        if isinstance(node, dict):
            if isinstance(node.get("$ref"), str):
                refs.append(node["$ref"])
            for value in node.values():
                walk(value)
        elif isinstance(node, list):
            for value in node:
                walk(value)

    walk(document)
    assert refs
    for ref in refs:
        target: Any = document
        assert ref.startswith("#/"), ref
        for part in ref[2:].split("/"):
            assert isinstance(target, dict) and part in target, ref
            target = target[part]
