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

from model.actions import THRESHOLD_ACTIONS
from ops.commands.models import add_rescore_arg
from ops.connection import add_connection_args, config_from_args, connect


def register(sub) -> None:
    parser = sub.add_parser("retrain", help="run the gated retrain now: feedback -> candidate -> gate -> promote")
    parser.add_argument("--json", action="store_true", help="print the full report as JSON")
    add_rescore_arg(parser)
    add_connection_args(parser)
    parser.set_defaults(func=run)


def run(args) -> int:
    from ops.rescore import describe_rescore, rescore_after_switch
    from ops.labelling import feedback_settings
    from ops.retrain import retrain
    from ops.thresholds import print_warnings

    config = config_from_args(args)
    client = connect(config)
    after = {}
    report = retrain(client, config.keys, config.retrain, feedback=feedback_settings(config.retrain, config.worker),
                     on_promoted=lambda version: after.update(rescore_after_switch(args.rescore, client, config, version)))
    report.update(after)
    warnings = _active_thresholds(client, config, report)
    if args.json:
        print(json.dumps(report, sort_keys=True))
        return 0
    print(render(report))
    if report["decision"] == "promoted":
        print(f"  {describe_rescore(report, queue=config.retrain.queue)}")
    print_warnings(warnings, op="retrain")
    return 0


_LABELS = {"active": "active", "warm_start": "warm start", "scratch": "scratch fit"}


def render(report: dict) -> str:
    """The report as text: the decision, both candidates' figures on each gate set, and why (pure)."""
    labels = report.get("labels", {})
    chosen = _LABELS.get(report.get("chosen") or "", "")
    head = {
        "promoted": f"retrain: promoted {report.get('candidate')}, the {chosen} (was {report.get('active')})",
        "refused": f"retrain: kept {report.get('active')}; the gate refused the candidates",
        "skipped": f"retrain: nothing to do; {report.get('active') or 'no model'} stays active",
        "failed": f"retrain: failed: {report.get('error')}",
    }[report["decision"]]
    lines = [head, f"  labels: {labels.get('new', 0)} new, {labels.get('trained_new', 0)} trained, "
                   f"{labels.get('holdout', 0)} held out, {labels.get('canary', 0)} canary; {report['seconds']:.1f}s"]
    gate = report.get("gate")
    candidates = report.get("candidates", {})
    for name, entry in candidates.items():
        if "not_built" in entry:
            lines.append(f"  {_LABELS[name]}: not built ({entry['not_built']})")
            continue
        t = entry.get("thresholds") or {}
        thresholds = "".join(f", {a} {t[a]:.4f}" for a in THRESHOLD_ACTIONS) if t else ""
        lines.append(f"  {_LABELS[name]}: {entry.get('version', '-')}, {entry['train_rows']} rows in "
                     f"{entry['train_seconds']:.1f}s{thresholds}")
    if gate:
        lines.append(f"  gate: {gate['rule']}")
        lines.append(f"    {'set':<8} {'rows':>5} {'spam':>5}  {'model':<11} {'ROC-AUC':>8} {'diff':>8} {'bound':>8}"
                     f"  {'recall':>7} {'diff':>8} {'bound':>8}  verdict")
        for set_name, figures in gate["sets"].items():
            first = f"    {set_name:<8} {figures['rows']:>5} {figures['spam']:>5}"
            for name in ("active", *candidates):
                if name not in figures:
                    continue
                row = f"{first if name == 'active' else ' ' * len(first)}  {_LABELS[name]:<11} " \
                      f"{figures[name]['roc_auc']:>8.5f} "
                comparison = candidates.get(name, {}).get("sets", {}).get(set_name)
                if comparison is None:
                    row += f"{'':>8} {'':>8}  {figures[name]['recall_at_gate_fpr']:>7.4f}"
                else:
                    auc, rec = comparison["roc_auc"], comparison["recall_at_gate_fpr"]
                    row += (f"{auc['difference']:>+8.4f} {auc['lower']:>+8.4f}  {rec['candidate']:>7.4f} "
                            f"{rec['difference']:>+8.4f} {rec['lower']:>+8.4f}  "
                            + ("not worse" if comparison["not_worse"] else "may be worse"))
                lines.append(row.rstrip())
    sets = tuple(gate["sets"]) if gate else ()
    lines += [f"  - {reason}" for reason in report.get("reasons", [])
              if not reason.startswith(tuple(f"{s}: " for s in sets))]
    if "serving_thresholds" in report:
        lines.append(f"  thresholds of the active model: {report['serving_thresholds']['text']}")
    return "\n".join(lines)


def _active_thresholds(client, config, report: dict) -> list[str]:
    """The active model's thresholds under the deployment's settings, added to the report; their warnings."""
    from ops.registry import Registry
    from ops.thresholds import describe, model_router

    if not report.get("active") and not report.get("promoted"):
        return []
    router = model_router(Registry(client=client, keys=config.keys).load(), config.worker)
    report["serving_thresholds"] = {**router.cutoffs("").to_dict(), "warnings": router.warnings(),
                                    "text": describe(router)}
    return router.warnings()
