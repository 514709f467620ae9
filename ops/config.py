"""Read the configuration once, at start-up, into one frozen object.

Precedence, highest first: command-line flags, environment variables, the
TOML config file, the defaults written beside each field.  Names:

* a top-level field ``redis_url`` is ``SEAWALL_REDIS_URL`` in the environment
  and ``redis_url = "..."`` at the top of the TOML file;
* a section field such as ``worker.batch`` is ``SEAWALL_WORKER_BATCH`` and
  ``[worker] batch = 256``.

The config file is named by ``--config`` or ``SEAWALL_CONFIG``.  Nothing here
runs at import time.
"""
from __future__ import annotations

import dataclasses
import json
import os
import tomllib
import types
import typing
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path

from ops.settings import ConsoleSettings, MetricsSettings, RetrainSettings, WaveSettings
from worker.settings import AmqpSettings, Keys, WorkerSettings, setting

ENV_PREFIX = "SEAWALL_"


class ConfigError(ValueError):
    """A setting could not be read; the message names the setting and the source."""


@dataclass(frozen=True, kw_only=True)
class RedisSettings:
    """How Seawall reaches Redis beyond ``redis_url``: a Redis Cluster, and where RQ keeps its jobs then."""

    cluster: bool = setting(False, "redis_url names one node of a Redis Cluster: use redis-py's cluster client "
                                   "(set keys.partitions to spread the comment stream over the shards)")
    rq_url: str = setting("", "with cluster = true: a single (non-cluster) Redis where RQ keeps its job queue "
                              "(RQ has no cluster support; rq cron and rq worker must use it too, e.g. "
                              "RQ_REDIS_URL); empty: no RQ jobs, run the retrain from the systemd timer")

    def __post_init__(self):
        if not isinstance(self.rq_url, str) or (self.rq_url and not self.rq_url.startswith(
                ("redis://", "rediss://", "unix://"))):
            raise ValueError("RedisSettings: rq_url must be empty or a redis://, rediss:// or unix:// URL")


@dataclass(frozen=True, kw_only=True)
class Config:
    """Everything Seawall needs to run, read once."""

    redis_url: str = setting(
        "redis://127.0.0.1:6379/0",
        "Redis URL: redis://[user:password@]host:port/db, rediss:// for TLS, unix:///path.sock",
    )
    redis_tls_ca: str = setting("", "CA bundle that verifies the server's certificate on rediss:// URLs")
    redis_tls_cert: str = setting("", "client certificate for mutual TLS on rediss:// URLs")
    redis_tls_key: str = setting("", "client private key for mutual TLS on rediss:// URLs")
    model_path: str = setting("", "model file to serve; empty means the registry's active model")
    log_level: str = setting("INFO", "log level: DEBUG, INFO, WARNING or ERROR")
    redis: RedisSettings = field(default_factory=RedisSettings, metadata={"help": "Redis Cluster"})
    keys: Keys = field(default_factory=Keys, metadata={"help": "Redis key names"})
    worker: WorkerSettings = field(default_factory=WorkerSettings, metadata={"help": "stream worker"})
    amqp: AmqpSettings = field(default_factory=AmqpSettings, metadata={"help": "RabbitMQ source (serve --source)"})
    retrain: RetrainSettings = field(default_factory=RetrainSettings, metadata={"help": "retraining"})
    metrics: MetricsSettings = field(default_factory=MetricsSettings, metadata={"help": "metrics"})
    waves: WaveSettings = field(default_factory=WaveSettings, metadata={"help": "waves and campaigns"})
    console: ConsoleSettings = field(default_factory=ConsoleSettings, metadata={"help": "moderators' console"})

    def __post_init__(self):
        if self.redis.cluster and self.keys.partitions == 1 and "{" not in self.keys.prefix:
            raise ValueError("on a Redis Cluster (redis.cluster = true) one commit's keys must share a slot: set "
                             "keys.partitions > 1 (one hash tag per partition), or keep one partition under a "
                             "hash-tagged prefix such as keys.prefix = '{seawall}:' (one shard does all the work)")


def _is_section(tp) -> bool:
    return isinstance(tp, type) and dataclasses.is_dataclass(tp)


def _hints(cls) -> dict:
    return typing.get_type_hints(cls)


def iter_settings(cls=Config, section: str = ""):
    """Yield ``(dotted_name, type, default, help)`` for every leaf setting."""
    hints = _hints(cls)
    for f in dataclasses.fields(cls):
        tp = hints[f.name]
        name = f"{section}.{f.name}" if section else f.name
        if _is_section(tp):
            yield from iter_settings(tp, name)
            continue
        default = f.default if f.default is not dataclasses.MISSING else f.default_factory()
        yield name, tp, default, f.metadata.get("help", "")


def env_name(dotted: str) -> str:
    return ENV_PREFIX + dotted.replace(".", "_").upper()


