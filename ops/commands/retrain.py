"""``seawall retrain``: run the gated retrain now (the scheduled job runs the same code).

Prints what was decided and why, and the thresholds the active model then
serves with (with a warning when one sits at its floor or the held-out ham is
too few to measure its target); ``--json`` prints the whole report, which is
also stored in Redis (``retrain:reports``, newest first).  Exit 0 when the
retrain ran (promoted, refused by the gate, or nothing to do); 2 when it
could not run (another retrain holds the lock, no active model).
"""
from __future__ import annotations

import json

from ops.commands.models import add_rescore_arg, rescore_after_switch
from ops.connection import add_connection_args, config_from_args, connect
from ops.thresholds import print_warnings


def register(sub) -> None:
    parser = sub.add_parser("retrain", help="run the gated retrain now: feedback -> candidate -> gate -> promote")
    parser.add_argument("--json", action="store_true", help="print the full report as JSON")
    add_rescore_arg(parser)
    add_connection_args(parser)
    parser.set_defaults(func=run)


def run(args) -> int:
    from ops.retrain import retrain

    config = config_from_args(args)
    client = connect(config)
    after = {}
    report = retrain(client, config.keys, config.retrain,
                     on_promoted=lambda version: after.update(rescore_after_switch(args.rescore, client, config, version)))
    report.update(after)
    warnings = _active_thresholds(client, config, report)
    if args.json:
        print(json.dumps(report, sort_keys=True))
        return 0
    labels = report.get("labels", {})
    head = {
        "promoted": f"retrain: promoted {report.get('candidate')} (was {report.get('active')})",
        "refused": f"retrain: kept {report.get('active')}; candidate {report.get('candidate') or '-'} refused",
        "skipped": f"retrain: nothing to do; {report.get('active') or 'no model'} stays active",
    }[report["decision"]]
    print(head)
    print(f"  labels: {labels.get('new', 0)} new, {labels.get('trained_new', 0)} trained, "
          f"{labels.get('holdout', 0)} held out, {labels.get('canary', 0)} canary; {report['seconds']:.1f}s")
    for reason in report["reasons"]:
        print(f"  - {reason}")
    if "serving_thresholds" in report:
        print(f"  thresholds of the active model: {report['serving_thresholds']['text']}")
    print_warnings(warnings, op="retrain")
    return 0


def _active_thresholds(client, config, report: dict) -> list[str]:
    """The active model's thresholds under the deployment's settings, added to the report; their warnings."""
    from ops.registry import Registry
    from ops.thresholds import describe, model_router

    if not report.get("active") and not report.get("promoted"):
        return []
    router = model_router(Registry(client=client, keys=config.keys).load(), config.worker)
    report["serving_thresholds"] = {"hold": router.cutoffs("").hold, "reject": router.cutoffs("").reject,
                                    "warnings": router.warnings(), "text": describe(router)}
    return router.warnings()
