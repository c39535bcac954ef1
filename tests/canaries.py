"""Canaries for key material: known byte patterns, and a scanner that finds any window of
a secret in raw bytes, hex, Base64 (both alphabets, every alignment) or a Python bytes
literal, in any haystack (error bodies, ledger entries, logs, metrics)."""

from __future__ import annotations

import ast
import base64
import hashlib
import re
from collections.abc import Iterator
from dataclasses import dataclass, field

RAW = 16  # bytes per raw window; a leaked run of RAW + STEP bytes always holds one


STEP = 8


TEXT = 32  # characters per hex or Base64 window


@dataclass
class Scanner:
    """Windows of every secret in every encoding, and a search over any haystack."""

    raw: set[bytes] = field(default_factory=set)
    hexa: set[str] = field(default_factory=set)
    b64: set[str] = field(default_factory=set)
    count: int = 0

    def add(self, secret: bytes) -> None:
        assert len(secret) >= RAW + STEP, "secrets shorter than 24 bytes are not scanned"
        self.count += 1
        starts = [*range(0, len(secret) - RAW + 1, STEP), len(secret) - RAW]
        self.raw.update(secret[i : i + RAW] for i in starts)
        h = secret.hex()
        self.hexa.update(h[j : j + TEXT] for j in range(0, len(h) - TEXT + 1, 2 * STEP))
        for shift in range(3):
            for encode in (base64.b64encode, base64.urlsafe_b64encode):
                text = encode(secret[shift:]).decode()
                body = len(text) - 4  # the last group depends on where the leak ends
                self.b64.update(text[j : j + TEXT] for j in range(0, body - TEXT + 1, 4))

    def find(self, haystack: bytes | str) -> list[str]:
        """Return how a secret shows in ``haystack`` (empty: it does not)."""
        if isinstance(haystack, str):
            text = haystack
            data = haystack.encode("utf-8", "surrogateescape")
        else:
            data = bytes(haystack)
            text = data.decode("latin-1")
        found = []
        if any(data[i : i + RAW] in self.raw for i in range(len(data) - RAW + 1)):
            found.append("raw bytes")
        if any(text[i : i + TEXT] in self.b64 for i in range(len(text) - TEXT + 1)):
            found.append("Base64")
        lower = text.lower()
        if any(lower[i : i + TEXT] in self.hexa for i in range(len(lower) - TEXT + 1)):
            found.append("hex")
        for literal in _bytes_literals(text):
            if any(literal[i : i + RAW] in self.raw for i in range(len(literal) - RAW + 1)):
                found.append("bytes literal")
        return found


_LITERAL = re.compile(r"""b'(?:[^'\\]|\\.)*'|b"(?:[^"\\]|\\.)*\"""")


def _bytes_literals(text: str) -> Iterator[bytes]:
    for match in _LITERAL.finditer(text):
        try:
            value = ast.literal_eval(match.group(0))
        except (ValueError, SyntaxError):
            continue
        if isinstance(value, bytes):
            yield value


def pattern(label: str, n: int) -> bytes:
    """``n`` known bytes: SHA-256(label || counter) blocks, concatenated."""
    out = b"".join(hashlib.sha256(f"{label}:{i}".encode()).digest() for i in range((n + 31) // 32))
    return out[:n]


#: The link key a hostile or confused client puts into refused requests: in a path
#: segment (URL-safe Base64, RFC 4648 section 5), the query (standard Base64, section 4,
#: percent-encoded; and hex) and a header.
LINK_KEY = pattern("canary:refused link key", 48)


def probe(key: bytes, template: str) -> tuple[str, dict[str, str]]:
    """A path holding ``key`` in a segment and the query, and headers holding it."""
    import urllib.parse

    segment = base64.urlsafe_b64encode(key).decode().rstrip("=")
    query = urllib.parse.urlencode({"key_ID": base64.b64encode(key).decode(), "x": key.hex()})
    headers = {"x-key": base64.b64encode(key).decode(), "x-key-hex": key.hex()}
    return template.format(segment) + "?" + query, headers
