"""``seawall models list | show | push | pull | promote | rollback``: the model registry.

A first model is bootstrapped with ``push`` then ``promote``.  ``push
--replay DATA.jsonl`` also stores a bounded replay sample of the original
training data and, unless ``--canary`` names a file, carves the fixed canary
set the retrain gate evaluates on from it.  ``promote`` and ``rollback``
switch the active model atomically, tell every worker over pub/sub, and
re-score the hold queue with the new model in this process (``--rescore
queue`` hands it to an RQ worker when one listens, ``off`` skips it); they
print which happened and how many held comments were re-scored.
"""
from __future__ import annotations

import json
import os
import sys
import time
from pathlib import Path

from model.errors import DataError
from ops.connection import add_connection_args, config_from_args, connect


# Metadata fields that hold epoch seconds: shown to people as UTC times with their age (--json keeps the numbers).
TIMES = ("created_at", "pushed_at", "promoted_at")


def register(sub) -> None:
    parser = sub.add_parser("models", help="the model registry: list, show, push, pull, promote, rollback")
    inner = parser.add_subparsers(dest="models_command", metavar="ACTION", required=True)

    p = inner.add_parser("list", help="every pushed version, newest first; * marks the active one")
    p.set_defaults(func=run_list)
    p = inner.add_parser("show", help="one version's metadata")
    p.add_argument("version")
    p.set_defaults(func=run_show)
    p = inner.add_parser("push", help="store a model file in the registry (it is loaded and checked first)")
    p.add_argument("model_file", metavar="MODEL_FILE")
    p.add_argument("--replay", metavar="DATA.jsonl", default=None,
                   help="original training data ({text, label} lines): a bounded replay sample is kept")
    p.add_argument("--canary", metavar="CANARY.jsonl", default=None,
                   help="fixed canary set for the retrain gate (default: carved from --replay)")
    p.add_argument("--promote", action="store_true", help="make the pushed version active at once (as `promote`)")
    add_rescore_arg(p)
    p.set_defaults(func=run_push)
    p = inner.add_parser("pull", help="write a version's artifact to a file")
    p.add_argument("version", nargs="?", default=None, help="default: the active version")
    p.add_argument("--out", required=True, metavar="FILE")
    p.set_defaults(func=run_pull)
    p = inner.add_parser("promote", help="make VERSION the active model on every worker")
    p.add_argument("version")
    add_rescore_arg(p)
    p.set_defaults(func=run_promote)
    p = inner.add_parser("rollback", help="make the previously promoted version active again")
    add_rescore_arg(p)
    p.set_defaults(func=run_rollback)
    for action in inner.choices.values():
        action.add_argument("--json", action="store_true", help="print the result as JSON")
        add_connection_args(action)


def add_rescore_arg(parser) -> None:
    parser.add_argument("--rescore", choices=("now", "queue", "off"), default="now",
                        help="re-score the held comments with the new model: now, in this process (default); "
                             "queue, as an RQ job when an RQ worker listens on retrain.queue (else now); "
                             "or off")


def _registry(args):
    from ops.registry import Registry

    config = config_from_args(args)
    client = connect(config)
    return config, client, Registry(client=client, keys=config.keys)


def _print(args, obj, text: str) -> None:
    print(json.dumps(obj, sort_keys=True) if args.json else text)


def run_list(args) -> int:
    _config, _client, registry = _registry(args)
    rows = registry.versions()
    if args.json:
        print(json.dumps({"active": registry.active(), "history": registry.history(), "versions": rows},
                         sort_keys=True))
        return 0
    if not rows:
        print("models: the registry is empty; push a model with `seawall models push MODEL_FILE`")
        return 0
    from ops.times import moment

    now = time.time()
    print(f"  {'VERSION':<14} {'SOURCE':<8} {'PARENT':<14} {'SIZE':>9}  {'TRAINED':<30}  LAST PROMOTED")
    for row in rows:
        mark = "*" if row["active"] == "1" else " "
        print(f"{mark} {row['version']:<14} {row.get('source', ''):<8} {row.get('parent', '') or '-':<14} "
              f"{int(row.get('size', 0)):>9,}  {moment(row.get('created_at'), now):<30}  "
              f"{moment(row.get('promoted_at'), now)}")
    return 0


