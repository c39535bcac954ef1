"""Plots of a key-supply plan (matplotlib, no display needed).

- ``link-ID-day.EXT``: key rate and QBER against the UTC hour, one file per link;
- ``link-ID-loss.EXT``: key rate against channel loss beside the PLOB bound;
- ``pairs-supply.EXT``: daily supply against demand per pair.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import matplotlib

matplotlib.use("Agg")  # files only, whatever the environment says

import matplotlib.pyplot as plt


def _day(link: dict[str, Any], path: Path) -> None:
    hours = [h["hour_utc"] + 0.5 for h in link["hourly"]]
    fig, rate_ax = plt.subplots(figsize=(7, 3.6))
    rate_ax.plot(hours, [h["secret_key_rate_bps"] for h in link["hourly"]], "o-", label="clear sky")
    rate_ax.plot(hours, [h["expected_rate_bps"] for h in link["hourly"]], "s--", label="expected")
    rate_ax.set_xlabel("hour (UTC)")
    rate_ax.set_ylabel("secret key rate (bit/s)")
    rate_ax.set_xlim(0, 24)
    qber_ax = rate_ax.twinx()
    qber = [(h["hour_utc"] + 0.5, 100 * h["qber"]) for h in link["hourly"] if h["qber"] is not None]
    if qber:
        qber_ax.plot(*zip(*qber, strict=True), "r:", label="QBER")
    qber_ax.set_ylabel("QBER (%)", color="r")
    rate_ax.legend(loc="upper left", fontsize="small")
    rate_ax.set_title(f"{link['link_id']} ({link['protocol']})")
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)


def _loss(link: dict[str, Any], path: Path) -> None:
    sweep = [p for p in link["rate_vs_loss"] if p["plob_bound_bps"]]
    fig, ax = plt.subplots(figsize=(6, 3.6))
    ax.semilogy(
        [p["channel_loss_db"] for p in sweep],
        [p["plob_bound_bps"] for p in sweep],
        "k-",
        label="PLOB bound",
    )
    rates = [
        (p["channel_loss_db"], p["secret_key_rate_bps"]) for p in sweep if p["secret_key_rate_bps"]
    ]
    if rates:
        ax.semilogy(*zip(*rates, strict=True), "b-", label=f"{link['protocol']} (night)")
    if link["channel_loss_db"] is not None:
        ax.axvline(link["channel_loss_db"], color="g", ls="--", label="this link")
    ax.set_xlabel("channel loss (dB)")
    ax.set_ylabel("secret key rate (bit/s)")
    ax.legend(fontsize="small")
    ax.set_title(link["link_id"])
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)


def _pairs(pairs: list[dict[str, Any]], path: Path) -> None:
    planned = [p for p in pairs if p["planned"]]
    fig, ax = plt.subplots(figsize=(max(4, 1.6 * len(planned) + 2), 3.6))
    xs = range(len(planned))
    ax.bar(
        [x - 0.2 for x in xs], [p["daily_supply_bits"] or 0 for p in planned], 0.4, label="supply"
    )
    ax.bar(
        [x + 0.2 for x in xs], [p["daily_demand_bits"] or 0 for p in planned], 0.4, label="demand"
    )
    ax.set_xticks(list(xs), [p["pair_id"] for p in planned], rotation=15, fontsize="small")
    ax.set_ylabel("bits per day")
    values = [v for p in planned for v in (p["daily_supply_bits"], p["daily_demand_bits"]) if v]
    if values and max(values) > 100 * min(values):
        ax.set_yscale("log")  # supply and demand often differ by orders of magnitude
    ax.legend(fontsize="small")
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)


def write_all(answer: dict[str, Any], folder: Path, fmt: str) -> list[Path]:
    """Write every plot of ``answer`` into ``folder``; return the paths written."""
    folder.mkdir(parents=True, exist_ok=True)
    written = []
    for link in answer["links"]:
        if not link["planned"]:
            continue
        for name, draw in (("day", _day), ("loss", _loss)):
            path = folder / f"{link['link_id']}-{name}.{fmt}"
            draw(link, path)
            written.append(path)
    path = folder / f"pairs-supply.{fmt}"
    _pairs(answer["pairs"], path)
    written.append(path)
    return written
