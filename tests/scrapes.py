"""Prometheus scrapes of a node, read with the reference parser (``prometheus_client``)."""

from __future__ import annotations

from typing import Any

from prometheus_client.exposition import CONTENT_TYPE_PLAIN_0_0_4
from prometheus_client.parser import text_string_to_metric_families

METRICS, LIVE, READY = "/api/v1/metrics", "/api/v1/health/live", "/api/v1/health/ready"


class Scrape:
    """A parsed scrape: families by name, and sample lookup by name and labels."""

    def __init__(self, body: str) -> None:
        self.text = body
        self.families = {f.name: f for f in text_string_to_metric_families(body)}

    def samples(self, name: str) -> dict[frozenset[tuple[str, str]], float]:
        return {
            frozenset(s.labels.items()): s.value
            for f in self.families.values()
            for s in f.samples
            if s.name == name
        }

    def value(self, name: str, **labels: str) -> float:
        return self.samples(name)[frozenset(labels.items())]


def scrape(client: Any) -> Scrape:
    r = client.get(METRICS)
    assert r.status_code == 200, r.text
    # Without an Accept header, prometheus_client's negotiation picks text format 0.0.4.
    assert r.headers["content-type"] == CONTENT_TYPE_PLAIN_0_0_4
    return Scrape(r.text)
