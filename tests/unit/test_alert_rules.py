"""The Prometheus alerting rules shipped in deploy/prometheus/, checked with the tool of
the project that defines their format: ``promtool`` from Debian's prometheus package
(``promtool check rules``, ``promtool check config``, ``promtool test rules``; the unit
test format is Prometheus's "Unit testing for rules" page, recalled from memory).

Each rule has a unit-test file of its own (deploy/prometheus/tests/<alert>.yml) whose
series make it fire, with the summary and description it renders, and show it silent
before its ``for:`` has passed and on a healthy series beside the failing one. Every
metric name and label a rule uses must be one a node exports: names from real scrapes of
a relay and a station (in process, with the reference parser: tests/scrapes.py), labels
from the families' declarations in observability/metrics.py.

With ``CI`` set a missing promtool fails these tests; locally they are skipped.
"""

from __future__ import annotations

import ast
import os
import re
import shutil
import subprocess
from pathlib import Path
from typing import Any

import pytest
import yaml

ROOT = Path(__file__).resolve().parents[2]
PROMETHEUS = ROOT / "deploy" / "prometheus"
RULES = PROMETHEUS / "keystrata-alerts.yml"
CONFIG = PROMETHEUS / "prometheus.yml"
UNIT_TESTS = PROMETHEUS / "tests"
METRICS_SOURCE = ROOT / "service" / "keystrata" / "observability" / "metrics.py"

#: Words of PromQL (operators, modifiers, the functions the rules call), not metrics.
PROMQL_WORDS = frozenset(
    {"and", "or", "unless", "on", "ignoring", "group_left", "group_right", "by", "without"}
    | {"bool", "offset", "max", "min", "sum", "increase", "rate"}
)
#: Series Prometheus itself writes per target (Prometheus docs, "Jobs and instances",
#: from memory): up{job, instance}.
PROMETHEUS_OWN = {"up": frozenset({"job", "instance"})}
#: Labels every scraped series gets from its target (the same page).
TARGET_LABELS = frozenset({"job", "instance"})
SEVERITIES = {"critical", "warning"}


def _promtool() -> str:
    found = shutil.which("promtool") or (
        "/usr/bin/promtool" if Path("/usr/bin/promtool").is_file() else None
    )
    if found:
        return found
    if os.environ.get("CI"):
        pytest.fail("promtool is missing: .ci/run installs Debian's prometheus package")
    pytest.skip("promtool is not installed (Debian package prometheus)")


def _run(*args: str, cwd: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [_promtool(), *args], cwd=cwd, capture_output=True, text=True, timeout=120, check=False
    )


def _rules() -> list[dict[str, Any]]:
    document = yaml.safe_load(RULES.read_text())
    return [rule for group in document["groups"] for rule in group["rules"]]


ALERTS = [rule["alert"] for rule in _rules()]


# ---------------------------------------------------------------- promtool


def test_promtool_checks_the_rules() -> None:
    out = _run("check", "rules", RULES.name, cwd=PROMETHEUS)
    assert out.returncode == 0, out.stdout + out.stderr
    assert f"SUCCESS: {len(ALERTS)} rules found" in out.stdout


def test_promtool_checks_the_example_configuration(tmp_path: Path, pki: Any) -> None:
    """The example scrape configuration, with its certificate paths pointed at real
    files (a monitor certificate of the test CA), passes promtool's full check, which
    also loads the rule file it names."""
    from keystrata.api.app import route_table

    config = yaml.safe_load(CONFIG.read_text())
    assert config["rule_files"] == [RULES.name]
    (job,) = config["scrape_configs"]
    assert job["job_name"] == "keystrata"  # KeystrataNodeDown selects it
    assert job["scheme"] == "https"
    assert job["metrics_path"] in {r.path for r in route_table()}
    job["tls_config"] = {
        "ca_file": str(pki.ca),
        "cert_file": str(pki.cert("mon-cal")),
        "key_file": str(pki.key("mon-cal")),
    }
    (tmp_path / CONFIG.name).write_text(yaml.safe_dump(config))
    shutil.copy(RULES, tmp_path / RULES.name)
    out = _run("check", "config", CONFIG.name, cwd=tmp_path)
    assert out.returncode == 0, out.stdout + out.stderr
    assert f"SUCCESS: {len(ALERTS)} rules found" in out.stdout


