"""What the `keystrata` command writes for people: the one unit style (cli/units.py),
values and error details as text (cli/render.py), and help that is complete: every
option says what it takes, the connection options name their environment variables,
no line stops at "e.g.", the top-level help gives one line per command, and `audit
search --event` lists the ledger's own event names."""

from __future__ import annotations

import io
from datetime import UTC, datetime

import click
import pytest
from click.testing import CliRunner

from keystrata.cli import render
from keystrata.cli.main import COMMANDS, SUMMARIES, cli
from keystrata.cli.units import Units, duration, si
from keystrata.ledger.entries import Event

# SI prefixes for bits, k = 1000 (IEC 80000-13; common practice for data rates); three
# significant digits is our rule.
SI_CASES = [
    (0, "0 bit"),
    (850, "850 bit"),
    (999, "999 bit"),
    (1000, "1.00 kbit"),
    (12_345, "12.3 kbit"),
    (123_456, "123 kbit"),
    (999_949, "1.00 Mbit"),  # rounds up into the next prefix, never "1e+03 kbit"
    (1_048_576, "1.05 Mbit"),
    (1_500_000_000, "1.50 Gbit"),
    (0.5, "0.5 bit"),
    (None, "-"),
]


@pytest.mark.parametrize(("value", "text"), SI_CASES)
def test_bits_use_si_prefixes_with_three_digits(value, text) -> None:
    assert si(value, "bit") == text


@pytest.mark.parametrize(
    ("seconds", "text"),
    [
        (0, "0 s"),
        (0.4, "0.4 s"),
        (45, "45 s"),
        (200, "3 min 20 s"),
        (3599.6, "1 h"),
        (7_559, "2 h 5 min"),  # the smaller unit is cut, not rounded
        (4 * 86_400 + 3 * 3_600 + 100, "4 d 3 h"),
        (None, "-"),
    ],
)
def test_durations_in_their_two_largest_units(seconds, text) -> None:
    assert duration(seconds) == text


def test_exact_units_are_whole_bits_and_seconds() -> None:
    human, exact = Units(), Units(exact=True)
    assert (human.bits(1_048_576), exact.bits(1_048_576)) == ("1.05 Mbit", "1,048,576 bit")
    assert (human.rate(320_000), exact.rate(320_000)) == ("320 kbit/s", "320,000 bit/s")
    assert (human.duration(200), exact.duration(200)) == ("3 min 20 s", "200 s")
    assert human.keys_and_bits({"keys": 12, "bits": 3072}) == "12 keys (3.07 kbit)"
    assert human.field("buffer_target_bits", 1_048_576) == "1.05 Mbit"
    assert human.field("key_ttl_seconds", 3600) == "1 h"
    assert human.field("priority", 5) == "5" and human.field("enabled", True) == "True"


def test_values_and_error_details_are_text_not_reprs() -> None:
    units = Units()
    assert render.value(["a", "b"], units) == "a, b"
    policy = {"priority": 5, "masters": ["m1", "m2"], "max_epsilon": None, "limits": {"x": 1}}
    assert render.value(policy, units) == "priority: 5\nmasters: m1, m2\nlimits.x: 1"
    assert render.entry_lines({"pair_id": "p1", "policy": policy}, units) == [
        "pair_id             p1",
        "policy.priority     5",
        "policy.masters      m1, m2",
        "policy.max_epsilon  -",
        "policy.limits.x     1",
    ]
    assert render.detail({"field": "since", "problem": "not a time"}) == "since: not a time"
    assert render.detail({"check": "database", "problem": "down"}) == "down; check database"
    lines = render.details([{"field": f"f{i}", "problem": "bad"} for i in range(25)])
    assert lines[0] == "f0: bad" and lines[-1] == "... and 5 more" and len(lines) == 21
    # A message that already says every detail is not repeated.
    assert (
        render.details([{"field": "body.x", "problem": "bad"}], said="invalid: body.x: bad") == []
    )
    now = datetime(2026, 12, 1, 10, 3, 20, tzinfo=UTC)
    assert render.age("2026-12-01T10:00:00+00:00", now) == "3 min 20 s ago"


def _walk(command: click.Command, path: list[str]):
    yield path, command
    if isinstance(command, click.Group):
        ctx = click.Context(command)
        for name in command.list_commands(ctx):
            sub = command.get_command(ctx, name)
            assert sub is not None
            yield from _walk(sub, [*path, name])


#: Commands whose help is checked elsewhere (none).
OTHERS: tuple[str, ...] = ()


