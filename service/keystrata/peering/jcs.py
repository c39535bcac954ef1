"""RFC 8785 (JSON Canonicalization Scheme) for the plain JSON values of peer message
headers, byte for byte what the ``rfc8785`` package writes (tests/unit/test_relay_jcs.py
keeps that package as the reference), at a fraction of its cost: a segment header names
every link block it uses, hundreds of small objects, and the pure-Python package spent
milliseconds on each header at the relay.

How each part is written (RFC 8785 section 3.2):

* strings (3.2.2.2): the standard library's C string encoder in its
  ``ensure_ascii=False`` form, which escapes exactly ``"``, ``\\`` and U+0000..U+001F,
  the latter as ``\\b \\t \\n \\f \\r`` where JSON has a short form and ``\\u00xx``
  (lower-case hex) otherwise, as the RFC asks; then UTF-8 (a lone surrogate fails);
* integers within I-JSON's range (RFC 7493 section 2.2) as decimal digits;
* every float, every integer outside that range, and objects with a member name that
  is not ASCII (sorted by UTF-16 code units, which only then differs from Python's
  order): handed to the ``rfc8785`` package itself;
* ``true``, ``false``, ``null``; arrays in order; objects with members sorted by name;
  no whitespace. An object of a link range (``block``, ``length``, ``offset``: a string
  and two such integers) is written with one format string, its names in that order.
"""

from __future__ import annotations

import json.encoder
from collections.abc import Callable
from typing import Any

import rfc8785

_quote: Callable[[str], str] = json.encoder.encode_basestring
_INT_MAX = 2**53 - 1
#: A link or segment range, the one object a header repeats hundreds of times: written
#: in one step (its names in sorted order).
_RANGE_KEYS = {"block", "length", "offset"}


def dumps(value: Any) -> bytes:
    """The RFC 8785 canonical UTF-8 bytes of a JSON value (dict, list, str, int, float,
    bool, None). Raises ``rfc8785.CanonicalizationError`` (a ValueError) or
    UnicodeEncodeError for what the RFC cannot write."""
    return _text(value).encode("utf-8")


def _text(value: Any) -> str:
    if isinstance(value, str):
        return _quote(value)
    if value is True:
        return "true"
    if value is False:
        return "false"
    if value is None:
        return "null"
    if type(value) is int and -_INT_MAX <= value <= _INT_MAX:
        return str(value)
    if isinstance(value, dict):
        if value.keys() == _RANGE_KEYS:
            block, length, offset = value["block"], value["length"], value["offset"]
            if type(block) is str and _small(length) and _small(offset):
                return f'{{"block":{_quote(block)},"length":{length},"offset":{offset}}}'
        if not all(type(k) is str and k.isascii() for k in value):
            return _package(value)
        return "{" + ",".join(_quote(k) + ":" + _text(value[k]) for k in sorted(value)) + "}"
    if type(value) is list:
        return "[" + ",".join(_text(v) for v in value) + "]"
    return _package(value)


def _small(value: Any) -> bool:
    return type(value) is int and -_INT_MAX <= value <= _INT_MAX


def _package(value: Any) -> str:
    return rfc8785.dumps(value).decode("utf-8")
