"""Key delivery client (ETSI GS QKD 014), its CLI, and the encryptor emulator.

Client-side behaviour only, on ``httpx.MockTransport``: the paths and field names the
client sends, how it reads and checks answers, which failures it sends again, and that
key material stays out of reprs, errors, logs and printed output. The emulator runs
against an in-memory pair of fake stations (enc_keys allocates random keys at station
A, dec_keys serves each once at station B).

Outside sources, named beside each check:
- ETSI GS QKD 014 V1.1.1 (2019-02), from memory: paths, field names, query names,
  status codes, one-time delivery.
- RFC 4648 section 4 (Base64 alphabet and padding), section 3.5 (canonical encoding),
  section 10 (test vectors).
- RFC 9562 section 4 (UUID string form), appendix A (example values, from memory).
- FIPS 180-2 appendix B.1 (SHA-256 of "abc"), from memory.
"""

from __future__ import annotations

import asyncio
import base64
import hashlib
import json
import logging
import os
import uuid
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest
from click.testing import CliRunner

from keystrata.cli import keys_cmd
from keystrata_client import ApiError, KeystrataClientError, TlsIdentity, TransportError
from keystrata_client.emulators.encryptors import (
    EncryptorEmulator,
    EncryptorPairSpec,
    PairStats,
)
from keystrata_client.keys import (
    AsyncKeyClient,
    Key,
    KeyClient,
    KeyContainer,
    KeyStatus,
    UncertainDeliveryError,
    is_key_id,
)

Handler = Callable[[httpx.Request], httpx.Response]

KEY = bytes(range(100, 132))  # 256 bits
KEY_B64 = base64.b64encode(KEY).decode("ascii")
KEY_ID = "919108f7-52d1-4320-9bac-f847db4148a8"  # RFC 9562 appendix A.3, from memory
KEY_ID_2 = "017f22e2-79b0-7cc3-98c4-dc0c0c07398f"  # RFC 9562 appendix A.6, from memory
URL = "https://station-a.test:8443"

STATUS = {  # ETSI GS QKD 014 V1.1.1, Status object field names, from memory
    "source_KME_ID": "kme-vessa",
    "target_KME_ID": "kme-orlin",
    "master_SAE_ID": "sae-vessa-1",
    "slave_SAE_ID": "sae-orlin-1",
    "key_size": 256,
    "stored_key_count": 25000,
    "max_key_count": 100000,
    "max_key_per_request": 128,
    "max_key_size": 1024,
    "min_key_size": 64,
    "max_SAE_ID_count": 0,
}


def container_json(*pairs: tuple[str, str]) -> dict[str, Any]:
    """A Key container; ETSI GS QKD 014 V1.1.1 names ``keys``, ``key_ID``, ``key``."""
    return {"keys": [{"key_ID": kid, "key": key} for kid, key in pairs]}


def answer(body: dict[str, Any], status: int = 200) -> Handler:
    return lambda request: httpx.Response(status, json=body)


@pytest.fixture
def sent() -> list[httpx.Request]:
    return []


@pytest.fixture
def delays() -> list[float]:
    return []


@pytest.fixture
def make(sent: list[httpx.Request], delays: list[float]) -> Iterator[Callable[..., KeyClient]]:
    """``make(handler, **options)``: a KeyClient whose requests ``handler`` answers."""
    opened: list[httpx.Client] = []

    def build(handler: Handler, **options: Any) -> KeyClient:
        def record(request: httpx.Request) -> httpx.Response:
            sent.append(request)
            return handler(request)

        http = httpx.Client(transport=httpx.MockTransport(record))
        opened.append(http)
        return KeyClient(URL + "/", client=http, sleep=delays.append, **options)

    yield build
    for http in opened:
        http.close()


def body_of(request: httpx.Request) -> Any:
    return json.loads(request.content)


# -- request shapes ----------------------------------------------------------------------


def test_status_is_a_get_with_the_slave_in_the_path(make, sent) -> None:
    make(answer(STATUS)).status("sae-orlin-1")
    (request,) = sent
    # ETSI GS QKD 014 V1.1.1: GET /api/v1/keys/{slave_SAE_ID}/status, from memory
    assert request.method == "GET"
    assert request.url.raw_path == b"/api/v1/keys/sae-orlin-1/status"
    assert request.content == b""


def test_sae_ids_stay_in_one_path_segment(make, sent) -> None:
    make(answer(STATUS)).status("sae/../x")
    assert sent[0].url.raw_path == b"/api/v1/keys/sae%2F..%2Fx/status"
    with pytest.raises(ValueError):
        make(answer(STATUS)).status("..")
    assert len(sent) == 1


