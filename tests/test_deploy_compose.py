"""deploy/compose.yaml and deploy/Dockerfile, checked structurally.

No Docker engine runs here, so `docker compose config` cannot be used; the
file is parsed with PyYAML (which resolves the `<<` merge keys the way Compose
does) and checked for what an operator would trip over: a service missing,
Redis without AOF, a mounted file that does not exist, an environment
variable that is not a Seawall setting, a command Seawall or RQ would refuse.
"""
from __future__ import annotations

import re
import shutil
import subprocess
from pathlib import Path

import pytest
import yaml

from ops.cli import build_parser
from ops.config import env_name, iter_settings
from ops.settings import MetricsSettings, RetrainSettings
from servers import require
from worker.jobs import JOB_SERIALIZER

DEPLOY = Path(__file__).resolve().parents[1] / "deploy"
SETTINGS = {env_name(name) for name, *_ in iter_settings()}


@pytest.fixture(scope="module")
def compose() -> dict:
    return yaml.safe_load((DEPLOY / "compose.yaml").read_text())


@pytest.fixture(scope="module")
def services(compose) -> dict:
    return compose["services"]


def test_every_part_of_the_deployment_is_a_service(services):
    assert {"redis", "worker", "rq-cron", "rq-worker", "prometheus"} <= set(services)


def test_redis_keeps_an_append_only_file_on_a_volume(compose, services):
    redis = services["redis"]
    command = redis["command"]
    assert command[0] == "redis-server"
    assert command[command.index("--appendonly") + 1] == "yes"
    (volume,) = redis["volumes"]
    name, _, target = volume.partition(":")
    assert target == "/data" and name in compose["volumes"]


@pytest.mark.parametrize("name", ["redis", "worker"])
def test_healthchecks(services, name):
    check = services[name]["healthcheck"]
    assert check["test"][0] in {"CMD", "CMD-SHELL"} and len(check["test"]) > 1
    assert "interval" in check and "retries" in check


def test_worker_healthcheck_polls_the_metrics_port_it_listens_on(services):
    worker = services["worker"]
    env = worker["environment"]
    port = int(env["SEAWALL_METRICS_PORT"])
    assert port == MetricsSettings().port
    assert env["SEAWALL_METRICS_HOST"] == "0.0.0.0", "loopback is unreachable from Prometheus's container"
    probe = " ".join(worker["healthcheck"]["test"])
    assert f":{port}/healthz" in probe


def test_several_workers_join_one_group(services):
    worker = services["worker"]
    assert worker["deploy"]["replicas"] >= 2
    # a fixed consumer name would make every replica the same consumer
    assert "SEAWALL_WORKER_CONSUMER" not in worker["environment"]
    args = build_parser().parse_args(worker["command"][1:])
    assert worker["command"][0] == "seawall" and args.command == "serve"


@pytest.mark.parametrize("name", ["worker", "rq-cron", "rq-worker"])
def test_seawall_services_name_real_settings_and_wait_for_redis(services, name):
    service = services[name]
    env = service["environment"]
    for key in env:
        assert key in SETTINGS or key == "RQ_REDIS_URL", key
    assert env["SEAWALL_REDIS_URL"].startswith("redis://redis:")
    assert env["RQ_REDIS_URL"] == env["SEAWALL_REDIS_URL"]
    assert service["depends_on"]["redis"]["condition"] == "service_healthy"
    assert service["image"] and (DEPLOY / service["build"]["context"] / service["build"]["dockerfile"]).is_file()


def test_rq_scheduler_and_worker_use_the_schedule_module_and_queue(services):
    cron = services["rq-cron"]["command"]
    assert cron == ["rq", "cron", "ops.schedule"]
    worker = services["rq-worker"]["command"]
    assert worker[:2] == ["rq", "worker"] and worker[-1] == RetrainSettings().queue
    assert worker[worker.index("--serializer") + 1] == JOB_SERIALIZER  # the JSON jobs Seawall enqueues, never pickle


