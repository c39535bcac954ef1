"""The ledger's own RFC 8785 encoder (``keystrata.ledger.canonical``) against the
``rfc8785`` package as the reference: equal bytes on every value, or both refuse.

Sources of the checks:

* reference implementation: the ``rfc8785`` package (PyPI), ``rfc8785.dumps``;
* RFC 8785 section 3.2.3: member names sorted by UTF-16 code units, which differs from
  code-point order for names holding characters at or above U+10000 against ones in
  U+E000..U+FFFF (the generated names below are drawn to hit that case);
* RFC 8785 section 3.2.2.3 / ECMA-262 Number::toString: floats, compared on generated
  doubles and on random bit patterns (every exponent, subnormals, both zeros);
* RFC 7493 section 2.2 (I-JSON): integers of magnitude above 2**53 - 1 are refused.

The entry-level check compares ``encode_entry`` (and its prepared form, which splices
``index`` and ``prev`` in later) with ``rfc8785.dumps`` of the same body.
"""

from __future__ import annotations

import base64
import math
import random
import struct
from datetime import UTC, datetime, timedelta
from enum import IntEnum, StrEnum
from typing import Any

import pytest
import rfc8785
from hypothesis import given, settings
from hypothesis import strategies as st

from keystrata.ledger import canonical
from keystrata.ledger.entries import ENTRY_VERSION, Event, encode_entry, prepare, timestamp

I_JSON_MAX = 2**53 - 1  # RFC 7493 section 2.2

#: Every code point, lone surrogates (category Cs) included.
ANY_CHAR = st.characters(exclude_categories=())
#: Characters whose order differs between code points and UTF-16 code units, and some
#: that need escaping (RFC 8785 section 3.2.2.2), mixed with plain ASCII.
TRICKY = st.sampled_from(
    ["\ue000", "\uffff", "\ufb01", "\U00010000", "\U0001f600", "\U0010ffff", "\u00e9",
     "\u2028", "\x00", "\x1f", "\x7f", '"', "\\", "\n", "\t", "\b", "\f", "\r", "a", "Z"]
)  # fmt: skip
TEXT = st.text(st.one_of(ANY_CHAR, TRICKY), max_size=12)
NAMES = st.text(st.one_of(TRICKY, st.characters(exclude_categories=("Cs",))), max_size=6)
INTS = st.one_of(
    st.integers(-I_JSON_MAX, I_JSON_MAX),
    st.sampled_from([I_JSON_MAX, -I_JSON_MAX, I_JSON_MAX + 1, -I_JSON_MAX - 1, 2**64]),
)
SCALARS = st.one_of(st.none(), st.booleans(), INTS, st.floats(), TEXT)
VALUES = st.recursive(
    SCALARS,
    lambda inner: st.one_of(
        st.lists(inner, max_size=5),
        st.lists(inner, max_size=3).map(tuple),
        st.dictionaries(st.one_of(NAMES, TEXT), inner, max_size=6),
    ),
    max_leaves=30,
)


def reference(value: Any) -> bytes | type[BaseException]:
    try:
        return rfc8785.dumps(value)
    except ValueError as err:
        return type(err)


def ours(value: Any) -> bytes | type[BaseException]:
    try:
        return canonical.dumps(value)
    except ValueError as err:
        return type(err)


def assert_same(value: Any) -> None:
    expected, got = reference(value), ours(value)
    if isinstance(expected, bytes):
        assert got == expected, value
    else:  # refused by the reference: refused here too, with the same kind of error
        assert not isinstance(got, bytes), (value, got)
        assert issubclass(got, ValueError)
        if issubclass(expected, rfc8785.CanonicalizationError):
            assert issubclass(got, expected), (value, expected, got)


@settings(max_examples=1000, deadline=None)
@given(VALUES)
def test_any_json_value_encodes_as_the_reference(value: Any) -> None:
    assert_same(value)


@settings(max_examples=500, deadline=None)
@given(st.dictionaries(NAMES, st.one_of(st.none(), INTS, TEXT), min_size=2, max_size=12))
def test_member_order_is_utf16_as_the_reference(obj: dict[str, Any]) -> None:
    assert_same(obj)


def test_utf16_order_differs_from_code_point_order_here() -> None:
    # RFC 8785 section 3.2.3: U+1F600 is D83D DE00 in UTF-16, which sorts before E000.
    obj = {"\ue000": 1, "\U0001f600": 2}
    assert sorted(obj) == ["\ue000", "\U0001f600"]  # code points: the other way round
    expected = '{"\U0001f600":2,"\ue000":1}'.encode()
    assert rfc8785.dumps(obj) == expected
    assert canonical.dumps(obj) == expected


@settings(max_examples=2000, deadline=None)
@given(st.floats())
def test_floats_encode_as_the_reference(value: float) -> None:
    assert_same(value)
    assert_same(-value)


def test_floats_from_random_bit_patterns() -> None:
    rng = random.Random(8785)  # a reproducible sample of doubles
    for _ in range(200_000):
        bits = rng.getrandbits(64)
        value = struct.unpack(">d", bits.to_bytes(8, "big"))[0]  # IEEE 754 binary64
        assert_same(value)
    for exponent in range(-330, 310):  # every decimal magnitude, and the 21 / -6 edges
        for mantissa in (1, 1.5, 9.999999999999999, 123456789, 0.1):
            value = float(f"{mantissa}e{exponent}")  # inf past the largest double
            if math.isfinite(value):
                assert_same(value)


