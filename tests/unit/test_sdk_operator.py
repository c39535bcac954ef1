"""``OperatorClient``: what it sends and how it reads answers.

Pure client-side behaviour (path building, the mapping of answers onto the SDK's error
tree, client ownership) runs on ``httpx.MockTransport``: the thing under test is the
client, and a mock server lets each test give exactly the answer it needs, including
ones no keystrata node would give (HTML from a proxy, a JSON list). How the client and
a real node understand each other is checked in
tests/e2e/test_sdk_operator_processes.py.
"""

from __future__ import annotations

import ssl
from collections.abc import Callable, Iterator
from urllib.parse import unquote

import httpx
import pytest

from keystrata.loopback.processes import free_port
from keystrata_client import (
    ApiError,
    ConnectionProblem,
    KeystrataClientError,
    OperatorClient,
    TlsIdentity,
    TransportError,
)

Handler = Callable[[httpx.Request], httpx.Response]


@pytest.fixture
def sent() -> list[httpx.Request]:
    return []


@pytest.fixture
def mock_client(sent: list[httpx.Request]) -> Iterator[Callable[[Handler], OperatorClient]]:
    """``mock_client(handler)``: an OperatorClient whose requests ``handler`` answers."""
    clients: list[httpx.Client] = []

    def make(handler: Handler) -> OperatorClient:
        def record(request: httpx.Request) -> httpx.Response:
            sent.append(request)
            return handler(request)

        http = httpx.Client(transport=httpx.MockTransport(record))
        clients.append(http)
        return OperatorClient("https://relay.test:8443/", client=http)

    yield make
    for http in clients:
        http.close()


def ok(request: httpx.Request) -> httpx.Response:
    return httpx.Response(200, json={"items": []})


# ---------------------------------------------------------------- requests


def test_identifiers_stay_in_one_path_segment(mock_client, sent) -> None:
    ops = mock_client(ok)
    ops.get("nodes", "a/b c?d#e%f")
    ops.change("pairs", "p/1", {"description": "x"})
    ops.retire("principals", "x y")
    ops.pool("link a/b")
    assert [(r.method, r.url.raw_path) for r in sent] == [
        ("GET", b"/api/v1/registry/nodes/a%2Fb%20c%3Fd%23e%25f"),
        ("PATCH", b"/api/v1/registry/pairs/p%2F1"),
        ("DELETE", b"/api/v1/registry/principals/x%20y"),
        ("GET", b"/api/v1/links/link%20a%2Fb/pool"),
    ]
    # The trailing slash of the base URL does not double up.
    assert all(r.url.host == "relay.test" and r.url.port == 8443 for r in sent)


@pytest.mark.parametrize("object_id", [".", "..", ""])
def test_dot_identifiers_do_not_address_another_resource(mock_client, sent, object_id) -> None:
    ops = mock_client(ok)
    try:
        ops.get("nodes", object_id)
    except ValueError:
        return  # refusing such an ID is one acceptable fix
    segments = sent[0].url.raw_path.decode().split("/")
    assert segments[:5] == ["", "api", "v1", "registry", "nodes"]
    assert len(segments) == 6 and unquote(segments[5]) == object_id


def test_unknown_kind_is_refused_before_anything_is_sent(mock_client, sent) -> None:
    ops = mock_client(ok)
    with pytest.raises(ValueError, match="kind must be one of"):
        ops.create("widgets", {})
    with pytest.raises(ValueError):
        ops.get("node", "relay-1")
    assert sent == []


def test_list_asks_for_retired_entries_only_when_told(mock_client, sent) -> None:
    ops = mock_client(lambda r: httpx.Response(200, json={"items": [{"link_id": "a"}, 7]}))
    assert ops.list("links") == [{"link_id": "a"}]
    ops.list("links", include_retired=True)
    assert [str(r.url.params) for r in sent] == ["", "include_retired=true"]


# ---------------------------------------------------------------- answers

HTML = "<html><body>upstream sent garbage</body></html>"


