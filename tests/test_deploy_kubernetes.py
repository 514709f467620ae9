"""deploy/kubernetes: the manifests parse, and the fields a user trips over line up.

No cluster runs here; each document is parsed with PyYAML and checked for
the mistakes that make pods fail quietly: a selector that does not match the
template, probes on a port the container does not open or the worker does
not listen on, a loopback metrics host inside a pod, a retrain schedule that
is not a 5-field cron string or that may overlap itself.
"""
from __future__ import annotations

from pathlib import Path

import pytest
import yaml
from croniter import croniter

from ops.cli import build_parser
from ops.config import env_name, iter_settings
from ops.settings import MetricsSettings, RetrainSettings

K8S = Path(__file__).resolve().parents[1] / "deploy" / "kubernetes"
SETTINGS = {env_name(name) for name, *_ in iter_settings()}
# kind -> the apiVersion it is served under on current Kubernetes (1.27+)
API_VERSIONS = {
    "Deployment": "apps/v1",
    "CronJob": "batch/v1",
    "ConfigMap": "v1",
    "Secret": "v1",
    "HorizontalPodAutoscaler": "autoscaling/v2",
}


def documents() -> list[dict]:
    docs = []
    for path in sorted(K8S.glob("*.yaml")):
        docs += [d for d in yaml.safe_load_all(path.read_text()) if d is not None]
    return docs


def one(kind: str, name: str | None = None) -> dict:
    found = [d for d in documents() if d["kind"] == kind and (name is None or d["metadata"]["name"] == name)]
    assert len(found) == 1, (kind, name, len(found))
    return found[0]


def config_env() -> dict[str, str]:
    env = {}
    for kind in ("ConfigMap", "Secret"):
        for doc in documents():
            if doc["kind"] == kind:
                env.update(doc.get("data") or {})
                env.update(doc.get("stringData") or {})
    return env


def container_env(container: dict) -> dict[str, str]:
    """The environment a container sees: envFrom sources, then env entries."""
    names = {d["metadata"]["name"]: d for d in documents() if d["kind"] in {"ConfigMap", "Secret"}}
    env = {}
    for source in container.get("envFrom", []):
        ref = source.get("configMapRef") or source.get("secretRef")
        doc = names[ref["name"]]
        env.update(doc.get("data") or {})
        env.update(doc.get("stringData") or {})
    for item in container.get("env", []):
        env[item["name"]] = item.get("value", "")
    return env


def test_every_document_has_a_known_kind_and_api_version():
    docs = documents()
    assert {d["kind"] for d in docs} >= {"Deployment", "CronJob", "ConfigMap"}
    for doc in docs:
        assert doc["apiVersion"] == API_VERSIONS[doc["kind"]], doc["kind"]
        assert doc["metadata"]["name"]


def test_config_map_keys_are_real_settings():
    for key in config_env():
        assert key in SETTINGS, key


def test_worker_selector_matches_its_template_labels():
    deployment = one("Deployment", "seawall-worker")
    selector = deployment["spec"]["selector"]["matchLabels"]
    labels = deployment["spec"]["template"]["metadata"]["labels"]
    assert selector and selector.items() <= labels.items()


def test_worker_probes_hit_the_port_the_worker_listens_on():
    deployment = one("Deployment", "seawall-worker")
    (container,) = deployment["spec"]["template"]["spec"]["containers"]
    ports = {p.get("name"): p["containerPort"] for p in container["ports"]}
    env = container_env(container)
    metrics_port = int(env.get("SEAWALL_METRICS_PORT", MetricsSettings().port))
    for probe, path in (("readinessProbe", "/readyz"), ("livenessProbe", "/healthz")):
        get = container[probe]["httpGet"]
        assert get["path"] == path
        port = get["port"]
        port = ports[port] if isinstance(port, str) else port
        assert port == metrics_port, (probe, port, metrics_port)
    assert metrics_port in ports.values()
    # The worker binds loopback by default (ops/settings.py MetricsSettings.host); the
    # kubelet probes the pod's IP, so inside a pod it must listen on every interface.
    assert env.get("SEAWALL_METRICS_HOST") == "0.0.0.0"


