"""Results of a run: bench/results.json (a list of ``{"name", "value", "unit",
"ceiling", "ratio"}``), the printed table, the issue's targets, and docs/benchmarks.md
(figures, targets, the date and the machine, then the analysis kept in
bench/limits.md)."""

from __future__ import annotations

import json
import os
import platform
import sqlite3
from collections.abc import Sequence
from datetime import UTC, datetime
from pathlib import Path

from bench.common import PG_URL, Figure, Target

LIMITS = Path(__file__).with_name("limits.md")


def write_json(path: Path, figures: Sequence[Figure]) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps([f.to_json() for f in figures], indent=2) + "\n")


def _num(value: float | None) -> str:
    if value is None:
        return "-"
    if value != value:  # NaN: nothing was measured
        return "n/a"
    if abs(value) >= 100:
        return f"{value:,.0f}"
    if abs(value) >= 10:
        return f"{value:.1f}"
    return f"{value:.2f}"


def _ratio(ratio: float | None) -> str:
    return "-" if ratio is None else f"{ratio:.3f}"


def _rows(figures: Sequence[Figure]) -> list[list[str]]:
    return [
        [
            f.name,
            _num(f.value),
            f.unit,
            _num(f.ceiling),
            "-" if f.ratio is None else f"{f.ratio:.3f}",
        ]
        for f in figures
    ]


HEADER = ["figure", "value", "unit", "ceiling", "ratio"]


def table(figures: Sequence[Figure]) -> str:
    """A plain-text table of the figures (ratio = value / ceiling)."""
    rows = [HEADER, *_rows(figures)]
    widths = [max(len(r[i]) for r in rows) for i in range(len(HEADER))]
    right = {1, 3, 4}
    lines = []
    for n, row in enumerate(rows):
        cells = [
            c.rjust(w) if i in right else c.ljust(w)
            for i, (c, w) in enumerate(zip(row, widths, strict=True))
        ]
        lines.append("  ".join(cells).rstrip())
        if n == 0:
            lines.append("  ".join("-" * w for w in widths))
    return "\n".join(lines)


def markdown_table(figures: Sequence[Figure]) -> str:
    lines = ["| " + " | ".join(HEADER) + " |", "| --- | ---: | --- | ---: | ---: |"]
    lines += ["| " + " | ".join(r) + " |" for r in _rows(figures)]
    return "\n".join(lines)


def _find(figures: Sequence[Figure], *parts: str) -> list[Figure]:
    return [f for f in figures if all(p in f.name for p in parts)]


def targets(figures: Sequence[Figure]) -> list[Target]:
    """The issue's targets, each judged on the figures of this run (None: not run)."""
    out: list[Target] = []
    for fig in _find(figures, "Get key", "clients"):
        if fig.unit != "requests/s":
            continue
        p99 = _find(figures, fig.name + " p99")
        lat = p99[0].value if p99 else float("nan")
        ratio = fig.ratio or 0.0
        out.append(
            Target(
                f"{fig.name}: >= 30% of ceiling throughput, p99 < 50 ms",
                ratio >= 0.30 and lat < 50,
                f"{ratio:.1%} of ceiling, p99 {lat:.0f} ms",
            )
        )
    for fig in _find(figures, "link key ingest"):
        ratio = fig.ratio or 0.0
        out.append(
            Target(
                f"{fig.name}: >= 50% of ceiling and >= 200 Mbit/s",
                ratio >= 0.5 and fig.value >= 200,
                f"{ratio:.1%} of ceiling, {fig.value:.0f} Mbit/s",
            )
        )
    for fig in _find(figures, "relay: ready pair key"):
        out.append(
            Target(f"{fig.name}: >= 100 Mbit/s", fig.value >= 100, f"{fig.value:.1f} Mbit/s")
        )
    for fig in _find(figures, "relay CPU per MB"):
        out.append(
            Target(f"{fig.name}: <= 0.02 CPU-s/MB", fig.value <= 0.02, f"{fig.value:.3f} CPU-s/MB")
        )
    for call, label in (
        ("Get key (enc_keys", "Get key"),
        ("Get key with key IDs", "Get key with key IDs"),
    ):
        two = [f for f in _find(figures, call, "2 workers, PostgreSQL") if f.unit == "requests/s"]
        one = [f for f in _find(figures, call, "1 worker, PostgreSQL") if f.unit == "requests/s"]
        if two and one and one[0].value > 0:
            gain = two[0].value / one[0].value
            out.append(
                Target(
                    f"{label}, PostgreSQL: two workers >= 1.6 x one worker",
                    gain >= 1.6,
                    f"{two[0].value:.0f} / {one[0].value:.0f} requests/s = {gain:.2f} x",
                )
            )
    for fig in _find(figures, "ledger", "proof p99"):
        at_million = "1,000,000 entries" in fig.name
        out.append(
            Target(
                f"{fig.name}: < 5 ms at one million entries",
                (fig.value < 5) if at_million else None,
                f"{fig.value:.2f} ms" + ("" if at_million else " (not at 1,000,000 entries)"),
            )
        )
    for fig in _find(figures, "demand trace: buffer held, adaptive"):
        horizon = fig.name[fig.name.index("(horizon") : fig.name.index(")") + 1]
        refused = _find(figures, f"adaptive target {horizon}", "503")
        share = refused[0].value if refused else float("nan")
        ratio = fig.ratio if fig.ratio is not None else float("inf")
        out.append(
            Target(
                f"demand trace, adaptive target {horizon}: <= 0.1 % of Get key answered 503 "
                "for lack of key, holding <= 0.1 of the fixed baseline's buffer",
                share <= 0.1 and ratio <= 0.1,
                f"{share:.2f} % answered 503, {ratio:.2f} of the baseline's buffer",
            )
        )
    for fig in _find(figures, "relay node peak resident memory"):
        out.append(Target(f"{fig.name}: <= 100 MB", fig.value <= 100, f"{fig.value:.0f} MB"))
    return out