@pytest.mark.parametrize(
    ("answer", "status", "message", "details", "retryable"),
    [
        (
            httpx.Response(404, json={"message": "nodes: no entry 'x'", "details": [{"f": 1}, 2]}),
            404,
            "nodes: no entry 'x'",
            [{"f": 1}],
            False,
        ),
        (httpx.Response(502, text=HTML), 502, "Bad Gateway", [], False),
        (httpx.Response(503, text=HTML), 503, "Service Unavailable", [], True),
        (httpx.Response(400, json=["not", "an", "object"]), 400, "Bad Request", [], False),
        (httpx.Response(409, json={"message": 12}), 409, "Conflict", [], False),
    ],
    ids=["json-error", "html-502", "html-503", "json-list", "message-not-text"],
)
def test_error_answers_become_api_errors(
    mock_client, answer, status, message, details, retryable
) -> None:
    ops = mock_client(lambda _: answer)
    with pytest.raises(ApiError) as caught:
        ops.node_info()
    err = caught.value
    assert (err.status, err.message, err.details, err.retryable) == (
        status,
        message,
        details,
        retryable,
    )
    assert str(err) == f"HTTP {status}: {message}"
    assert "garbage" not in str(err) + repr(err)  # a foreign body is never repeated


@pytest.mark.parametrize(
    "answer",
    [httpx.Response(200, text=HTML), httpx.Response(200, json=[1, 2]), httpx.Response(200)],
    ids=["html", "json-list", "empty"],
)
def test_a_success_that_is_not_a_json_object_is_a_client_error(mock_client, answer) -> None:
    ops = mock_client(lambda _: answer)
    with pytest.raises(KeystrataClientError) as caught:
        ops.pools()
    assert not isinstance(caught.value, ApiError)
    assert "GET /api/v1/links/pools" in str(caught.value)


def test_list_without_items_is_a_client_error(mock_client) -> None:
    ops = mock_client(lambda _: httpx.Response(200, json={"items": "nope"}))
    with pytest.raises(KeystrataClientError, match="no items list"):
        ops.list("pairs")


def test_no_answer_is_a_transport_error() -> None:
    port = free_port()  # bound and released: nothing listens on it now
    with (
        OperatorClient(f"http://127.0.0.1:{port}", timeout=2) as ops,
        pytest.raises(TransportError) as caught,
    ):
        ops.node_info()
    assert isinstance(caught.value.__cause__, httpx.ConnectError)
    assert isinstance(caught.value, ConnectionProblem)
    assert caught.value.problem == (
        f"nothing accepts connections at http://127.0.0.1:{port} (connection refused)"
    )


def test_close_leaves_a_caller_owned_client_open() -> None:
    with httpx.Client(transport=httpx.MockTransport(ok)) as http:
        with OperatorClient("https://relay.test", client=http) as ops:
            ops.list("nodes")
        assert not http.is_closed
        ops2 = OperatorClient("https://relay.test", client=http)
        ops2.close()
        assert not http.is_closed


def test_base_url_must_be_http() -> None:
    with pytest.raises(ValueError, match="https://"):
        OperatorClient("relay.test:8443")


# ---------------------------------------------------------------- against a real node


# ---------------------------------------------------------------- set-up mistakes


def test_a_url_with_a_path_is_named_before_anything_is_sent() -> None:
    with pytest.raises(ConnectionProblem) as caught:
        OperatorClient("https://relay.test:8443/api/v1/registry")
    assert caught.value.problem == (
        "https://relay.test:8443/api/v1/registry is not a node's base URL: "
        "it has the path '/api/v1/registry'"
    )
    assert caught.value.hint == "give the base URL only, https://relay.test:8443"
    OperatorClient("https://relay.test:8443/").close()  # a trailing slash is no path


def test_certificate_files_it_cannot_use_are_named(pki, tmp_path) -> None:
    def problem(**files) -> str:
        chosen = {"ca": pki.ca, "cert": pki.cert("ops-ada"), "key": pki.key("ops-ada")} | files
        with pytest.raises(ConnectionProblem) as caught:
            OperatorClient("https://relay.test", TlsIdentity(**chosen))
        assert "BEGIN" not in str(caught.value)  # never the files' content
        return caught.value.problem

    assert problem(key=pki.key("aud-ben")) == (
        f"the client key {pki.key('aud-ben')} does not belong to the certificate "
        f"{pki.cert('ops-ada')}"
    )
    assert problem(ca=tmp_path / "none.crt") == (
        f"the CA certificate file {tmp_path / 'none.crt'} does not exist"
    )
    assert problem(key=tmp_path) == f"the client key file {tmp_path} is not a file"
    junk = tmp_path / "junk.pem"
    junk.write_text("-----BEGIN NOTHING-----\n")
    assert problem(ca=junk) == f"the CA certificate file {junk} holds no usable PEM certificate"
    assert problem(cert=junk).startswith(f"the client certificate {junk} or its key")
    # TlsIdentity.ssl_context() itself keeps raising what ssl raises, for its callers.
    with pytest.raises(ssl.SSLError):
        TlsIdentity(ca=pki.ca, cert=pki.cert("ops-ada"), key=pki.key("aud-ben")).ssl_context()
