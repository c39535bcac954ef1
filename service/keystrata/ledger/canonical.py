"""RFC 8785 (JSON Canonicalization Scheme) for the values ledger entries hold, faster
than the pure-Python ``rfc8785`` package and byte-for-byte equal to it (the property
tests in tests/unit/test_canonical_fast.py keep that package as the reference).

What RFC 8785 asks, and how it is done here:

* Strings (section 3.2.2.2): UTF-8, with ``"`` and ``\\`` escaped, the control
  characters U+0000..U+001F written as ``\\b \\t \\n \\f \\r`` where JSON has a short
  form and as ``\\u00xx`` (lower-case hex) otherwise, everything else as it is. That is
  exactly the escaping of the standard library's C ``json`` string encoder in its
  ``ensure_ascii=False`` form. Strings that are not valid Unicode scalar values (lone
  surrogates) cannot be UTF-8 and are refused, as the package refuses them.
* Numbers (section 3.2.2.3): integers only in the I-JSON range (RFC 7493 section 2.2,
  magnitude at most 2**53 - 1); floats by ECMAScript's Number::toString (ECMA-262,
  section "Number::toString"), see :func:`_float`. NaN and the infinities are refused.
* Literals (section 3.2.2.1): ``true``, ``false``, ``null``.
* Objects (section 3.2.3): members sorted by their names as UTF-16 code units, no
  whitespace anywhere. Code-point order (Python's) differs from UTF-16 order only
  between characters at or above U+10000 and those in U+E000..U+FFFF, so names that are
  all ASCII are sorted as they are and the others by their UTF-16BE bytes.

Errors are the package's own classes (``rfc8785.CanonicalizationError`` and its
subclasses, all ``ValueError``), so callers that catch those keep working.
"""

from __future__ import annotations

import json.encoder
import math
from collections.abc import Callable
from typing import Any

from rfc8785 import CanonicalizationError, FloatDomainError, IntegerDomainError

#: I-JSON's integer range (RFC 7493 section 2.2), which RFC 8785 section 3.2.2.3 keeps.
INT_MAX = 2**53 - 1

#: The C string encoder of ``json`` (``ensure_ascii=False``): quotes and escapes a str.
_quote: Callable[[str], str] = json.encoder.encode_basestring

#: Quoted member names already seen (entries use a small, fixed set of names).
_NAMES: dict[str, str] = {}
_NAMES_MAX = 4096


def dumps(value: Any) -> bytes:
    """Return the RFC 8785 canonical UTF-8 bytes of a JSON value.

    Raises:
        rfc8785.CanonicalizationError: the value is not canonicalisable (an unsupported
            type, a non-str member name, an integer outside the I-JSON range, NaN or an
            infinity, a lone surrogate).
    """
    return utf8(text(value))


def utf8(canonical: str) -> bytes:
    """UTF-8 of canonical text; lone surrogates (not Unicode scalar values) are refused."""
    try:
        return canonical.encode("utf-8")
    except UnicodeEncodeError as err:
        raise CanonicalizationError("input contains non-UTF-8 codepoints") from err


def text(value: Any) -> str:
    """The canonical text of ``value`` as a str (not yet UTF-8; see :func:`utf8`)."""
    kind = type(value)
    if kind is str:
        return _quote(value)
    if kind is int:
        return _int(value)
    if value is None:
        return "null"
    if value is True:
        return "true"
    if value is False:
        return "false"
    if kind is list or kind is tuple:
        return "[" + ",".join([text(v) for v in value]) + "]"
    if kind is dict:
        return "{" + ",".join(members(value)) + "}"
    if kind is float:
        return _float(value)
    return _subclass(value)


def _subclass(value: Any) -> str:
    """Subclasses of the JSON types, checked in the reference package's order (so a
    ``StrEnum`` is its string and an ``IntEnum`` its number)."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return _int(int(value))
    if isinstance(value, str):
        return _quote(value)
    if isinstance(value, float):
        return _float(float(value))
    if isinstance(value, (list, tuple)):
        return "[" + ",".join([text(v) for v in value]) + "]"
    if isinstance(value, dict):
        return "{" + ",".join(members(value)) + "}"
    raise CanonicalizationError(f"unsupported type: {type(value)}")


def members(obj: dict[Any, Any]) -> list[str]:
    """The ``"name":value`` texts of an object's members, in RFC 8785 order."""
    names = list(obj)
    for name in names:
        if not isinstance(name, str):
            raise CanonicalizationError("object keys must be strings")
    if all(name.isascii() for name in names):
        names.sort()
    else:
        # UTF-16 code units, big-endian bytes compare as the units do (RFC 8785
        # section 3.2.3). A lone surrogate raises UnicodeEncodeError, as in the package.
        names.sort(key=lambda name: name.encode("utf-16be"))
    return [_name(name) + text(obj[name]) for name in names]


def _name(name: str) -> str:
    quoted = _NAMES.get(name)
    if quoted is None:
        quoted = _quote(name) + ":"
        if len(_NAMES) < _NAMES_MAX and type(name) is str:
            _NAMES[name] = quoted
    return quoted


def _int(value: int) -> str:
    if -INT_MAX <= value <= INT_MAX:
        return int.__repr__(value)
    raise IntegerDomainError(value)


def _float(value: float) -> str:
    """ECMAScript Number::toString(value) for a finite double (RFC 8785 section
    3.2.2.3 and its Appendix B samples).

    Python's ``repr`` gives the shortest digit string that reads back as the same
    double, correctly rounded, which are the digits ``s`` (``k`` of them) ECMAScript
    asks for. With ``n`` such that the value is ``0.s * 10**n`` the ECMAScript steps are:
    ``k <= n <= 21``: the digits and ``n - k`` zeros; ``0 < n <= 21``: a point after
    ``n`` digits; ``-6 < n <= 0``: ``0.``, ``-n`` zeros, the digits; otherwise the
    exponent form ``d[.ddd]e±(n - 1)``. Zero (either sign) is ``0``.
    """
    if math.isnan(value) or math.isinf(value):
        raise FloatDomainError(value)
    if value == 0:
        return "0"
    sign = ""
    if value < 0:
        sign, value = "-", -value
    mantissa, _, exponent = repr(value).partition("e")
    whole, _, fraction = mantissa.partition(".")
    shift = int(exponent) if exponent else 0
    if whole == "0":  # 0.000ddd: repr writes no exponent here
        digits = fraction.lstrip("0")
        n = shift - (len(fraction) - len(digits))
    else:
        digits = whole + fraction
        n = len(whole) + shift
    digits = digits.rstrip("0")
    k = len(digits)
    if k <= n <= 21:
        out = digits + "0" * (n - k)
    elif 0 < n <= 21:
        out = digits[:n] + "." + digits[n:]
    elif -6 < n <= 0:
        out = "0." + "0" * -n + digits
    else:
        e = n - 1
        out = digits[0] + ("." + digits[1:] if k > 1 else "") + ("e+" if e > 0 else "e-")
        out += str(abs(e))
    return sign + out
