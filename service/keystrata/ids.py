"""Identifier types that must not be mixed up, and the one rule they share."""

from __future__ import annotations

import re
from typing import NewType

NodeId = NewType("NodeId", str)
LinkId = NewType("LinkId", str)
PairId = NewType("PairId", str)
PrincipalId = NewType("PrincipalId", str)
SaeId = NewType("SaeId", str)
BlockId = NewType("BlockId", str)
KeyId = NewType("KeyId", str)

#: Registry identifiers: letters, digits, dot, underscore, hyphen; 1 to 64 characters,
#: starting with a letter or digit. Safe in URLs, file names and log lines.
ID_PATTERN = r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$"
_ID_RE = re.compile(ID_PATTERN)


def is_valid_id(value: str) -> bool:
    """Return True when ``value`` is a well-formed registry identifier."""
    return bool(_ID_RE.fullmatch(value))