def target_lines(found: Sequence[Target]) -> list[str]:
    word = {True: "MET   ", False: "MISSED", None: "n/a   "}
    return [f"{word[t.met]} {t.text} ({t.detail})" for t in found]


def _first_line(path: str) -> str:
    try:
        with open(path, encoding="utf-8") as f:
            return f.readline().strip()
    except OSError:
        return "unknown"


def machine() -> dict[str, str]:
    """What the figures ran on."""
    cpu = "unknown"
    try:
        with open("/proc/cpuinfo", encoding="utf-8") as f:
            for line in f:
                if line.startswith("model name"):
                    cpu = line.split(":", 1)[1].strip()
                    break
    except OSError:
        pass
    ram = "unknown"
    mem = _first_line("/proc/meminfo")
    if mem.startswith("MemTotal:"):
        ram = f"{int(mem.split()[1]) / 1024 / 1024:.1f} GiB"
    pg = "not reachable"
    try:
        import psycopg

        with psycopg.connect(PG_URL.replace("+psycopg", ""), connect_timeout=3) as conn:
            row = conn.execute("SHOW server_version").fetchone()
            pg = str(row[0]) if row else pg
    except Exception:  # noqa: S110 - a missing server only means "not reachable"
        pass
    return {
        "cores (nproc)": str(len(os.sched_getaffinity(0))),
        "CPU": cpu,
        "RAM": ram,
        "kernel": platform.release(),
        "Python": platform.python_version(),
        "SQLite": sqlite3.sqlite_version,
        "PostgreSQL": pg,
        "load average at start (1, 5, 15 min)": " ".join(f"{x:.2f}" for x in os.getloadavg()),
    }


def write_markdown(
    path: Path,
    figures: Sequence[Figure],
    host: dict[str, str],
    *,
    command: str,
    started: datetime,
    seconds: float,
) -> None:
    """docs/benchmarks.md: how to run, the figures of this run, the targets, the
    machine, the notes on each figure, then the analysis of the limits."""
    load_end = " ".join(f"{x:.2f}" for x in os.getloadavg())
    notes = [f"- **{f.name}**: {f.note}" for f in figures if f.note]
    text = [
        "# Benchmarks",
        "",
        "Each figure is measured beside its ceiling in the same run, on the same machine and",
        "settings; `ratio` is value / ceiling (for latencies: how many times the ceiling's",
        "latency). `make bench` (8-12 minutes) writes `bench/results.json` and this page;",
        "`make bench ARGS=--quick` is a short smoke run that writes only",
        "`build/bench/results.json`. What each figure measures is described in",
        "`bench/__main__.py` and the module of its family.",
        "",
        f"Run of {started.strftime('%Y-%m-%d %H:%M UTC')} ({seconds / 60:.1f} min): `{command}`",
        "",
        "## Machine",
        "",
        *[f"- {k}: {v}" for k, v in host.items()],
        f"- load average at the end: {load_end}",
        "",
        "The machine was shared with other work during the run, so absolute figures are",
        "noisy; the ceilings ran under the same conditions, minutes apart at most.",
        "",
        "## Figures",
        "",
        markdown_table(figures),
        "",
        "## Targets",
        "",
        *[f"- {line}" for line in target_lines(targets(figures))],
        "",
        "## Notes on the figures",
        "",
        *notes,
        "",
    ]
    if LIMITS.exists():
        text.append(LIMITS.read_text().rstrip() + "\n")
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text("\n".join(text))


def now() -> datetime:
    return datetime.now(UTC)