def test_get_keys_posts_a_key_request_with_the_standards_names(make, sent) -> None:
    client = make(answer(container_json((KEY_ID, KEY_B64), (KEY_ID_2, KEY_B64))))
    client.get_keys(
        "sae-orlin-1",
        number=2,
        size=256,
        additional_slave_sae_ids=["sae-orlin-2"],
        extension_mandatory=[{"route_type": "direct"}],
        extension_optional=[{"max_age": 30}],
    )
    (request,) = sent
    # ETSI GS QKD 014 V1.1.1: POST /api/v1/keys/{slave_SAE_ID}/enc_keys with a Key
    # request: number, size, additional_slave_SAE_IDs, extension_mandatory,
    # extension_optional, from memory
    assert request.method == "POST"
    assert request.url.raw_path == b"/api/v1/keys/sae-orlin-1/enc_keys"
    assert request.headers["content-type"] == "application/json"
    assert body_of(request) == {
        "number": 2,
        "size": 256,
        "additional_slave_SAE_IDs": ["sae-orlin-2"],
        "extension_mandatory": [{"route_type": "direct"}],
        "extension_optional": [{"max_age": 30}],
    }


def test_get_keys_defaults_send_one_key_and_leave_the_size_to_the_node(make, sent) -> None:
    make(answer(container_json((KEY_ID, KEY_B64)))).get_keys("sae-orlin-1")
    # ETSI GS QKD 014 V1.1.1: number defaults to 1, size to the Status key_size, from memory
    assert body_of(sent[0]) == {"number": 1}


def test_get_keys_get_form_uses_the_number_and_size_query(make, sent) -> None:
    make(answer(container_json((KEY_ID, KEY_B64)))).get_keys(
        "sae-orlin-1", number=1, size=256, form="get"
    )
    (request,) = sent
    # ETSI GS QKD 014 V1.1.1: GET .../enc_keys?number=&size=, from memory
    assert request.method == "GET"
    assert request.url.path == "/api/v1/keys/sae-orlin-1/enc_keys"
    assert request.url.params.multi_items() == [("number", "1"), ("size", "256")]
    assert request.content == b""


def test_get_keys_with_ids_posts_key_ids_with_the_master_in_the_path(make, sent) -> None:
    client = make(answer(container_json((KEY_ID_2, KEY_B64), (KEY_ID, KEY_B64))))
    got = client.get_keys_with_ids("sae-vessa-1", [KEY_ID, KEY_ID_2])
    (request,) = sent
    # ETSI GS QKD 014 V1.1.1: POST /api/v1/keys/{master_SAE_ID}/dec_keys with Key IDs
    # {"key_IDs": [{"key_ID": ...}]}, from memory
    assert request.method == "POST"
    assert request.url.raw_path == b"/api/v1/keys/sae-vessa-1/dec_keys"
    assert body_of(request) == {"key_IDs": [{"key_ID": KEY_ID}, {"key_ID": KEY_ID_2}]}
    assert set(got.key_ids) == {KEY_ID, KEY_ID_2}


def test_get_keys_with_ids_get_form_uses_the_key_id_query(make, sent) -> None:
    make(answer(container_json((KEY_ID, KEY_B64)))).get_keys_with_ids(
        "sae-vessa-1", [KEY_ID], form="get"
    )
    # ETSI GS QKD 014 V1.1.1: GET .../dec_keys?key_ID=, from memory
    assert sent[0].method == "GET"
    assert sent[0].url.path == "/api/v1/keys/sae-vessa-1/dec_keys"
    assert sent[0].url.params.multi_items() == [("key_ID", KEY_ID)]


@pytest.mark.parametrize(
    "call",
    [
        lambda c: c.get_keys("sae-orlin-1", number=0),
        lambda c: c.get_keys("sae-orlin-1", number=True),
        lambda c: c.get_keys("sae-orlin-1", size=100),  # ETSI GS QKD 014: multiple of 8
        lambda c: c.get_keys("sae-orlin-1", size=0),
        lambda c: c.get_keys("sae-orlin-1", additional_slave_sae_ids="sae-orlin-2"),
        lambda c: c.get_keys("sae-orlin-1", additional_slave_sae_ids=["x"], form="get"),
        lambda c: c.get_keys("sae-orlin-1", form="put"),
        lambda c: c.get_keys_with_ids("sae-vessa-1", []),
        lambda c: c.get_keys_with_ids("sae-vessa-1", KEY_ID),
        lambda c: c.get_keys_with_ids("sae-vessa-1", ["not-a-uuid"]),
        lambda c: c.get_keys_with_ids("sae-vessa-1", [KEY_ID, KEY_ID.upper()]),
        lambda c: c.get_keys_with_ids("sae-vessa-1", [KEY_ID, KEY_ID_2], form="get"),
    ],
)
def test_bad_arguments_are_refused_before_anything_is_sent(make, sent, call) -> None:
    with pytest.raises(ValueError):
        call(make(answer(container_json((KEY_ID, KEY_B64)))))
    assert sent == []


