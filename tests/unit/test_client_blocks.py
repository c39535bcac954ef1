"""The client's link key block encodings, checked against the server and the RFCs.

- Binary form: the client's own encoder must round-trip through the server's decoder
  (``keystrata.links.blocks.decode_batch``) and put every field at the documented
  offset (layout in ``service/keystrata/links/blocks.py``).
- JSON form: ``key`` is Base64 with the standard alphabet and padding of RFC 4648
  section 4, checked with ``base64.b64decode(..., validate=True)`` and with the test
  vectors of RFC 4648 section 10.
- Block IDs: RFC 9562 UUIDs, version 4 (section 5.4): the version field (section 4.2,
  the high nibble of octet 6) is 0b0100 and the variant field (section 4.1, the top
  bits of octet 8) is 0b10.
- The push path of ``ModuleClient`` sends those bytes, retries only what is safe to
  retry, and wraps transport failures.
"""

from __future__ import annotations

import base64
import calendar
import json
import re
import struct
import uuid
from datetime import UTC, datetime, timedelta, timezone

import httpx
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from keystrata.links.blocks import BlockIn, decode_batch
from keystrata_client import (
    ApiError,
    AsyncModuleClient,
    IngestResult,
    LinkBlock,
    ModuleClient,
    TransportError,
    encode_binary,
    to_json,
)

WHEN = datetime(2026, 12, 1, 10, 0, 0, 123456, tzinfo=UTC)
BLOCK_ID = "6f1c2d3e-4a5b-4c6d-8e7f-0a1b2c3d4e5f"
KEY = bytes(range(256)) * 3 + b"\x00\xff"


def block(key: bytes = KEY, **overrides: object) -> LinkBlock:
    fields: dict[str, object] = {
        "block_id": BLOCK_ID,
        "key": key,
        "qber": 0.0213,
        "epsilon": 1e-10,
        "produced_at": WHEN,
    }
    fields.update(overrides)
    return LinkBlock(**fields)  # type: ignore[arg-type]


def decode(data: bytes) -> list[BlockIn]:
    return list(decode_batch(data, max_block_bytes=1 << 20, max_blocks=10_000))


# -- binary form -------------------------------------------------------------------------


def test_binary_record_layout_field_by_field() -> None:
    data = encode_binary([block()])
    assert len(data) == 45 + len(KEY)
    assert data[0] == 1  # offset 0, 1 byte: version
    assert data[1:17] == uuid.UUID(BLOCK_ID).bytes  # offset 1, 16 bytes: UUID, big-endian
    # offset 17, 8 bytes: signed big-endian microseconds since the epoch, computed here
    # independently of the encoder with calendar.timegm.
    micros = calendar.timegm((2026, 12, 1, 10, 0, 0)) * 1_000_000 + 123456
    assert data[17:25] == micros.to_bytes(8, "big", signed=True)
    assert data[25:33] == struct.pack(">d", 0.0213)  # offset 25: QBER, binary64
    assert data[33:41] == struct.pack(">d", 1e-10)  # offset 33: epsilon, binary64
    assert data[41:45] == len(KEY).to_bytes(4, "big")  # offset 41: key length
    assert data[45:] == KEY  # offset 45: the key bytes


def test_binary_time_before_epoch_is_negative_and_offsets_are_converted() -> None:
    before = datetime(1969, 12, 31, 23, 59, 59, 500000, tzinfo=UTC)
    assert encode_binary([block(produced_at=before)])[17:25] == (-500000).to_bytes(
        8, "big", signed=True
    )
    plus_two = WHEN.astimezone(timezone(timedelta(hours=2)))
    assert encode_binary([block(produced_at=plus_two)]) == encode_binary([block()])


def test_binary_round_trips_through_the_server_decoder() -> None:
    blocks = [
        block(),
        LinkBlock.new(b"\x01", qber=0.0, epsilon=0.0, produced_at=WHEN),
        LinkBlock.new(bytes(4096), qber=0.5, epsilon=0.999, produced_at=WHEN),
    ]
    decoded = decode(encode_binary(blocks))
    assert [(d.block_id, d.key, d.qber, d.epsilon, d.produced_at) for d in decoded] == [
        (b.block_id, b.key, b.qber, b.epsilon, b.produced_at) for b in blocks
    ]


def test_empty_batch_is_empty() -> None:
    assert encode_binary([]) == b""
    assert to_json([]) == {"blocks": []}