def test_worker_runs_seawall_serve_from_an_image():
    deployment = one("Deployment", "seawall-worker")
    (container,) = deployment["spec"]["template"]["spec"]["containers"]
    assert container["image"] and ":" in container["image"]
    command = container["command"] + container.get("args", [])
    assert command[0] == "seawall"
    assert build_parser().parse_args(command[1:]).command == "serve"
    assert container_env(container)["SEAWALL_REDIS_URL"].startswith(("redis://", "rediss://"))
    # no fixed consumer name: every replica must be its own consumer
    assert "SEAWALL_WORKER_CONSUMER" not in container_env(container)


def test_prometheus_annotations_name_the_metrics_port():
    deployment = one("Deployment", "seawall-worker")
    annotations = deployment["spec"]["template"]["metadata"].get("annotations", {})
    (container,) = deployment["spec"]["template"]["spec"]["containers"]
    assert int(annotations["prometheus.io/port"]) == int(container_env(container)["SEAWALL_METRICS_PORT"])


def test_retrain_cronjob_runs_the_gated_retrain_nightly_without_overlap():
    cronjob = one("CronJob", "seawall-retrain")
    spec = cronjob["spec"]
    schedule = spec["schedule"]
    # Kubernetes takes the standard 5-field form; croniter is the parser RQ's cron scheduler uses
    assert len(schedule.split()) == 5 and croniter.is_valid(schedule), schedule
    assert schedule == RetrainSettings().cron, "the CronJob and RQ's schedule should agree"
    assert spec["concurrencyPolicy"] == "Forbid"
    pod = spec["jobTemplate"]["spec"]["template"]["spec"]
    assert pod["restartPolicy"] in {"Never", "OnFailure"}
    (container,) = pod["containers"]
    assert container["image"]
    command = container["command"] + container.get("args", [])
    assert command[0] == "seawall"
    args = build_parser().parse_args(command[1:])
    assert args.command == "retrain"
    # the default hands the hold-queue re-score to an RQ worker; none runs in these manifests
    runs_rq_worker = any("rq" in (c.get("command") or [""])[0] for d in documents() if d["kind"] == "Deployment"
                         for c in d["spec"]["template"]["spec"]["containers"])
    assert runs_rq_worker or args.rescore in {"now", "off"}
    for key in container_env(container):
        assert key in SETTINGS, key


@pytest.mark.parametrize("kind", ["Deployment", "CronJob"])
def test_workloads_run_unprivileged(kind):
    doc = documents()
    (workload,) = [d for d in doc if d["kind"] == kind]
    pod = workload["spec"]["template"]["spec"] if kind == "Deployment" else workload["spec"]["jobTemplate"]["spec"]["template"]["spec"]
    assert pod["securityContext"]["runAsNonRoot"] is True
    for container in pod["containers"]:
        assert container["securityContext"]["allowPrivilegeEscalation"] is False


def test_autoscaler_targets_the_worker_on_consumer_lag():
    hpa = one("HorizontalPodAutoscaler")
    target = hpa["spec"]["scaleTargetRef"]
    deployment = one("Deployment", "seawall-worker")
    assert (target["kind"], target["name"], target["apiVersion"]) == ("Deployment", "seawall-worker", deployment["apiVersion"])
    assert 1 <= hpa["spec"]["minReplicas"] <= hpa["spec"]["maxReplicas"]
    (metric,) = hpa["spec"]["metrics"]
    assert metric["type"] == "External"
    assert metric["external"]["metric"]["name"] == "seawall_consumer_lag"


def test_lag_metric_the_autoscaler_reads_is_one_seawall_exports():
    from prometheus_client import CollectorRegistry

    from ops.metrics import build_metrics

    registry = CollectorRegistry()
    build_metrics(registry)
    names = {metric.name for metric in registry.collect()}
    assert "seawall_consumer_lag" in names


def test_readme_beside_the_manifests_names_the_adapter_and_the_aggregation():
    text = (K8S / "README.md").read_text()
    assert "external.metrics.k8s.io" in text
    assert "max(seawall_consumer_lag" in text
