"""deploy/systemd: every unit passes `systemd-analyze verify`, and the commands in it are ones Seawall and RQ accept.

`systemd-analyze verify` refuses a unit whose ExecStart binary does not exist,
so the test copies the units into a temporary directory with
/opt/seawall/venv/bin/ rewritten to this interpreter's bin directory, where
`seawall` and `rq` really are. Unknown keys and bad values are only warnings
to systemd (exit status 0), so the check also requires an empty stderr.
"""
from __future__ import annotations

import shlex
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from ops.cli import build_parser
from ops.config import env_name, iter_settings
from ops.settings import RetrainSettings
from servers import require
from worker.jobs import JOB_SERIALIZER

SYSTEMD = Path(__file__).resolve().parents[1] / "deploy" / "systemd"
INSTALL_BIN = "/opt/seawall/venv/bin/"
UNITS = sorted(p.name for p in SYSTEMD.iterdir() if p.suffix in {".service", ".timer", ".target"})
OURS = ("seawall-worker@.service", "seawall-rq-cron.service", "seawall-rq-worker.service")
HARDENING = {
    "NoNewPrivileges": "yes",
    "ProtectSystem": "strict",
    "ProtectHome": "yes",
    "PrivateTmp": "yes",
    "PrivateDevices": "yes",
    "CapabilityBoundingSet": "",
    "RestrictAddressFamilies": "AF_INET AF_INET6 AF_UNIX",
}


def parse_unit(text: str) -> dict[str, list[tuple[str, str]]]:
    """Sections of a unit file as ordered (key, value) lists; continuation lines joined."""
    sections: dict[str, list[tuple[str, str]]] = {}
    current = None
    pending = ""
    for raw in text.splitlines():
        line = pending + raw.strip()
        pending = ""
        if line.endswith("\\"):
            pending = line[:-1] + " "
            continue
        if not line or line.startswith(("#", ";")):
            continue
        if line.startswith("[") and line.endswith("]"):
            current = line[1:-1]
            sections.setdefault(current, [])
            continue
        key, _, value = line.partition("=")
        sections[current].append((key.strip(), value.strip()))
    return sections


def unit(name: str) -> dict[str, list[tuple[str, str]]]:
    return parse_unit((SYSTEMD / name).read_text())


def values(sections, section: str, key: str) -> list[str]:
    return [v for k, v in sections.get(section, []) if k == key]


def exec_argv(name: str, instance: str = "9310") -> list[str]:
    """ExecStart of a unit as argv, with %i, %H and ${SEAWALL_REDIS_URL} filled in."""
    (line,) = values(unit(name), "Service", "ExecStart")
    line = line.replace("%i", instance).replace("%H", "host1")
    assert "%" not in line and "$" not in line, line
    return shlex.split(line)


def verify(directory: Path, names: list[str]) -> subprocess.CompletedProcess:
    return subprocess.run(
        ["systemd-analyze", "verify", "--man=no", *names],
        cwd=directory,
        capture_output=True,
        text=True,
        timeout=60,
    )


def installable_copy(tmp_path: Path) -> Path:
    """The units with the install prefix pointed at this venv's real binaries."""
    venv_bin = str(Path(sys.executable).parent) + "/"
    out = tmp_path / "units"
    out.mkdir()
    for p in SYSTEMD.iterdir():
        if p.is_file():
            (out / p.name).write_text(p.read_text().replace(INSTALL_BIN, venv_bin))
    return out


def instance_name(name: str) -> str:
    return name.replace("@.", "@9310.")


@pytest.fixture
def analyze():
    require(shutil.which("systemd-analyze") is not None,
            "systemd-analyze is not installed (Debian package systemd; .ci/run installs it)")
    return verify


def test_our_units_are_all_there():
    assert set(OURS) <= set(UNITS)


@pytest.mark.parametrize("name", UNITS)
def test_systemd_analyze_verify_accepts_the_unit(name, tmp_path, analyze):
    copy = installable_copy(tmp_path)
    result = analyze(copy, [instance_name(name)])
    assert result.returncode == 0, result.stderr
    assert result.stderr.strip() == "", result.stderr