# -- answers -----------------------------------------------------------------------------


def test_status_reads_the_standards_names_into_snake_case_and_back(make) -> None:
    extended = STATUS | {"status_extension": {"station": "orlin"}, "unknown": 1}
    status = make(answer(extended)).status("sae-orlin-1")
    assert status.source_kme_id == "kme-vessa"
    assert status.max_sae_id_count == 0
    assert status.max_key_per_request == 128
    assert status.status_extension == {"station": "orlin"}
    # ETSI GS QKD 014 V1.1.1, Status field names, from memory: to_json gives them back.
    assert status.to_json() == STATUS | {"status_extension": {"station": "orlin"}}
    assert KeyStatus.from_json(status.to_json()) == status


@pytest.mark.parametrize(
    "change",
    [
        {"key_size": True},  # JSON true is not an integer
        {"key_size": "256"},
        {"stored_key_count": -1},
        {"slave_SAE_ID": ""},
        {"status_extension": []},
    ],
)
def test_a_malformed_status_is_a_client_error(make, change) -> None:
    with pytest.raises(KeystrataClientError, match="invalid answer"):
        make(answer(STATUS | change)).status("sae-orlin-1")


def test_a_status_without_a_field_is_a_client_error(make) -> None:
    partial = {k: v for k, v in STATUS.items() if k != "max_SAE_ID_count"}
    with pytest.raises(KeystrataClientError, match="max_SAE_ID_count"):
        make(answer(partial)).status("sae-orlin-1")


@pytest.mark.parametrize(
    ("text", "raw"),
    [  # RFC 4648 section 10 test vectors (the empty one is not a key)
        ("Zg==", b"f"),
        ("Zm8=", b"fo"),
        ("Zm9v", b"foo"),
        ("Zm9vYg==", b"foob"),
        ("Zm9vYmE=", b"fooba"),
        ("Zm9vYmFy", b"foobar"),
    ],
)
def test_keys_are_decoded_from_base64(make, text, raw) -> None:
    (key,) = make(answer(container_json((KEY_ID, text)))).get_keys("sae-orlin-1")
    assert key.key == raw
    assert key.size == 8 * len(raw)


@pytest.mark.parametrize(
    "text",
    [
        "Zm9vYg",  # RFC 4648 section 4: padding to a multiple of 4 characters is required
        "Zm9v\nYmFy",  # RFC 4648 section 3.3: characters outside the alphabet are refused
        "Zm9v YmFy",
        "Zm9vYh==",  # RFC 4648 section 3.5: non-zero pad bits, not the canonical text
        "_-8=",  # RFC 4648 section 5 (base64url) alphabet, not section 4
        "Zg==Zg==",  # RFC 4648 section 3.2: padding only at the end
        "Zm9vYmFyé",
        "",
        5,
        None,
    ],
)
def test_keys_that_are_not_strict_base64_are_refused(make, text) -> None:
    with pytest.raises(KeystrataClientError, match="keys\\[0\\]\\.key") as caught:
        make(answer(container_json((KEY_ID, text)))).get_keys("sae-orlin-1")
    assert caught.value.__cause__ is None
    if isinstance(text, str) and text:
        assert text not in str(caught.value)


@pytest.mark.parametrize(
    "key_id",
    [
        KEY_ID.upper(),  # RFC 9562 section 4: hex digits are case-insensitive on input
        "00000000-0000-0000-0000-000000000000",  # RFC 9562 section 5.9, Nil UUID
    ],
)
def test_uuid_key_ids_are_accepted_in_their_string_form(make, key_id) -> None:
    (key,) = make(answer(container_json((key_id, KEY_B64)))).get_keys("sae-orlin-1")
    assert key.key_id == key_id
    assert is_key_id(key_id)


@pytest.mark.parametrize(
    "key_id",
    [
        KEY_ID.replace("-", ""),  # RFC 9562 section 4: the string form has hyphens
        "{" + KEY_ID + "}",
        "urn:uuid:" + KEY_ID,  # the URN form (RFC 9562 section 4) is not a key_ID
        KEY_ID[:-1],
        KEY_ID[:-1] + "g",
        KEY_ID + "\n",
        7,
    ],
)
def test_key_ids_that_are_not_uuid_strings_are_refused(make, key_id) -> None:
    with pytest.raises(KeystrataClientError, match="key_ID is not a UUID"):
        make(answer(container_json((key_id, KEY_B64)))).get_keys("sae-orlin-1")
    assert not is_key_id(key_id)