def test_every_rule_says_how_bad_and_what_to_do() -> None:
    assert len(ALERTS) == len(set(ALERTS)) >= 10
    for rule in _rules():
        name = rule["alert"]
        assert re.fullmatch(r"Keystrata[A-Z][A-Za-z]+", name), name
        assert "for" in rule, name
        assert rule["labels"]["severity"] in SEVERITIES, name
        annotations = rule["annotations"]
        assert set(annotations) == {"summary", "description"}, name
        assert annotations["summary"].strip() and annotations["description"].strip(), name


def test_each_rule_has_its_own_unit_test_file() -> None:
    files = {p.stem for p in UNIT_TESTS.glob("*.yml")}
    assert files == set(ALERTS)


@pytest.mark.parametrize("alert", ALERTS)
def test_the_rule_fires_on_failing_series_and_not_on_healthy_ones(alert: str) -> None:
    path = UNIT_TESTS / f"{alert}.yml"
    document = yaml.safe_load(path.read_text())
    assert document["rule_files"] == [f"../{RULES.name}"]
    cases = [case for test in document["tests"] for case in test["alert_rule_test"]]
    assert {case["alertname"] for case in cases} == {alert}
    firing = [a for case in cases for a in case.get("exp_alerts") or []]
    assert firing, f"{alert}: no evaluation where it fires"
    assert any(not case.get("exp_alerts") for case in cases), f"{alert}: never shown silent"
    for expected in firing:
        assert expected["exp_annotations"]["summary"], alert  # rendered text is checked
    # A healthy series beside the failing one: some input series whose target and
    # labels no firing alert carries.
    fired = [{k: str(v) for k, v in a["exp_labels"].items() if k != "severity"} for a in firing]
    series = [_selector_labels(s["series"]) for t in document["tests"] for s in t["input_series"]]
    assert any(all(not _within(f, s) for f in fired) for s in series), alert
    out = _run("test", "rules", path.name, cwd=UNIT_TESTS)
    assert out.returncode == 0, out.stdout + out.stderr
    assert "SUCCESS" in out.stdout


def _selector_labels(series: str) -> dict[str, str]:
    return dict(re.findall(r'(\w+)="([^"]*)"', series))


def _within(small: dict[str, str], big: dict[str, str]) -> bool:
    return all(big.get(k) == v for k, v in small.items())


# ---------------------------------------------------------------- names and labels


def _names_in(expr: str) -> set[str]:
    """The metric names of a PromQL expression: identifiers outside label matchers,
    strings, ranges and durations that are not PromQL's own words."""
    stripped = re.sub(r'"[^"]*"', '""', expr)
    stripped = re.sub(r"\{[^}]*\}", "", stripped)
    stripped = re.sub(r"\[[^\]]*\]", "", stripped)
    stripped = re.sub(
        r"\b(on|by|ignoring|without|group_left|group_right)\s*\([^)]*\)", r"\1", stripped
    )
    tokens = set(re.findall(r"(?<![\w.])[A-Za-z_:][\w:]*", stripped))
    return tokens - PROMQL_WORDS


def _labels_in(rule: dict[str, Any]) -> set[str]:
    """Labels a rule reads: in matchers, in on/by lists and in its templates."""
    expr = rule["expr"]
    used = set(re.findall(r"(\w+)\s*[=!]~?\s*\"", expr))
    for group in re.findall(r"\b(?:on|by|ignoring|without)\s*\(([^)]*)\)", expr):
        used |= {g.strip() for g in group.split(",") if g.strip()}
    for text in rule["annotations"].values():
        used |= set(re.findall(r"\$labels\.(\w+)", text))
    return used


