"""The operator's monitoring files: promtool checks and tests, and queries that name real metrics."""
from __future__ import annotations

import json
import re
import shutil
import subprocess
from pathlib import Path

import pytest
import yaml

from fullmetrics import full_exposition
from servers import require

DEPLOY = Path(__file__).resolve().parents[1] / "deploy"
PROM = DEPLOY / "prometheus"
METRIC = re.compile(r"\b(seawall_[a-z0-9_]+|up)\b")
# what Prometheus itself provides, beside what Seawall exports
BUILTIN = {"up"}


def promtool(*args, cwd=PROM):
    require(shutil.which("promtool") is not None, "promtool not on PATH (Debian package prometheus)")
    return subprocess.run(["promtool", *args], cwd=cwd, capture_output=True, text=True, timeout=60)


def test_promtool_checks_rules_and_config():
    rules = promtool("check", "rules", "seawall-rules.yml")
    assert rules.returncode == 0, rules.stdout + rules.stderr
    config = promtool("check", "config", "prometheus.yml")
    assert config.returncode == 0, config.stdout + config.stderr


def test_promtool_unit_tests_pass():
    result = promtool("test", "rules", "tests.yml")
    assert result.returncode == 0, result.stdout + result.stderr


def test_promtool_unit_tests_catch_a_broken_rule(tmp_path):
    """The unit tests are not vacuous: a rule with a wrong threshold fails them."""
    shutil.copy(PROM / "tests.yml", tmp_path / "tests.yml")
    rules = (PROM / "seawall-rules.yml").read_text()
    assert "max by (job) (seawall_consumer_lag) > 1000" in rules
    (tmp_path / "seawall-rules.yml").write_text(rules.replace("(seawall_consumer_lag) > 1000", "(seawall_consumer_lag) > 100000"))
    result = promtool("test", "rules", "tests.yml", cwd=tmp_path)
    assert result.returncode != 0 and "SeawallLagGrowing" in result.stdout + result.stderr


def alerts():
    doc = yaml.safe_load((PROM / "seawall-rules.yml").read_text())
    return {r["alert"]: r for g in doc["groups"] for r in g["rules"] if "alert" in r}


def test_every_alert_has_a_firing_and_a_quiet_test():
    tests = yaml.safe_load((PROM / "tests.yml").read_text())["tests"]
    cases = [c for t in tests for c in t.get("alert_rule_test", [])]
    for name in alerts():
        mine = [c for c in cases if c["alertname"] == name]
        assert any(c.get("exp_alerts") for c in mine), f"{name}: no firing test"
        assert any(not c.get("exp_alerts") for c in mine), f"{name}: no quiet test"


@pytest.mark.parametrize("alert", ["SeawallWaveActive", "SeawallLagGrowing", "SeawallDeadLetterSurge",
                                   "SeawallModelStale", "SeawallRetrainNotPromoted", "SeawallNoWorkerUp"])
def test_the_issue_alerts_exist(alert):
    assert alert in alerts()


def exported(name: str, names: set[str]) -> bool:
    return name in names or name in BUILTIN


def test_alert_queries_name_exported_metrics():
    _text, names = full_exposition()
    for name, rule in alerts().items():
        used = set(METRIC.findall(rule["expr"]))
        assert used, name
        assert all(exported(m, names) for m in used), (name, used - names)


def test_dashboard_queries_name_exported_metrics():
    _text, names = full_exposition()
    dash = json.loads((DEPLOY / "dashboards" / "seawall.json").read_text())
    exprs = [t["expr"] for p in dash["panels"] for t in p["targets"]]
    assert len(exprs) >= 10
    for expr in exprs:
        used = set(METRIC.findall(expr))
        assert used and all(exported(m, names) for m in used), (expr, used - names)
    titles = " ".join(p["title"].lower() for p in dash["panels"])
    for topic in ("throughput", "flagged ratio by site", "waves", "p99", "lag", "dead letters", "model version"):
        assert topic in titles, topic


def test_the_metric_check_would_catch_a_typo():
    _text, names = full_exposition()
    assert not exported("seawall_comment_total", names)
    assert exported("seawall_verdict_latency_seconds_bucket", names)