def test_every_option_says_what_it_takes() -> None:
    missing, unfinished, stops_at_eg = [], [], []
    for path, command in _walk(cli, ["keystrata"]):
        if len(path) > 1 and path[1] in OTHERS:
            continue
        if not command.help:
            missing.append(" ".join(path))
        ctx = click.Context(command, info_name=path[-1])
        for line in command.get_help(ctx).splitlines():
            if line.rstrip().endswith(("e.g.", "e.g.,")):
                stops_at_eg.append(f"{' '.join(path)}: {line.strip()}")
        for param in command.params:
            if not isinstance(param, click.Option) or param.name in ("help", "version"):
                continue
            if not param.help:
                missing.append(f"{' '.join(path)} {param.opts[0]}")
            elif not param.help.rstrip().endswith((".", "]", ")")):
                unfinished.append(f"{' '.join(path)} {param.opts[0]}: {param.help[-30:]}")
    assert not missing, missing
    assert not unfinished, unfinished
    assert not stops_at_eg, stops_at_eg


def test_connection_options_name_their_variables_and_are_not_marked_required() -> None:
    for path, command in _walk(cli, ["keystrata"]):
        names = {p.name: p for p in command.params if isinstance(p, click.Option)}
        if not {"url", "ca", "cert", "key"} <= set(names) or path[1] in OTHERS:
            continue
        for name in ("url", "ca", "cert", "key"):
            option = names[name]
            assert option.envvar == f"KEYSTRATA_{name.upper()}" and option.show_envvar, path
            assert not option.required, path
        text = CliRunner().invoke(cli, [*path[1:], "--help"], terminal_width=300).output
        heads = ("--url ", "--ca ", "--cert ", "--key ")
        lines = [ln for ln in text.splitlines() if ln.strip().startswith(heads)]
        assert len(lines) == 4 and all("[env var: KEYSTRATA_" in ln for ln in lines), path
        assert not any("required" in ln for ln in lines), path


def test_the_top_level_help_gives_one_line_per_command() -> None:
    assert set(SUMMARIES) == set(COMMANDS)
    text = CliRunner().invoke(cli, ["--help"], terminal_width=80).output
    listed = text.split("Commands:\n", 1)[1].splitlines()
    assert [line.split()[0] for line in listed if line.strip()] == list(COMMANDS)
    assert all(len(line) <= 80 and "..." not in line for line in listed), listed
    assert "KEYSTRATA_URL" in text and "KEYSTRATA_CONFIG" in text


def test_audit_search_lists_every_event_of_the_ledger() -> None:
    text = CliRunner().invoke(cli, ["audit", "search", "--help"], terminal_width=2000).output
    for event in Event:
        assert event.value in text
    assert "DEVELOPERS.md" not in text
    wrong = CliRunner().invoke(cli, ["audit", "search", "--event", "key.stolen"])
    assert wrong.exit_code == 2 and "key.allocated" in wrong.output


POOLS = {
    "node_id": "relay-vela",
    "pools": [
        {
            "link_id": f"link-{name}", "peer_node_id": name, "bits_available": 1_048_576,
            "bits_used": 123_456_789, "rate_bps": 412_000.0, "planned_rate_bps": 433_000.0,
            "plan_ratio": 0.95, "last_block_at": "2026-12-04T02:00:00+00:00",
        }
        for name in ("karsvik", "tollmere", "brenhaven")
    ],
}  # fmt: skip
RELAY_PAIRS = {
    "node_id": "relay-vela", "role": "relay",
    "pairs": [{
        "pair_id": "pair-karsvik-tollmere", "in_flight_bits": 24_000, "relay_rate_bps": 320e3,
        "target_bits": 1_048_576, "time_until_empty_s": 200.0,
        "sides": [
            {"station": "karsvik", "ready_bits": 1_048_576, "owned_ready_bits": 524_288,
             "pending_bits": 48_000},
            {"station": "tollmere", "ready_bits": 10**6, "owned_ready_bits": 5 * 10**5,
             "pending_bits": 0},
        ],
    }],
}  # fmt: skip


def _printed(renderable, width: int) -> str:
    from rich.console import Console

    console = Console(width=width, record=True, file=io.StringIO())
    console.print(renderable)
    return console.export_text()


def test_screens_fit_80_columns_turning_a_wide_table_instead_of_cutting_words() -> None:
    from keystrata.cli.screens_cmd import pairs_table, pools_table

    narrow = _printed(pools_table(POOLS), 80)
    assert "…" not in narrow and max(len(line) for line in narrow.splitlines()) <= 80
    # Turned: one line per figure, one column per link.
    assert any(line.split()[:1] == ["available"] for line in narrow.splitlines())
    wide = _printed(pools_table(POOLS), 160)
    assert any(line.split()[:2] == ["link", "peer"] for line in wide.splitlines() if line.strip())
    relay = _printed(pairs_table(RELAY_PAIRS), 80)
    assert "…" not in relay and max(len(line) for line in relay.splitlines()) <= 80
    for words in ("1.05 Mbit", "320 kbit/s", "3 min 20 s", "karsvik", "tollmere", "relaying"):
        assert words in relay
    exact = _printed(pairs_table(RELAY_PAIRS, Units(exact=True)), 200)
    assert "1,048,576 bit" in exact and "200 s" in exact