@pytest.mark.parametrize(
    ("body", "problem"),
    [
        ([], "not a JSON object"),
        ({"keys": []}, "keys is not a non-empty list"),
        ({"keys": [KEY_B64]}, "keys\\[0\\] is not an object"),
        (container_json((KEY_ID, KEY_B64), (KEY_ID, KEY_B64)), "appears twice"),
        (container_json((KEY_ID, KEY_B64)) | {"key_container_extension": 1}, "extension"),
    ],
)
def test_malformed_key_containers_are_refused(make, body, problem) -> None:
    client = make(lambda request: httpx.Response(200, json=body))
    with pytest.raises(KeystrataClientError, match=problem):
        client.get_keys("sae-orlin-1", number=2 if "twice" in problem else 1)


def test_get_keys_checks_the_number_and_size_it_asked_for(make) -> None:
    client = make(answer(container_json((KEY_ID, KEY_B64))))
    with pytest.raises(KeystrataClientError, match="1 keys for a request of 2"):
        client.get_keys("sae-orlin-1", number=2)
    with pytest.raises(KeystrataClientError, match="256 bits, not 512") as caught:
        client.get_keys("sae-orlin-1", size=512)
    assert KEY_B64 not in str(caught.value)


def test_get_keys_with_ids_checks_the_ids_it_gets_back(make) -> None:
    client = make(answer(container_json((KEY_ID_2, KEY_B64))))
    with pytest.raises(KeystrataClientError, match="key IDs differ") as caught:
        client.get_keys_with_ids("sae-vessa-1", [KEY_ID])
    assert KEY_B64 not in str(caught.value)
    # RFC 9562 section 4: the same UUID in upper case is the same key ID.
    upper = make(answer(container_json((KEY_ID.upper(), KEY_B64))))
    assert upper.get_keys_with_ids("sae-vessa-1", [KEY_ID]).key_ids == (KEY_ID.upper(),)


def test_extensions_are_kept(make) -> None:
    body = {
        "keys": [
            {
                "key_ID": KEY_ID,
                "key_ID_extension": {"a": 1},
                "key": KEY_B64,
                "key_extension": {"b": 2},
            }
        ],
        "key_container_extension": {"c": 3},
    }
    got = make(answer(body)).get_keys("sae-orlin-1")
    # ETSI GS QKD 014 V1.1.1: key_ID_extension, key_extension, key_container_extension,
    # from memory
    assert got.keys[0].key_id_extension == {"a": 1}
    assert got.keys[0].key_extension == {"b": 2}
    assert got.key_container_extension == {"c": 3}


