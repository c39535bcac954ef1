"""Values of the node's answers as text for people: lists as ``a, b``, objects as
``name: value`` lines, error details as ``field: problem``. Never a Python repr."""

from __future__ import annotations

from collections.abc import Iterator, Mapping, Sequence
from datetime import UTC, datetime
from typing import Any

from keystrata.cli.units import NONE, Units, duration


def value(v: Any, units: Units, name: str = "") -> str:
    """One value as a table cell: lists joined with ``, ``, objects as ``name: value``
    lines (nested objects with dotted names), figures by their field's unit."""
    if v is None or v == [] or v == {}:
        return NONE
    if isinstance(v, Mapping):
        shown = [f"{k}: {text}" for k, text in flat(v, units) if text != NONE]
        return "\n".join(shown) or NONE
    if isinstance(v, list | tuple):
        return ", ".join(value(x, units) for x in v)
    return units.field(name, v)


def flat(v: Mapping[str, Any], units: Units, prefix: str = "") -> Iterator[tuple[str, str]]:
    """``(dotted name, text)`` of every member of an object, nested ones flattened."""
    for k, member in v.items():
        name = f"{prefix}{k}"
        if isinstance(member, Mapping) and member:
            yield from flat(member, units, f"{name}.")
        else:
            yield name, value(member, units, str(k))


def entry_lines(entry: Mapping[str, Any], units: Units) -> list[str]:
    """An object as aligned ``name  value`` lines (the text of ``registry show``)."""
    rows = list(flat(entry, units))
    width = max((len(k) for k, _ in rows), default=0)
    return [f"{k:<{width}}  {text}" for k, text in rows]


def detail(d: Mapping[str, Any]) -> str:
    """One entry of an error's ``details`` as ``field: problem`` (other members as
    ``name value`` pairs)."""
    field = d.get("field")
    problem = d.get("problem", d.get("message"))
    rest = {k: x for k, x in d.items() if k not in ("field", "problem", "message")}
    head = ": ".join(str(x) for x in (field, problem) if x is not None)
    tail = ", ".join(f"{k} {value(x, Units(exact=True))}" for k, x in rest.items())
    return "; ".join(x for x in (head, tail) if x) or "(no detail)"


def details(ds: Sequence[Any], limit: int = 20, said: str = "") -> list[str]:
    """Up to ``limit`` error details as lines, and a count of the ones left out; none
    when the message ``said`` holds every one of them already."""
    lines = [detail(d) if isinstance(d, Mapping) else str(d) for d in ds[:limit]]
    if said and len(ds) <= limit and all(line in said for line in lines):
        return []
    if len(ds) > limit:
        lines.append(f"... and {len(ds) - limit} more")
    return lines


def age(at: str | None, now: datetime | None = None) -> str:
    """How long ago an RFC 3339 time was, ``12 s ago`` (the time itself if unreadable)."""
    if not at:
        return NONE
    try:
        then = datetime.fromisoformat(at.replace("Z", "+00:00"))
    except ValueError:
        return at
    if then.tzinfo is None:
        then = then.replace(tzinfo=UTC)
    seconds = ((now or datetime.now(UTC)) - then).total_seconds()
    return f"{duration(max(0.0, seconds))} ago"