def run_show(args) -> int:
    _config, _client, registry = _registry(args)
    from ops.times import moment

    meta = registry.meta(args.version)
    meta["active"] = "1" if registry.active() == args.version else "0"
    now = time.time()
    shown = {k: moment(v, now) if k in TIMES else v for k, v in meta.items()}
    _print(args, meta, "\n".join(f"{k}: {v}" for k, v in sorted(shown.items())))
    return 0


def run_push(args) -> int:
    from ops.registry import Registry, read_examples, split_replay

    config = config_from_args(args)
    try:
        data = Path(args.model_file).read_bytes()
    except OSError as exc:
        raise DataError(f"models push: cannot read {args.model_file}: {exc.strerror}") from None
    replay = canary = None
    if args.replay:
        examples = read_examples(args.replay, operation="models push --replay")
        replay, canary = split_replay(examples, replay_max=config.retrain.replay_original,
                                      canary_size=0 if args.canary else config.retrain.canary_size,
                                      seed=config.retrain.seed)
    if args.canary:
        canary = read_examples(args.canary, operation="models push --canary")
    client = connect(config)
    registry = Registry(client=client, keys=config.keys)
    pipe = client.pipeline(transaction=True)
    version = registry.push(data, pipeline=pipe)
    registry.set_examples(replay=replay, canary=canary or None, pipeline=pipe)
    pipe.execute()
    out = {"version": version, "size": len(data), "replay": len(replay or ()), "canary": len(canary or ())}
    extra = f", replay {out['replay']} rows, canary {out['canary']} rows" if (replay or canary) else ""
    text = f"models push: {version} ({len(data):,} bytes{extra})"
    if not args.promote:
        _print(args, out, f"{text}; make it active with `seawall models promote {version}`")
        return 0
    if registry.active() == version:
        _print(args, dict(out, previous=version), f"{text}; it was already the active model")
        return 0
    result = registry.promote(version, actor=os.environ.get("USER", ""), reason="seawall models push --promote")
    return _after_switch(args, config, client, dict(out, **result), "push", head=text)


def run_pull(args) -> int:
    _config, _client, registry = _registry(args)
    version = args.version or registry.active()
    if version is None:
        raise DataError("models pull: no active model; name a version (see `seawall models list`)")
    data = registry.checked_blob(version)
    tmp = f"{args.out}.tmp-{os.getpid()}"
    try:
        Path(tmp).write_bytes(data)
        os.replace(tmp, args.out)
    except OSError as exc:
        raise DataError(f"models pull: cannot write {args.out}: {exc.strerror}") from None
    _print(args, {"version": version, "out": args.out, "size": len(data)},
           f"models pull: {version} -> {args.out} ({len(data)} bytes)")
    return 0


def _after_switch(args, config, client, result: dict, kind: str, *, head: str = "") -> int:
    from ops.registry import Registry
    from ops.rescore import describe_rescore, rescore_after_switch
    from ops.thresholds import describe, model_router, print_warnings

    result = dict(result, **rescore_after_switch(args.rescore, client, config, result["version"]))
    router = model_router(Registry(client=client, keys=config.keys).load(result["version"]), config.worker)
    result["thresholds"] = {**router.cutoffs("").to_dict(), "warnings": router.warnings()}
    switched = f"is active (was {result['previous'] or 'none'})"
    text = (f"{head}; it {switched}" if head else f"models {kind}: {result['version']} {switched}")
    text += f"; {describe(router)}; " + describe_rescore(result, queue=config.retrain.queue)
    _print(args, result, text)
    print_warnings(router.warnings(), op=f"models {kind}")
    return 0


def run_promote(args) -> int:
    config, client, registry = _registry(args)
    result = registry.promote(args.version, actor=os.environ.get("USER", ""), reason="seawall models promote")
    return _after_switch(args, config, client, result, "promote")


def run_rollback(args) -> int:
    config, client, registry = _registry(args)
    result = registry.rollback(actor=os.environ.get("USER", ""), reason="seawall models rollback")
    return _after_switch(args, config, client, result, "rollback")


if __name__ == "__main__":  # pragma: no cover
    sys.exit("run as `seawall models ...`")