@pytest.mark.parametrize(
    ("value", "text"),
    [  # ECMA-262 Number::toString, as RFC 8785 Appendix B shows it (from memory)
        (0.0, "0"), (-0.0, "0"), (1.0, "1"), (-1.5, "-1.5"), (1e21, "1e+21"),
        (1e20, "100000000000000000000"), (1e-6, "0.000001"), (1e-7, "1e-7"),
        (5e-324, "5e-324"), (1.7976931348623157e308, "1.7976931348623157e+308"),
        (0.1 + 0.2, "0.30000000000000004"), (123456789012345680000.0, "123456789012345680000"),
    ],
)  # fmt: skip
def test_float_samples(value: float, text: str) -> None:
    assert canonical.dumps(value) == text.encode() == rfc8785.dumps(value)


@pytest.mark.parametrize("value", [math.nan, math.inf, -math.inf, 2**53, -(2**53), {1: 2}, b"x"])
def test_what_the_reference_refuses_is_refused(value: Any) -> None:
    with pytest.raises(rfc8785.CanonicalizationError):
        rfc8785.dumps(value)
    with pytest.raises(rfc8785.CanonicalizationError):
        canonical.dumps(value)


def test_lone_surrogates_are_refused() -> None:
    for value in ("\ud800", ["a\udfff"], {"k": "\ud83d"}, "\ud83d\ude00"):
        assert_same(value)
        with pytest.raises(ValueError):
            canonical.dumps(value)


class Colour(StrEnum):
    RED = "red"


class Size(IntEnum):
    BIG = 7


def test_subclasses_encode_as_their_values() -> None:
    for value in (Colour.RED, Size.BIG, {"c": Colour.RED, "s": [Size.BIG, True]}):
        assert_same(value)
    assert canonical.dumps({"c": Colour.RED}) == b'{"c":"red"}'


# ---------------------------------------------------------------- whole entries

FIELD_NAMES = NAMES.filter(lambda n: n not in {"v", "index", "event", "node", "at", "prev"})
FIELDS = st.dictionaries(FIELD_NAMES, VALUES, max_size=8)
AT = datetime(2026, 12, 3, 14, 0, tzinfo=UTC)


def body(index: int, event: Event, node: str, at: datetime, prev: bytes | None, fields: Any):
    return {
        "v": ENTRY_VERSION,
        "index": index,
        "event": str(event),
        "node": node,
        "at": timestamp(at),
        "prev": None if prev is None else base64.b64encode(prev).decode(),
        **fields,
    }


@settings(max_examples=500, deadline=None)
@given(
    fields=FIELDS,
    index=st.integers(0, I_JSON_MAX - 1),
    event=st.sampled_from(list(Event)),
    node=TEXT,
    micros=st.integers(0, 10**12),
    prev=st.binary(min_size=32, max_size=32),
)
def test_entries_encode_as_the_reference(
    fields: dict[str, Any], index: int, event: Event, node: str, micros: int, prev: bytes
) -> None:
    at = AT + timedelta(microseconds=micros)
    link = None if index == 0 else prev
    expected = reference(body(index, event, node, at, link, fields))
    try:
        got: bytes | type[BaseException] = encode_entry(
            index=index, event=event, node_id=node, at=at, fields=fields, prev=link
        )
    except ValueError as err:
        got = type(err)
    if isinstance(expected, bytes):
        assert got == expected
        # Prepared once, spliced at any index: the same bytes as encoding it there.
        ready = prepare(event=event, node_id=node, at=at, fields=fields)
        assert ready.at(index, link) == expected
        assert ready.at(index + 1, prev) == rfc8785.dumps(
            body(index + 1, event, node, at, prev, fields)
        )
    else:
        assert not isinstance(got, bytes)


def test_entry_shapes_we_write() -> None:
    """Fields as the services write them (Get key, relay, ingest, registry, refusals)."""
    shapes: list[dict[str, Any]] = [
        {"pair": "pair-ab", "master": "sae-a1", "slaves": ["sae-b1"], "size_bits": 256,
         "key_ids": ["0b4f3b5e-1c0a-4f7e-9a51-3b2c1d0e9f8a"], "segments": ["s-1", "s-2"],
         "delivered_to": "sae-a1"},
        {"pair": "pair-ab", "segment": "s-1", "length": 262144, "epsilon": 1.5e-10,
         "owner": "station-a", "notice_station": "station-a", "cipher_station": "station-b"},
        {"link": "link-1", "blocks": 3, "bits": 8192, "epsilon": 0.0, "fingerprints": []},
        {"kind": "pairs", "id": "pair-ab", "changes": {"key_ttl_seconds": [60, 120]}},
        {"reason": "not registered", "principal": None, "fingerprint": "ab" * 32},
        {"note": "caf\u00e9 \u00fcber \U0001f511", "held": True, "count": -3},
    ]  # fmt: skip
    for i, fields in enumerate(shapes):
        prev = None if i == 0 else bytes(range(i, i + 32))
        raw = encode_entry(
            index=i, event=Event.KEY_ALLOCATED, node_id="station-a", at=AT, fields=fields, prev=prev
        )
        assert raw == rfc8785.dumps(body(i, Event.KEY_ALLOCATED, "station-a", AT, prev, fields))


def test_prepared_entries_check_index_and_prev() -> None:
    ready = prepare(event=Event.KEY_DELIVERED, node_id="n", at=AT, fields={})
    with pytest.raises(ValueError, match="prev"):
        ready.at(0, bytes(32))
    with pytest.raises(ValueError, match="prev"):
        ready.at(1, None)
    with pytest.raises(rfc8785.IntegerDomainError):
        ready.at(I_JSON_MAX + 1, bytes(32))
    with pytest.raises(ValueError, match="may not"):
        prepare(event=Event.KEY_DELIVERED, node_id="n", at=AT, fields={"prev": 1})
