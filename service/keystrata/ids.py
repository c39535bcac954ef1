"""The one rule registry identifiers share."""

from __future__ import annotations

#: Registry identifiers: letters, digits, dot, underscore, hyphen; 1 to 64 characters,
#: starting with a letter or digit. Safe in URLs, file names and log lines.
ID_PATTERN = r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$"
