"""``seawall serve``: run stream workers that turn comments into verdicts.

One process runs one consumer of the ``workers`` group; ``--processes N``
supervises N of them, each with its own consumer name.  The same command on
other hosts joins the same group.  With ``keys.partitions`` > 1 the workers
share the partitions through leases (``worker.lease_ms``): each partition has
one reader at a time, and each worker logs the partitions it holds.  SIGTERM or SIGINT finishes and acks the
batch in hand, then exits 0.
"""
from __future__ import annotations

import argparse
import signal
import sys

from ops.config import load_config, settings_help

# Flag -> dotted setting; a flag left out (None) leaves the setting to env, file and defaults.
FLAGS = {
    "redis": "redis_url",
    "source": "amqp.url",
    "model": "model_path",
    "consumer": "worker.consumer",
    "batch": "worker.batch",
    "block_ms": "worker.block_ms",
    "processes": "worker.processes",
    "log_level": "log_level",
    "metrics_port": "metrics.port",
    "metrics_host": "metrics.host",
}


def register(sub) -> None:
    parser = sub.add_parser(
        "serve",
        help="run stream workers: comments in, verdicts out",
        description=__doc__.split("\n\n", 1)[1],
        epilog=settings_help(),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--redis", metavar="URL", help="Redis URL (redis://, rediss://, unix://); sets redis_url")
    parser.add_argument("--source", metavar="URL",
                        help="where comments come from: an amqp:// or amqps:// RabbitMQ URL; sets amqp.url "
                             "(default: the Redis stream)")
    parser.add_argument("--model", metavar="MODEL_FILE", help="model file to serve; reloaded when it changes")
    parser.add_argument("--consumer", metavar="NAME", help="consumer name in the group (default <hostname>-<pid>)")
    parser.add_argument("--batch", type=int, metavar="N", help="entries per read and per model call")
    parser.add_argument("--block-ms", type=int, metavar="N", help="how long one read waits for entries")
    parser.add_argument("--processes", type=int, metavar="N", help="consumer processes on this host")
    parser.add_argument("--config", metavar="FILE", help="TOML config file (else $SEAWALL_CONFIG)")
    parser.add_argument("--log-level", metavar="LEVEL", help="DEBUG, INFO, WARNING or ERROR")
    parser.add_argument("--metrics-port", type=int, metavar="PORT",
                        help="/metrics, /healthz, /readyz port (default 9310; process i of N uses PORT+i; 0: off)")
    parser.add_argument("--metrics-host", metavar="HOST", help="metrics bind address (default 127.0.0.1)")
    parser.set_defaults(func=run)


def run(args) -> int:
    overrides = {setting: getattr(args, flag) for flag, setting in FLAGS.items()}
    config = load_config(overrides, config_file=args.config)
    if config.worker.processes > 1:
        return run_many(args, config)
    return serve_one(config)


def serve_one(config) -> int:
    """One consumer in this process until SIGTERM/SIGINT."""
    from ops.labelling import start_feedback
    from ops.monitor import start_observability
    from ops.serving import build_consumer, configure_logging, model_source
    from worker.consumer import default_consumer_name

    name = config.worker.consumer or default_consumer_name()
    configure_logging(config.log_level, tag=name)
    source = model_source(config)
    source.current()  # a bad model file fails here, before anything is read
    observability = start_observability(config)  # metrics endpoint, wave detector (it only observes)
    consumer = build_consumer(config, source=source, observer=observability.observer, consumer=name)
    feedback = start_feedback(config, worker_consumer=name, observer=observability.observer)  # labels -> labelled store
    for sig in (signal.SIGTERM, signal.SIGINT):
        signal.signal(sig, lambda *_: consumer.stop())
    try:
        return consumer.run()
    finally:
        if feedback is not None:
            feedback.stop()
        observability.stop()


def run_many(args, config) -> int:
    """N one-process children, each ``<consumer>-<i>``, supervised here."""
    from ops.processes import ProcessGroup
    from ops.serving import configure_logging
    from worker.consumer import default_consumer_name

    base = config.worker.consumer or default_consumer_name()
    configure_logging(config.log_level, tag=f"{base}-supervisor")
    passed = []
    for flag, _setting in FLAGS.items():
        value = getattr(args, flag)
        if value is not None and flag not in ("processes", "consumer", "metrics_port"):
            passed += [f"--{flag.replace('_', '-')}", str(value)]
    if args.config:
        passed += ["--config", args.config]

    def argv_for(i: int) -> list[str]:
        port = config.metrics.port + i if config.metrics.port else 0  # one metrics endpoint per process
        return [sys.executable, "-m", "ops.cli", "serve", *passed, "--processes", "1", "--consumer", f"{base}-{i}",
                "--metrics-port", str(port)]

    return ProcessGroup(n=config.worker.processes, argv_for=argv_for).run()