@settings(max_examples=200, deadline=None)
@given(
    key=st.binary(min_size=1, max_size=512),
    qber=st.floats(0.0, 0.5),
    epsilon=st.floats(0.0, 1.0, exclude_max=True),
    produced_at=st.datetimes(
        min_value=datetime(1900, 1, 1), max_value=datetime(2200, 1, 1), timezones=st.just(UTC)
    ),
    count=st.integers(1, 4),
)
def test_binary_round_trip_property(
    key: bytes, qber: float, epsilon: float, produced_at: datetime, count: int
) -> None:
    blocks = [
        LinkBlock.new(key, qber=qber, epsilon=epsilon, produced_at=produced_at)
        for _ in range(count)
    ]
    decoded = decode(encode_binary(blocks))
    assert [(d.block_id, d.key, d.qber, d.epsilon, d.produced_at) for d in decoded] == [
        (b.block_id, b.key, b.qber, b.epsilon, b.produced_at) for b in blocks
    ]


# -- JSON form ---------------------------------------------------------------------------

# RFC 4648 section 10, the BASE64 test vectors (the empty one left out: a block holds at
# least one byte).
RFC4648_VECTORS = [
    (b"f", "Zg=="),
    (b"fo", "Zm8="),
    (b"foo", "Zm9v"),
    (b"foob", "Zm9vYg=="),
    (b"fooba", "Zm9vYmE="),
    (b"foobar", "Zm9vYmFy"),
]


@pytest.mark.parametrize(("key", "expected"), RFC4648_VECTORS)
def test_json_key_matches_rfc4648_section10_vectors(key: bytes, expected: str) -> None:
    assert to_json([block(key=key)])["blocks"][0]["key"] == expected


def test_json_key_is_standard_padded_base64() -> None:
    # Bytes that give '+' and '/' in the standard alphabet (RFC 4648 section 4), which
    # the URL-safe alphabet of section 5 would write as '-' and '_'.
    key = b"\xfb\xff\xbf" + KEY
    text = to_json([block(key=key)])["blocks"][0]["key"]
    assert re.fullmatch(r"[A-Za-z0-9+/]*={0,2}", text)
    assert len(text) % 4 == 0
    assert "+" in text and "/" in text
    assert base64.b64decode(text, validate=True) == key


def test_json_body_fields_and_rfc3339_time() -> None:
    body = to_json([block(produced_at=WHEN.astimezone(timezone(timedelta(hours=-5))))])
    (item,) = body["blocks"]
    assert set(item) == {"block_id", "key", "qber", "epsilon", "produced_at"}
    assert item["block_id"] == BLOCK_ID
    assert item["qber"] == 0.0213 and item["epsilon"] == 1e-10
    assert item["produced_at"] == "2026-12-01T10:00:00.123456Z"
    assert datetime.fromisoformat(item["produced_at"]) == WHEN
    json.dumps(body)  # plain JSON types only


# -- block IDs and the block itself -------------------------------------------------------


def test_new_block_ids_are_rfc9562_version4_uuids() -> None:
    for _ in range(64):
        b = LinkBlock.new(b"k", qber=0.01, epsilon=1e-10, produced_at=WHEN)
        raw = encode_binary([b])[1:17]
        assert raw[6] >> 4 == 0b0100  # RFC 9562 section 4.2: version 4
        assert raw[8] >> 6 == 0b10  # RFC 9562 section 4.1: variant 10
        assert b.block_id == str(uuid.UUID(bytes=raw))  # canonical lower-case 8-4-4-4-12


def test_block_ids_are_canonicalised_and_checked() -> None:
    assert block(block_id=BLOCK_ID.upper()).block_id == BLOCK_ID
    for bad in ("not-a-uuid", BLOCK_ID.replace("-", ""), "{" + BLOCK_ID[1:-1] + "}"):
        with pytest.raises(ValueError, match="block_id"):
            block(block_id=bad)


def test_block_rejects_naive_time_empty_key_and_non_finite_numbers() -> None:
    with pytest.raises(ValueError, match="time zone"):
        block(produced_at=datetime(2026, 12, 1))
    with pytest.raises(ValueError, match="key"):
        block(key=b"")
    with pytest.raises(ValueError, match="finite"):
        block(qber=float("nan"))


def test_key_bytes_never_appear_in_repr_or_errors() -> None:
    secret = b"\x8a\x17SECRET-KEY-BYTES\x00\x99"
    b = block(key=secret)
    assert "key=" not in repr(b)
    for form in (repr(secret), secret.hex(), base64.b64encode(secret).decode()):
        assert form not in repr(b)
    with pytest.raises(ValueError) as caught:
        block(key=secret, produced_at=datetime(2026, 12, 1))
    assert secret.hex() not in str(caught.value) and "SECRET" not in str(caught.value)