def _host_path(mounts: dict[str, str], inside: str) -> Path | None:
    """Where a path inside the container comes from in deploy/, through the bind mounts."""
    for target, source in mounts.items():
        if source.startswith(".") and (inside == target or inside.startswith(target.rstrip("/") + "/")):
            return DEPLOY / source / Path(inside).relative_to(target)
    return None


def _prometheus_mounts(services) -> tuple[dict[str, str], str]:
    prom = services["prometheus"]
    mounts = {}
    for volume in prom["volumes"]:
        source, target, *_ = volume.split(":")
        mounts[target] = source
    config_flag = next(a for a in prom["command"] if a.startswith("--config.file="))
    return mounts, config_flag.split("=", 1)[1]


def test_prometheus_reads_a_mounted_config_that_finds_every_worker_replica(services):
    mounts, config_path = _prometheus_mounts(services)
    host_path = _host_path(mounts, config_path)
    assert host_path is not None and host_path.is_file(), "the config Prometheus reads is not mounted from deploy/"
    scrape = yaml.safe_load(host_path.read_text())
    (job,) = scrape["scrape_configs"]
    # loopback targets are unreachable from the Prometheus container: the workers are found by service name
    assert "static_configs" not in job
    (sd,) = job["dns_sd_configs"]
    assert sd["names"] == ["worker"] and sd["type"] == "A"
    assert sd["port"] == int(services["worker"]["environment"]["SEAWALL_METRICS_PORT"])
    # same job name as the operator's config, so the alert rules and the dashboard apply unchanged
    operator = yaml.safe_load((DEPLOY / "prometheus" / "prometheus.yml").read_text())
    assert job["job_name"] == operator["scrape_configs"][0]["job_name"]


def test_prometheus_loads_the_operators_alert_rules(services, tmp_path):
    mounts, config_path = _prometheus_mounts(services)
    scrape = yaml.safe_load(_host_path(mounts, config_path).read_text())
    rule_files = scrape.get("rule_files") or []
    assert rule_files
    layout = tmp_path / "etc-prometheus"
    layout.mkdir()
    for pattern in rule_files:
        inside = pattern if pattern.startswith("/") else str(Path(config_path).parent / pattern)
        rules = _host_path(mounts, inside)
        assert rules is not None and rules.is_file(), pattern
        assert rules.resolve().parent == (DEPLOY / "prometheus").resolve()
        shutil.copy(rules, layout / Path(inside).name)
    # promtool (Debian's prometheus package, installed by .ci/run) checks the config and the rules it names
    require(shutil.which("promtool") is not None, "promtool is not installed (Debian package prometheus)")
    shutil.copy(_host_path(mounts, config_path), layout / "prometheus.yml")
    checked = subprocess.run(["promtool", "check", "config", str(layout / "prometheus.yml")],
                             capture_output=True, text=True, timeout=60)
    assert checked.returncode == 0, checked.stdout + checked.stderr


def test_every_bind_mount_exists(services):
    for name, service in services.items():
        for volume in service.get("volumes", []):
            source = volume.split(":")[0]
            if source.startswith((".", "/")):
                assert (DEPLOY / source).exists(), (name, source)


def test_dockerfile_copies_only_what_exists_and_runs_unprivileged():
    text = (DEPLOY / "Dockerfile").read_text()
    root = DEPLOY.parent
    copies = re.findall(r"^COPY\s+(.+)$", text, flags=re.MULTILINE)
    assert copies
    for line in copies:
        *sources, _dest = line.split()
        for source in sources:
            assert (root / source).exists(), source
    assert re.search(r"^USER\s+(?!root|0\b)\S+", text, flags=re.MULTILINE)
    assert "SEAWALL_METRICS_HOST=0.0.0.0" in text
    assert re.search(rf"^EXPOSE\s+{MetricsSettings().port}\b", text, flags=re.MULTILINE)