def _declared_labels() -> dict[str, frozenset[str]]:
    """Family name -> labels, as observability/metrics.py declares each family."""
    found: dict[str, frozenset[str]] = {}
    for node in ast.walk(ast.parse(METRICS_SOURCE.read_text())):
        if not (isinstance(node, ast.Call) and isinstance(node.func, ast.Name)):
            continue
        if not node.func.id.endswith("MetricFamily") or not node.args:
            continue
        first = node.args[0]
        if not (isinstance(first, ast.Constant) and isinstance(first.value, str)):
            continue
        labels: frozenset[str] = frozenset()
        for keyword in node.keywords:
            if keyword.arg == "labels" and isinstance(keyword.value, ast.List):
                labels = frozenset(
                    str(e.value) for e in keyword.value.elts if isinstance(e, ast.Constant)
                )
        found[first.value] = labels
    return found


def _family_of(sample_name: str, declared: dict[str, frozenset[str]]) -> str:
    for suffix in ("_total", "_bucket", "_sum", "_count", ""):
        base = sample_name.removesuffix(suffix) if suffix else sample_name
        if base in declared:
            return base
    raise AssertionError(f"{sample_name} is declared nowhere in {METRICS_SOURCE.name}")


def _exported_names(make_node: Any, db_factory: Any, api: Any) -> set[str]:
    """Sample names of real scrapes of a relay and a station (ledger checkpoints signed,
    so that every family is there), from the reference parser's families."""
    import relaynet
    from keystrata.ledger import checkpoints
    from keystrata.registry import provisioning
    from keystrata.registry.specs import Kind, PrincipalSpec
    from scrapes import scrape

    net = relaynet.with_ready_key(make_node, db_factory)
    names: set[str] = set()
    for node in (net.relay, net.a):
        provisioning.create(
            node.ctx,
            Kind.PRINCIPALS,
            PrincipalSpec.model_validate(
                {"principal_id": "mon-cal", "role": "monitor", "cert_subject": "mon-cal"}
            ),
            actor="test",
        )
        assert checkpoints.sign_now(node.ctx, force=True) is not None
        for family in scrape(api(node)("mon-cal")).families.values():
            suffixes = {
                "counter": ("_total",),
                "histogram": ("_bucket", "_sum", "_count"),
            }.get(family.type, ("",))
            names |= {family.name + suffix for suffix in suffixes}
            names |= {sample.name for sample in family.samples}
    return names


@pytest.mark.parametrize("db_factory", ["sqlite"], indirect=True)  # names, not storage
def test_rules_use_only_names_and_labels_the_node_exports(make_node, db_factory, api) -> None:
    exported = _exported_names(make_node, db_factory, api)
    declared = _declared_labels()
    assert "keystrata_registry_disagreements" in declared
    problems = []
    for rule in _rules():
        names = _names_in(rule["expr"])
        assert names, rule["alert"]
        labels: set[str] = set(TARGET_LABELS)
        for name in names:
            if name in PROMETHEUS_OWN:
                labels |= PROMETHEUS_OWN[name]
            elif name not in exported:
                problems.append(f"{rule['alert']}: {name} is not in a node's scrape")
            else:
                labels |= declared[_family_of(name, declared)]
        unknown = _labels_in(rule) - labels
        if unknown:
            problems.append(f"{rule['alert']}: labels {sorted(unknown)} on none of {names}")
    assert not problems, problems


def test_the_name_reader_finds_names_and_skips_promql() -> None:
    """Self-test of the reader above, so that a rule cannot pass by hiding its names."""
    expr = (
        "(keystrata_a > 0) < on (pair) group_left () (0.25 * max by (pair) (keystrata_b))"
        ' and increase(keystrata_c_total{x="keystrata_d"}[30m]) == 0 unless up{job="k"} == 0'
    )
    assert _names_in(expr) == {"keystrata_a", "keystrata_b", "keystrata_c_total", "up"}
    rule = {"expr": expr, "annotations": {"summary": "{{ $labels.link }}", "description": ""}}
    assert _labels_in(rule) == {"pair", "x", "job", "link"}
