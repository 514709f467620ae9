"""``seawall evaluate``: quality figures of a model on labelled JSON Lines files."""
from __future__ import annotations

import json

from model.actions import THRESHOLD_ACTIONS
from ops.datafiles import read_examples, require_both_classes


def register(sub) -> None:
    parser = sub.add_parser(
        "evaluate",
        help="ROC-AUC, average precision, recall at low false-positive rates, figures at the thresholds",
    )
    parser.add_argument("--model", required=True, metavar="MODEL_FILE", help="model file written by seawall train")
    parser.add_argument("data", nargs="+", metavar="DATA.jsonl", help="labelled comments, one JSON object per line")
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    parser.set_defaults(func=run)


def run(args) -> int:
    from model.classifier import EmbeddingClassifier
    from model.evaluation import evaluate

    clf = EmbeddingClassifier.load(args.model)
    examples = read_examples(args.data, op="evaluate")
    require_both_classes(examples, args.data, op="evaluate")
    scores = clf.predict_proba_many([e.text for e in examples])
    report = evaluate([e.label for e in examples], scores, clf.thresholds)
    report["model"] = clf.version
    if args.json:
        print(json.dumps(report, sort_keys=True))
        return 0
    print(f"model {clf.version}: {report['n']} comments ({report['n_spam']} spam, {report['n_ham']} ham)")
    for key in ("roc_auc", "average_precision", "recall_at_1pct_fpr", "recall_at_0_1pct_fpr"):
        print(f"  {key:<22} {report[key]:.4f}")
    for name in THRESHOLD_ACTIONS:
        r = report[name]
        cm = r["confusion_matrix"]
        print(
            f"  at {name} >= {r['threshold']:.4f}: precision {r['precision']:.4f}  recall {r['recall']:.4f}  "
            f"f1 {r['f1']:.4f}  fpr {r['fpr']:.4f}  (tp {cm['tp']} fp {cm['fp']} fn {cm['fn']} tn {cm['tn']})"
        )
    return 0