def test_verify_would_catch_a_broken_unit(tmp_path, analyze):
    # The check above relies on warnings reaching stderr: prove they do.
    copy = installable_copy(tmp_path)
    path = copy / "seawall-worker@.service"
    path.write_text(path.read_text().replace("ProtectSystem=strict", "ProtectSystem=strictest"))
    result = analyze(copy, ["seawall-worker@9310.service"])
    assert "ProtectSystem" in result.stderr or "protect system" in result.stderr.lower()
    path.write_text(path.read_text().replace(str(Path(sys.executable).parent), "/nonexistent/bin"))
    assert analyze(copy, ["seawall-worker@9310.service"]).returncode != 0


@pytest.mark.parametrize("name", OURS)
def test_services_are_hardened_and_read_the_shared_environment_file(name):
    sections = unit(name)
    for key, expected in HARDENING.items():
        assert values(sections, "Service", key) == [expected], (name, key)
    assert values(sections, "Service", "EnvironmentFile") == ["/etc/seawall/seawall.env"]
    user = values(sections, "Service", "User")
    assert user and user != ["root"]
    assert values(sections, "Service", "Restart") == ["on-failure"]
    assert values(sections, "Install", "WantedBy")


def test_worker_instances_get_their_own_consumer_name_and_metrics_port():
    sections = unit("seawall-worker@.service")
    (line,) = values(sections, "Service", "ExecStart")
    assert "--consumer %H-%i" in line and "--metrics-port %i" in line
    # SIGTERM finishes and acks the current batch; give it time before SIGKILL
    assert values(sections, "Service", "KillSignal") == ["SIGTERM"]


def test_worker_exec_start_is_accepted_by_seawall_serve():
    argv = exec_argv("seawall-worker@.service", instance="9311")
    assert argv[0] == INSTALL_BIN + "seawall"
    args = build_parser().parse_args(argv[1:])
    assert args.command == "serve"
    parsed = vars(args)
    assert "host1-9311" in parsed.values()
    assert 9311 in parsed.values() or "9311" in parsed.values()


def test_rq_cron_unit_loads_the_schedule_module_and_its_jobs(fake_redis):
    from rq.cron import CronScheduler

    argv = exec_argv("seawall-rq-cron.service")
    assert argv[:2] == [INSTALL_BIN + "rq", "cron"]
    module = argv[-1]
    assert module == "ops.schedule"
    # What `rq cron ops.schedule` does on start-up, against fakeredis.
    scheduler = CronScheduler(connection=fake_redis)
    scheduler.load_config_from_file(module)
    jobs = scheduler.get_jobs()
    assert jobs, "ops.schedule registered no cron job"
    assert {job.queue_name for job in jobs} == {RetrainSettings().queue}
    assert RetrainSettings().cron in {job.cron for job in jobs}


def test_rq_worker_unit_listens_on_the_retrain_queue():
    argv = exec_argv("seawall-rq-worker.service")
    assert argv[:2] == [INSTALL_BIN + "rq", "worker"]
    assert argv[-1] == RetrainSettings().queue
    assert argv[argv.index("--serializer") + 1] == JOB_SERIALIZER  # reads the JSON jobs Seawall enqueues, never pickle


@pytest.mark.parametrize("name", OURS)
def test_no_redis_url_on_a_command_line(name):
    # a password in argv is visible to every user who can list processes
    (line,) = values(unit(name), "Service", "ExecStart")
    assert "--url" not in line and "REDIS_URL" not in line and "redis://" not in line


def test_environment_example_names_only_real_settings():
    known = {env_name(name) for name, *_ in iter_settings()}
    lines = [ln for ln in (SYSTEMD / "seawall.env.example").read_text().splitlines() if ln and not ln.startswith("#")]
    env = dict(line.partition("=")[::2] for line in lines)
    assert env
    for key in env:
        assert key in known or key == "RQ_REDIS_URL", key
    # the RQ units read the URL RQ's click options take from RQ_REDIS_URL (rq/cli/helpers.py)
    assert env["RQ_REDIS_URL"] == env["SEAWALL_REDIS_URL"]