def _coerce(dotted: str, tp, value, source: str):
    origin = typing.get_origin(tp)
    try:
        if tp is bool:
            if isinstance(value, bool):
                return value
            text = str(value).strip().lower()
            if text in {"1", "true", "yes", "on"}:
                return True
            if text in {"0", "false", "no", "off", ""}:
                return False
            raise ValueError("expected true/false")
        if tp is int:
            if isinstance(value, bool):
                raise ValueError("expected an integer")
            return int(value)
        if tp is float:
            return float(value)
        if tp is str:
            if not isinstance(value, (str, int, float)):
                raise ValueError("expected a string")
            return str(value)
        if origin is tuple:
            if isinstance(value, str):
                value = [v.strip() for v in value.split(",") if v.strip()]
            (item_tp, *_rest) = typing.get_args(tp) or (str,)
            return tuple(_coerce(dotted, item_tp, v, source) for v in value)
        if origin in (dict, Mapping) or tp is dict:
            if isinstance(value, str):
                value = json.loads(value) if value.strip() else {}
            if not isinstance(value, Mapping):
                raise ValueError("expected a table / JSON object")
            return types.MappingProxyType(dict(value))
    except (TypeError, ValueError) as exc:
        raise ConfigError(f"config: {dotted} from {source}: bad value {value!r} ({exc})") from None
    return value


def _read_file(path: str | os.PathLike) -> dict:
    p = Path(path)
    try:
        with p.open("rb") as fh:
            return tomllib.load(fh)
    except FileNotFoundError:
        raise ConfigError(f"config: file {p} not found; check --config or SEAWALL_CONFIG") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"config: {p} is not valid TOML: {exc}") from None


def _flatten(table: Mapping, prefix: str = "") -> dict:
    flat = {}
    for k, v in table.items():
        name = f"{prefix}.{k}" if prefix else k
        if isinstance(v, Mapping) and not _is_dict_setting(name):
            flat.update(_flatten(v, name))
        else:
            flat[name] = v
    return flat


def _dict_settings() -> set[str]:
    out = set()
    for name, tp, _d, _h in iter_settings():
        if typing.get_origin(tp) in (dict, Mapping) or tp is dict:
            out.add(name)
    return out


def _is_dict_setting(name: str) -> bool:
    return name in _dict_settings()


def load_config(
    overrides: Mapping[str, object] | None = None,
    *,
    environ: Mapping[str, str] | None = None,
    config_file: str | os.PathLike | None = None,
) -> Config:
    """Build the one :class:`Config` of this process.

    Parameters
    ----------
    overrides : mapping of dotted setting name to value, from the command line.
        ``None`` values are ignored, so argparse defaults of ``None`` mean
        "not given".
    environ : the environment to read; ``os.environ`` when omitted.
    config_file : TOML file; else ``SEAWALL_CONFIG`` from ``environ``.
    """
    environ = os.environ if environ is None else environ
    known = {name: (tp, default) for name, tp, default, _h in iter_settings()}
    values: dict[str, object] = {}

    path = config_file or environ.get(ENV_PREFIX + "CONFIG")
    if path:
        for name, raw in _flatten(_read_file(path)).items():
            if name not in known:
                raise ConfigError(f"config: unknown setting {name!r} in {path}; see `seawall serve --help`")
            values[name] = _coerce(name, known[name][0], raw, str(path))

    for name, (tp, _default) in known.items():
        env = env_name(name)
        if env in environ:
            values[name] = _coerce(name, tp, environ[env], f"${env}")

    for name, raw in (overrides or {}).items():
        if raw is None:
            continue
        if name not in known:
            raise ConfigError(f"config: unknown setting {name!r}")
        values[name] = _coerce(name, known[name][0], raw, "the command line")

    return _build(Config, values)


def _build(cls, values: Mapping[str, object], section: str = ""):
    hints = _hints(cls)
    kwargs = {}
    for f in dataclasses.fields(cls):
        name = f"{section}.{f.name}" if section else f.name
        tp = hints[f.name]
        if _is_section(tp):
            kwargs[f.name] = _build(tp, values, name)
        elif name in values:
            kwargs[f.name] = values[name]
    try:
        return cls(**kwargs)
    except (TypeError, ValueError) as exc:
        raise ConfigError(f"config: {section or 'top level'}: {exc}") from None


def settings_help() -> str:
    """Every setting with its environment variable, default and meaning."""
    lines = ["settings (flag > environment > TOML file > default):"]
    for name, _tp, default, help_text in iter_settings():
        shown = default if not isinstance(default, (tuple, Mapping)) else (list(default) if isinstance(default, tuple) else dict(default))
        lines.append(f"  {name:<28} {env_name(name):<34} default {shown!r}")
        if help_text:
            lines.append(f"      {help_text}")
    return "\n".join(lines)


def example_toml() -> str:
    """A TOML file that sets every setting to its default, with its help text."""
    out = ["# Seawall configuration: every setting, at its default.", ""]
    current = None
    for name, _tp, default, help_text in iter_settings():
        section, _, leaf = name.rpartition(".")
        if section != current:
            if section:
                out += ["", f"[{section}]"]
            current = section
        out.append(f"# {help_text}")
        out.append(f"{leaf} = {_toml_value(default)}")
    return "\n".join(out) + "\n"


def _toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, float)):
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, tuple):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, Mapping):
        return "{ " + ", ".join(f"{json.dumps(str(k))} = {_toml_value(x)}" for k, x in v.items()) + " }"
    raise TypeError(v)