def test_digest_is_sha256() -> None:
    # FIPS 180-2 appendix B.1: SHA-256("abc"), from memory
    assert Key(KEY_ID, b"abc").digest() == (
        "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    )


def test_key_material_stays_out_of_reprs() -> None:
    key = Key(KEY_ID, KEY, key_extension={"x": 1})
    container = KeyContainer((key,), {"y": 2})
    for text in (repr(key), str(key), repr(container), str(container)):
        assert KEY_ID in text
        assert KEY_B64 not in text
        assert KEY.hex() not in text
        assert repr(KEY) not in text
    assert "size=256" in repr(key)


# -- errors ------------------------------------------------------------------------------


@pytest.mark.parametrize("status", [400, 401, 503])  # ETSI GS QKD 014 V1.1.1, from memory
def test_error_answers_become_api_errors_with_status(make, status) -> None:
    # ETSI GS QKD 014 V1.1.1 Error object: message and details, from memory
    body = {"message": "refused", "details": [{"field": "size"}]}
    client = make(answer(body, status), attempts=1)
    for call in (
        lambda: client.status("sae-orlin-1"),
        lambda: client.get_keys("sae-orlin-1"),
        lambda: client.get_keys_with_ids("sae-vessa-1", [KEY_ID]),
    ):
        with pytest.raises(ApiError) as caught:
            call()
        assert caught.value.status == status
        assert caught.value.message == "refused"
        assert caught.value.details == [{"field": "size"}]


def test_a_key_served_once_is_refused_the_second_time(make) -> None:
    served: set[str] = set()

    def one_time(request: httpx.Request) -> httpx.Response:
        (item,) = body_of(request)["key_IDs"]
        if item["key_ID"] in served:
            return httpx.Response(401, json={"message": "unknown key"})
        served.add(item["key_ID"])
        return httpx.Response(200, json=container_json((item["key_ID"], KEY_B64)))

    client = make(one_time)
    client.get_keys_with_ids("sae-vessa-1", [KEY_ID])
    # ETSI GS QKD 014 V1.1.1: a delivered key is not delivered again; 401, from memory
    with pytest.raises(ApiError) as caught:
        client.get_keys_with_ids("sae-vessa-1", [KEY_ID])
    assert caught.value.status == 401


# -- retries -----------------------------------------------------------------------------


def failing(*failures: type[httpx.HTTPError] | int, then: Handler) -> Handler:
    """Answer with each failure in turn (an exception to raise or a status), then ``then``."""
    left = list(failures)

    def handler(request: httpx.Request) -> httpx.Response:
        if not left:
            return then(request)
        failure = left.pop(0)
        if isinstance(failure, int):
            return httpx.Response(failure, json={"message": "no key ready"})
        raise failure("failed", request=request)

    return handler


GOOD = answer(container_json((KEY_ID, KEY_B64)))

KEY_CALLS = [
    pytest.param(lambda c: c.get_keys("sae-orlin-1"), id="enc_keys-post"),
    pytest.param(lambda c: c.get_keys("sae-orlin-1", form="get"), id="enc_keys-get"),
    pytest.param(lambda c: c.get_keys_with_ids("sae-vessa-1", [KEY_ID]), id="dec_keys"),
]


@pytest.mark.parametrize("call", KEY_CALLS)
def test_key_calls_are_not_sent_again_after_a_503(make, sent, call) -> None:
    with pytest.raises(ApiError) as caught:
        call(make(failing(503, then=GOOD), attempts=5))
    assert caught.value.status == 503
    assert len(sent) == 1


@pytest.mark.parametrize("call", KEY_CALLS)
@pytest.mark.parametrize(
    "failure", [httpx.ReadTimeout, httpx.ReadError, httpx.RemoteProtocolError, httpx.WriteError]
)
def test_key_calls_are_not_sent_again_once_the_request_may_have_left(
    make, sent, call, failure
) -> None:
    with pytest.raises(UncertainDeliveryError) as caught:
        call(make(failing(failure, then=GOOD), attempts=5))
    assert len(sent) == 1
    assert isinstance(caught.value, TransportError)
    assert isinstance(caught.value.__cause__, failure)
    assert "may have" in str(caught.value)


@pytest.mark.parametrize("call", KEY_CALLS)
@pytest.mark.parametrize("failure", [httpx.ConnectError, httpx.ConnectTimeout, httpx.PoolTimeout])
def test_key_calls_are_sent_again_when_the_connection_never_opened(
    make, sent, delays, call, failure
) -> None:
    got = call(make(failing(failure, failure, then=GOOD), attempts=3, backoff=0.1))
    assert got.key_ids == (KEY_ID,)
    assert len(sent) == 3
    assert delays == [0.1, 0.2]


def test_a_connection_that_never_opens_ends_in_a_plain_transport_error(make, sent) -> None:
    with pytest.raises(TransportError) as caught:
        make(failing(*[httpx.ConnectError] * 3, then=GOOD), attempts=3).get_keys("sae-orlin-1")
    assert not isinstance(caught.value, UncertainDeliveryError)
    assert len(sent) == 3


@pytest.mark.parametrize("failure", [503, httpx.ReadTimeout, httpx.ConnectError])
def test_status_is_sent_again_after_a_503_or_a_transport_error(make, sent, failure) -> None:
    status = make(failing(failure, then=answer(STATUS))).status("sae-orlin-1")
    assert status.slave_sae_id == "sae-orlin-1"
    assert len(sent) == 2


@pytest.mark.parametrize("code", [400, 401])
def test_status_is_not_sent_again_after_a_4xx(make, sent, code) -> None:
    with pytest.raises(ApiError):
        make(failing(code, then=answer(STATUS))).status("sae-orlin-1")
    assert len(sent) == 1


def test_status_gives_up_after_the_last_attempt(make, sent) -> None:
    with pytest.raises(ApiError) as caught:
        make(failing(503, 503, then=answer(STATUS)), attempts=2).status("sae-orlin-1")
    assert caught.value.status == 503
    assert len(sent) == 2


def test_retries_log_no_key_material(make, caplog) -> None:
    caplog.set_level(logging.DEBUG)
    client = make(failing(httpx.ConnectError, then=GOOD))
    client.get_keys("sae-orlin-1")
    client.get_keys_with_ids("sae-vessa-1", [KEY_ID])
    assert "sending again" in caplog.text
    assert KEY_B64 not in caplog.text
    assert KEY.hex() not in caplog.text


def test_close_leaves_a_caller_owned_client_open() -> None:
    with httpx.Client(transport=httpx.MockTransport(GOOD)) as http:
        with KeyClient(URL, client=http) as client:
            client.get_keys("sae-orlin-1")
        assert not http.is_closed


@pytest.mark.anyio
async def test_async_client_keeps_the_same_rules() -> None:
    sent: list[httpx.Request] = []
    delays: list[float] = []

    def record(handler: Handler) -> Handler:
        def inner(request: httpx.Request) -> httpx.Response:
            sent.append(request)
            return handler(request)

        return inner

    async def no_sleep(seconds: float) -> None:
        delays.append(seconds)

    async def make_async(handler: Handler) -> AsyncKeyClient:
        return AsyncKeyClient(URL, client=http(handler), sleep=no_sleep)

    opened: list[httpx.AsyncClient] = []

    def http(handler: Handler) -> httpx.AsyncClient:
        opened.append(httpx.AsyncClient(transport=httpx.MockTransport(record(handler))))
        return opened[-1]

    try:
        client = await make_async(failing(503, then=GOOD))
        with pytest.raises(ApiError):
            await client.get_keys("sae-orlin-1")  # a 503 on enc_keys: not sent again
        assert len(sent) == 1

        sent.clear()
        client = await make_async(failing(httpx.ReadTimeout, then=GOOD))
        with pytest.raises(UncertainDeliveryError):
            await client.get_keys_with_ids("sae-vessa-1", [KEY_ID])
        assert len(sent) == 1

        sent.clear()
        client = await make_async(failing(httpx.ConnectError, then=GOOD))
        got = await client.get_keys("sae-orlin-1", size=256)
        assert got.keys[0].key == KEY
        assert len(sent) == 2

        sent.clear()
        client = await make_async(failing(503, then=answer(STATUS)))
        assert (await client.status("sae-orlin-1")).key_size == 256  # status: sent again
        assert len(sent) == 2
        assert delays == [0.2, 0.2]
    finally:
        for h in opened:
            await h.aclose()


@pytest.fixture
def anyio_backend() -> str:
    return "asyncio"


# -- CLI ---------------------------------------------------------------------------------


@pytest.fixture
def cli(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Iterator[Callable[..., Any]]:
    """``cli(handler, *args)``: run ``keystrata keys ARGS`` against ``handler``."""
    files = []
    for name in ("ca.pem", "sae.pem", "sae.key"):
        (tmp_path / name).write_text("not read: the client is replaced\n")
        files.append(str(tmp_path / name))
    opened: list[httpx.Client] = []

    def run(handler: Handler, *args: str) -> Any:
        def open_client(url: str, ca: Path, cert: Path, key: Path) -> KeyClient:
            opened.append(httpx.Client(transport=httpx.MockTransport(handler)))
            return KeyClient(url, client=opened[-1], sleep=lambda _: None)

        monkeypatch.setattr(keys_cmd, "open_client", open_client)
        connection = ["--url", URL, "--ca", files[0], "--cert", files[1], "--key", files[2]]
        return CliRunner().invoke(keys_cmd.keys, [*args, *connection])

    yield run
    for http in opened:
        http.close()


def test_cli_prints_ids_sizes_and_digests_but_not_keys(cli) -> None:
    result = cli(GOOD, "get", "sae-orlin-1", "--size", "256")
    assert result.exit_code == 0, result.output
    assert KEY_ID in result.stdout
    assert hashlib.sha256(KEY).hexdigest() in result.stdout
    assert "256" in result.stdout
    assert KEY_B64 not in result.output
    assert KEY.hex() not in result.output
    assert result.stderr == ""


def test_cli_json_has_no_key_unless_asked(cli) -> None:
    result = cli(GOOD, "get-by-id", "sae-vessa-1", KEY_ID, "--json")
    assert result.exit_code == 0, result.output
    assert json.loads(result.stdout) == {
        "keys": [{"key_ID": KEY_ID, "size": 256, "sha256": hashlib.sha256(KEY).hexdigest()}]
    }


@pytest.mark.parametrize("as_json", [False, True])
def test_cli_shows_keys_only_with_show_key_and_warns_on_stderr(cli, as_json) -> None:
    args = ["get", "sae-orlin-1", "--show-key", *(["--json"] if as_json else [])]
    result = cli(GOOD, *args)
    assert result.exit_code == 0, result.output
    assert KEY_B64 in result.stdout
    assert "exposed" in result.stderr
    assert KEY_B64 not in result.stderr


def test_cli_status_prints_the_standards_names(cli) -> None:
    result = cli(answer(STATUS), "status", "sae-orlin-1", "--json")
    assert result.exit_code == 0, result.output
    assert json.loads(result.stdout) == STATUS
    table = cli(answer(STATUS), "status", "sae-orlin-1")
    assert table.exit_code == 0, table.output
    for name in ("source_KME_ID", "max_SAE_ID_count", "stored_key_count"):
        assert name in table.stdout
    assert "25,000" in table.stdout


def test_cli_turns_errors_into_status_and_message(cli) -> None:
    refused = answer({"message": "not authorised for this pair"}, 401)
    result = cli(refused, "get", "sae-orlin-1")
    assert result.exit_code == 1
    assert "(HTTP 401): not authorised for this pair" in result.stderr
    assert "check --url names that station" in result.stderr  # the hint
    assert "Traceback" not in result.output
    bad = cli(GOOD, "get", "sae-orlin-1", "--size", "100")
    assert bad.exit_code == 2
    assert "multiple of 8" in bad.stderr


# -- encryptor emulator ------------------------------------------------------------------

STATION_A = "https://station-vessa.test"
STATION_B = "https://station-orlin.test"


class TwoStations:
    """Fake station nodes: enc_keys at A allocates random keys, dec_keys at B serves each
    once to the slave named at allocation, for the master that took it.

    The caller's SAE ID comes from an ``X-Test-SAE`` header (real nodes read the client
    certificate). The first ``waiting`` enc_keys calls answer 503, then the first
    ``dec_waiting`` dec_keys calls 503 and the next ``dec_refused`` 401; the keys served
    in ``corrupt`` (0-based order) have one bit flipped.
    """

    def __init__(
        self,
        *,
        waiting: int = 0,
        dec_waiting: int = 0,
        dec_refused: int = 0,
        corrupt: frozenset[int] = frozenset(),
    ) -> None:
        self.waiting = waiting
        self.dec_waiting = dec_waiting
        self.dec_refused = dec_refused
        self.corrupt = corrupt
        self.allocated: dict[str, tuple[str, str, bytes]] = {}
        self.enc_ok = 0
        self.served: list[bytes] = []

    def handler(self, request: httpx.Request) -> httpx.Response:
        caller = request.headers["x-test-sae"]
        station = f"{request.url.scheme}://{request.url.host}"
        _, _, _, sae_id, call = request.url.path.split("/")[1:]
        if station == STATION_A and call == "enc_keys":
            return self._enc_keys(caller, sae_id, body_of(request))
        if station == STATION_B and call == "dec_keys":
            return self._dec_keys(caller, sae_id, body_of(request)["key_IDs"])
        return httpx.Response(400, json={"message": "not served here"})

    def _enc_keys(self, master: str, slave: str, want: dict[str, int]) -> httpx.Response:
        if self.waiting:
            self.waiting -= 1
            return httpx.Response(503, json={"message": "no key ready yet"})
        keys = []
        for _ in range(want["number"]):
            key_id, key = str(uuid.uuid4()), os.urandom(want["size"] // 8)
            self.allocated[key_id] = (master, slave, key)
            keys.append((key_id, base64.b64encode(key).decode()))
        self.enc_ok += 1
        return httpx.Response(200, json=container_json(*keys))

    def _dec_keys(self, slave: str, master: str, items: list[dict[str, str]]) -> httpx.Response:
        if self.dec_waiting:
            self.dec_waiting -= 1
            return httpx.Response(503, json={"message": "allocation not known yet"})
        if self.dec_refused:
            self.dec_refused -= 1
            return httpx.Response(401, json={"message": "unknown key"})
        for item in items:
            if self.allocated.get(item["key_ID"], ("", "", b""))[:2] != (master, slave):
                return httpx.Response(401, json={"message": "unknown key"})
        out = []
        for item in items:
            key = self.allocated.pop(item["key_ID"])[2]
            if len(self.served) in self.corrupt:
                key = bytes([key[0] ^ 1]) + key[1:]
            self.served.append(key)
            out.append((item["key_ID"], base64.b64encode(key).decode()))
        return httpx.Response(200, json=container_json(*out))


def pair(**overrides: Any) -> EncryptorPairSpec:
    fields: dict[str, Any] = {
        "name": "vessa-orlin-1",
        "master_sae_id": "sae-vessa-1",
        "slave_sae_id": "sae-orlin-1",
        "master_url": STATION_A,
        "slave_url": STATION_B,
        # Tokens naming each SAE; the factory below reads the names, no file is opened.
        "master_identity": TlsIdentity(Path("ca.pem"), Path("sae-vessa-1.pem"), Path("k")),
        "slave_identity": TlsIdentity(Path("ca.pem"), Path("sae-orlin-1.pem"), Path("k")),
        "key_size_bits": 256,
        "keys_per_rekey": 2,
        "interval_seconds": 0.01,
    }
    fields.update(overrides)
    return EncryptorPairSpec(**fields)


def emulate(
    stations: TwoStations, duration: float | None = None, stop_after: float | None = None
) -> PairStats:
    """Run one pair against ``stations``; stop after ``duration`` or by ``stop()``."""

    async def scenario() -> PairStats:
        opened: list[httpx.AsyncClient] = []

        def factory(url: str, identity: TlsIdentity | None) -> AsyncKeyClient:
            assert identity is not None
            http = httpx.AsyncClient(
                transport=httpx.MockTransport(stations.handler),
                headers={"X-Test-SAE": identity.cert.stem},
            )
            opened.append(http)
            return AsyncKeyClient(url, client=http)

        emulator = EncryptorEmulator([pair()], client_factory=factory, slave_retry_seconds=0.005)
        try:
            task = asyncio.create_task(emulator.run(duration))
            if stop_after is not None:
                await asyncio.sleep(stop_after)
                emulator.stop()
            stats = await asyncio.wait_for(task, 10)
        finally:
            for http in opened:
                await http.aclose()
        assert emulator.stats == stats
        return stats["vessa-orlin-1"]

    return asyncio.run(scenario())


def test_emulator_counts_matching_keys_and_503s_as_waiting(caplog) -> None:
    caplog.set_level(logging.DEBUG)
    stations = TwoStations(waiting=3)
    s = emulate(stations, 0.3)
    # ETSI GS QKD 014 V1.1.1: 503 is "error on the server side", from memory; a
    # station with no key ready yet answers so, and the emulator counts it as waiting.
    assert s.times_waited_for_key == 3
    assert s.errors == {}
    assert s.last_error is None
    assert s.rekeys_attempted == 3 + stations.enc_ok
    assert s.rekeys_completed == stations.enc_ok >= 1
    assert s.keys_obtained == s.keys_delivered == 2 * stations.enc_ok
    assert s.bits_delivered == 256 * s.keys_delivered
    assert s.matches == s.keys_delivered
    assert s.mismatches == s.keys_lost == 0
    assert s.last_rekey_at is not None
    assert stations.allocated == {}  # every allocated key was fetched, once
    for key in stations.served:  # key material in no log line and no stats
        for text in (base64.b64encode(key).decode(), key.hex()):
            assert text not in caplog.text
            assert text not in repr(s)


def test_emulator_counts_a_corrupted_key_as_a_mismatch(caplog) -> None:
    stations = TwoStations(corrupt=frozenset({1}))
    s = emulate(stations, 0.2)
    assert s.mismatches == 1
    assert s.matches == s.keys_delivered - 1
    assert s.rekeys_completed == stations.enc_ok - 1
    assert s.errors == {}
    assert "differs at the two ends" in caplog.text
    assert base64.b64encode(stations.served[1]).decode() not in caplog.text


def test_emulator_slave_waits_out_503s_at_its_station() -> None:
    stations = TwoStations(dec_waiting=2)
    s = emulate(stations, 0.2)
    assert s.slave_retries == 2
    assert s.errors == {}
    assert s.keys_delivered == s.keys_obtained == s.matches > 0


def test_emulator_counts_refusals_by_call_and_status_and_lost_keys() -> None:
    stations = TwoStations(dec_refused=1)
    s = emulate(stations, 0.2)
    assert s.errors == {"dec_keys:401": 1}
    assert s.error_count == 1
    assert s.last_error == "dec_keys: HTTP 401: unknown key"
    assert s.keys_lost == 2
    assert s.keys_delivered == s.keys_obtained - 2 == s.matches
    assert len(stations.allocated) == 2  # the refused rekey's keys stay allocated at A


def test_emulator_stop_ends_a_run_without_duration() -> None:
    stations = TwoStations()
    s = emulate(stations, None, stop_after=0.1)
    assert s.rekeys_attempted == stations.enc_ok > 0
    assert s.keys_delivered == s.keys_obtained == s.matches


@pytest.mark.parametrize(
    "change",
    [
        {"key_size_bits": 100},
        {"keys_per_rekey": 0},
        {"interval_seconds": 0},
        {"slave_sae_id": "sae-vessa-1"},
        {"name": ""},
    ],
)
def test_pair_specs_are_checked(change) -> None:
    with pytest.raises(ValueError):
        pair(**change)


def test_pair_names_must_be_unique() -> None:
    with pytest.raises(ValueError):
        EncryptorEmulator([pair(), pair()])
