"""The segment header's canonical JSON (keystrata.ledger.canonical, the project's one
RFC 8785 encoder) against the rfc8785 package, the reference implementation of RFC 8785
the header used before: the bytes must be equal for every value, or both must refuse
it."""

from __future__ import annotations

import uuid
from datetime import UTC, datetime

import rfc8785
from hypothesis import given, settings
from hypothesis import strategies as st

from keystrata.ledger import canonical as jcs
from keystrata.peering import messages

_scalars = (
    st.none()
    | st.booleans()
    | st.integers(min_value=-(2**60), max_value=2**60)
    | st.floats(allow_nan=True, allow_infinity=True)
    | st.text()
)
_values = st.recursive(
    _scalars,
    lambda inner: st.lists(inner, max_size=5) | st.dictionaries(st.text(), inner, max_size=5),
    max_leaves=30,
)


def _reference(value: object) -> bytes | type[BaseException]:
    try:
        return rfc8785.dumps(value)
    except (ValueError, UnicodeError) as exc:
        return type(exc)


def _ours(value: object) -> bytes | type[BaseException]:
    try:
        return jcs.dumps(value)
    except (ValueError, UnicodeError) as exc:
        return type(exc)


@settings(max_examples=400, deadline=None)
@given(_values)
def test_any_json_value_canonicalises_as_the_package_does(value: object) -> None:
    ours, reference = _ours(value), _reference(value)
    if isinstance(reference, bytes):
        assert ours == reference
    else:  # both refuse (the error class may differ: a lone surrogate)
        assert not isinstance(ours, bytes)


def test_control_characters_and_names_outside_the_bmp() -> None:
    # RFC 8785 section 3.2.2.2 escapes; section 3.2.3 sorts names as UTF-16 code units,
    # where U+10000 (a surrogate pair, 0xD800...) sorts before U+E000.
    value = {"\U00010000": 1, "\ue000": 2, 'a\x00\x1f\b\t\n\f\r"\\\x7f': "é\u2028"}
    assert jcs.dumps(value) == rfc8785.dumps(value)
    assert jcs.dumps([1.0, 1e21, 5e-324, -0.0, 2**53 - 1]) == rfc8785.dumps(
        [1.0, 1e21, 5e-324, -0.0, 2**53 - 1]
    )


@settings(max_examples=300, deadline=None)
@given(
    st.one_of(st.text(), st.integers(), st.booleans(), st.none()),
    st.one_of(st.integers(-(2**60), 2**60), st.booleans(), st.floats(), st.text()),
    st.one_of(st.integers(-(2**60), 2**60), st.booleans(), st.floats(), st.text()),
)
def test_range_shaped_objects_of_any_members_canonicalise_as_the_package_does(
    block: object, length: object, offset: object
) -> None:
    # The one-step form of {block, length, offset} must not take what it cannot write.
    value = {"offset": offset, "block": block, "length": length}
    ours, reference = _ours(value), _reference(value)
    if isinstance(reference, bytes):
        assert ours == reference
    else:
        assert not isinstance(ours, bytes)


@settings(max_examples=100, deadline=None)
@given(
    st.lists(st.tuples(st.integers(0, 2**20), st.integers(1, 2**20)), min_size=1, max_size=300),
    st.floats(min_value=0, max_value=0.999, allow_subnormal=True),
    st.integers(1, 2**26),
)
def test_segment_headers_encode_as_the_package_does(
    spans: list[tuple[int, int]], epsilon: float, length: int
) -> None:
    ranges = [messages.LinkRange(block=str(uuid.uuid4()), offset=o, length=n) for o, n in spans]
    header = messages.SegmentHeader(
        v=messages.HEADER_VERSION,
        segment=str(uuid.uuid4()),
        pair="pair-ab",
        relay="relay-1",
        notice_station="station-a",
        cipher_station="station-b",
        owner="station-b",
        length=length,
        epsilon=epsilon,
        made_at=datetime.now(UTC),
        notice_link="link-a",
        notice_key_ranges=ranges,
        notice_mac_ranges=ranges[:1],
        cipher_link="link-b",
        cipher_key_ranges=ranges[::-1],
        cipher_mac_ranges=ranges[-1:],
    )
    assert header.encode() == rfc8785.dumps(header.model_dump(mode="json"))