# -- the push path ------------------------------------------------------------------------


def answer(request: httpx.Request) -> httpx.Response:
    blocks = decode(request.content)
    return httpx.Response(
        200,
        json={
            "link_id": "link-vessa",
            "accepted": len(blocks),
            "duplicates": 0,
            "accepted_bits": 8 * sum(len(b.key) for b in blocks),
        },
    )


def test_push_sends_the_binary_form() -> None:
    seen: list[httpx.Request] = []

    def handler(request: httpx.Request) -> httpx.Response:
        seen.append(request)
        return answer(request)

    with httpx.Client(transport=httpx.MockTransport(handler)) as http:
        client = ModuleClient("https://relay.test:8443/", client=http)
        result = client.push_blocks("link-vessa", [block(), block(block_id=str(uuid.uuid4()))])
    assert result == IngestResult("link-vessa", 2, 0, 2 * 8 * len(KEY))
    (request,) = seen
    assert request.method == "POST"
    assert request.url.path == "/api/v1/links/link-vessa/blocks"
    assert request.headers["content-type"] == "application/octet-stream"
    assert [d.key for d in decode(request.content)] == [KEY, KEY]


def test_push_json_form_decodes_with_strict_base64() -> None:
    seen: list[httpx.Request] = []

    def handler(request: httpx.Request) -> httpx.Response:
        seen.append(request)
        return httpx.Response(
            200, json={"link_id": "l", "accepted": 1, "duplicates": 0, "accepted_bits": 8}
        )

    with httpx.Client(transport=httpx.MockTransport(handler)) as http:
        ModuleClient("https://relay.test", client=http).push_blocks("l", [block()], binary=False)
    assert seen[0].headers["content-type"] == "application/json"
    item = json.loads(seen[0].content)["blocks"][0]
    assert base64.b64decode(item["key"], validate=True) == KEY


def test_push_retries_503_and_transport_errors_but_not_4xx() -> None:
    calls: list[int] = []
    script = [503, "drop", 200]

    def handler(request: httpx.Request) -> httpx.Response:
        step = script[len(calls)]
        calls.append(1)
        if step == "drop":
            raise httpx.ConnectError("connection refused", request=request)
        if step == 503:
            return httpx.Response(503, json={"message": "busy", "details": []})
        return answer(request)

    waits: list[float] = []
    with httpx.Client(transport=httpx.MockTransport(handler)) as http:
        client = ModuleClient("https://relay.test", client=http, sleep=waits.append)
        assert client.push_blocks("link-vessa", [block()]).accepted == 1
    assert len(calls) == 3 and waits == [0.2, 0.4]

    def conflict(request: httpx.Request) -> httpx.Response:
        calls.append(1)
        detail = {"field": "blocks[0]", "problem": "re-sent with other bytes"}
        return httpx.Response(409, json={"message": "block conflict", "details": [detail]})

    calls.clear()
    with httpx.Client(transport=httpx.MockTransport(conflict)) as http:
        client = ModuleClient("https://relay.test", client=http, sleep=waits.append)
        with pytest.raises(ApiError) as caught:
            client.push_blocks("link-vessa", [block()])
    assert len(calls) == 1
    assert caught.value.status == 409 and caught.value.message == "block conflict"
    assert caught.value.details[0]["field"] == "blocks[0]"


def test_push_gives_up_after_the_last_attempt_with_a_chained_transport_error() -> None:
    def handler(request: httpx.Request) -> httpx.Response:
        raise httpx.ReadTimeout("timed out", request=request)

    with httpx.Client(transport=httpx.MockTransport(handler)) as http:
        client = ModuleClient("https://relay.test", client=http, attempts=2, sleep=lambda _: None)
        with pytest.raises(TransportError) as caught:
            client.push_blocks("link-vessa", [block()])
    assert isinstance(caught.value.__cause__, httpx.ReadTimeout)
    assert KEY.hex() not in str(caught.value)


@pytest.mark.anyio
async def test_async_push_sends_the_binary_form() -> None:
    async def handler(request: httpx.Request) -> httpx.Response:
        return answer(request)

    async with httpx.AsyncClient(transport=httpx.MockTransport(handler)) as http:
        client = AsyncModuleClient("https://station.test", client=http)
        result = await client.push_blocks("link-vessa", [block()])
    assert result == IngestResult("link-vessa", 1, 0, 8 * len(KEY))


@pytest.fixture
def anyio_backend() -> str:
    return "asyncio"
