"""``seawall train``: fit a model on labelled JSON Lines files and save it.

Progress (one line per epoch: loss, validation loss and AUC) goes to stderr;
the closing summary to stdout.  The thresholds printed (and stored in the
file) are the ones the deployment's settings give on the model's held-out
share (``worker.hold_fpr``, ``worker.hold_floor``, ... from ``SEAWALL_*``
variables and the config file); a warning goes to stderr when one sits at its
floor or the held-out ham is too few to measure its target.
"""
from __future__ import annotations

import argparse
import os
import sys

from ops.datafiles import read_examples, require_both_classes

# model.calibration's DEFAULT_METHOD, named here so that `seawall --help` need not import numpy and
# scipy to build this parser (tests/test_startup.py checks that the two agree).
DEFAULT_CALIBRATION = "temperature"


class _CalibrationMethods:
    """model.calibration.METHODS, imported only when argparse checks a value given on the command line."""

    def _methods(self) -> tuple[str, ...]:
        from model.calibration import METHODS

        return METHODS

    def __contains__(self, value) -> bool:
        return value in self._methods()

    def __iter__(self):
        return iter(self._methods())


def _dim(value: str):
    if value == "auto":
        return value
    try:
        return _positive(value)
    except argparse.ArgumentTypeError:
        raise argparse.ArgumentTypeError(f"must be 'auto' or a positive integer, got {value!r}") from None


def _positive(value: str) -> int:
    try:
        number = int(value)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a positive integer, got {value!r}") from None
    if number < 1:
        raise argparse.ArgumentTypeError(f"must be a positive integer, got {value!r}")
    return number


def register(sub) -> None:
    parser = sub.add_parser(
        "train",
        help="train a model on labelled JSON Lines and save it",
        description='Train on JSON Lines files of {"text": ..., "label": "spam"|"ham"} and write one model file.',
    )
    parser.add_argument("data", nargs="+", metavar="DATA.jsonl", help="labelled comments, one JSON object per line")
    parser.add_argument("--out", required=True, metavar="MODEL_FILE", help="where to write the model")
    parser.add_argument("--dim", type=_dim, default="auto", help="embedding width, or 'auto' (4th root of distinct tokens)")
    parser.add_argument("--buckets", type=_positive, default=2**18, help="hash buckets, a power of two (default 2**18)")
    parser.add_argument("--epochs", type=_positive, default=10, help="maximum passes over the data (default 10)")
    parser.add_argument("--seed", type=int, default=0, help="seed of initialisation, shuffling and validation split")
    parser.add_argument("--min-df", type=_positive, default=2, help="buckets in fewer comments get no row (default 2)")
    parser.add_argument("--calibration", choices=_CalibrationMethods(), default=DEFAULT_CALIBRATION, metavar="METHOD",
                        help="probability calibration fitted on the held-out share: identity, platt, temperature or "
                             f"isotonic (default {DEFAULT_CALIBRATION})")
    parser.add_argument("--config", metavar="FILE", default=None,
                        help="TOML config file whose [worker] targets and floors set the thresholds (default: SEAWALL_CONFIG)")
    parser.add_argument("--quiet", action="store_true", help="no per-epoch progress on stderr")
    parser.set_defaults(func=run)


def _progress(epochs: int):
    def show(report) -> None:
        parts = [f"epoch {report.epoch}/{epochs}", f"loss {report.loss:.4f}"]
        if report.val_loss is not None:
            parts.append(f"val_loss {report.val_loss:.4f}")
        if report.val_auc is not None:
            parts.append(f"val_auc {report.val_auc:.4f}")
        print("  ".join(parts), file=sys.stderr, flush=True)
    return show


def run(args) -> int:
    from model.classifier import EmbeddingClassifier
    from ops.config import load_config
    from ops.thresholds import describe, model_router, print_warnings

    worker = load_config(config_file=args.config).worker
    examples = read_examples(args.data, op="train")
    require_both_classes(examples, args.data, op="train")
    try:
        clf = EmbeddingClassifier(dim=args.dim, buckets=args.buckets, epochs=args.epochs, seed=args.seed, min_df=args.min_df,
                                  calibration=args.calibration)
    except ValueError as exc:
        # The constructor's message names the field and value; make it a one-line user error.
        from model.errors import DataError

        raise DataError(f"train: {exc}") from None
    clf.fit([e.text for e in examples], [e.label for e in examples],
            on_epoch=None if args.quiet else _progress(args.epochs))
    router = model_router(clf, worker)
    clf.thresholds = router.choice.thresholds  # stored with the model: what these settings give
    clf.save(args.out)
    s = clf.summary_
    size = os.path.getsize(args.out)
    print(
        f"trained on {s['n_train']} comments ({s['n_spam']} spam, {s['n_ham']} ham in all; "
        f"{s['n_validation']} held out) in {s['seconds']:.1f}s: d={clf.dim_}, {s['rows']} rows, "
        f"best epoch {s['best_epoch']} of {s['epochs_run']}"
    )
    val = clf.metrics_.get("validation")
    if val:
        print(f"validation: roc_auc {val['roc_auc']:.4f}  recall@1%fpr {val['recall_at_1pct_fpr']:.4f}")
    cal = clf.calibration_
    print(f"calibration: {cal.method} (slope {cal.slope:.3f}, intercept {cal.intercept:+.3f}) "
          f"on {cal.n_ham} ham, {cal.n_spam} spam held out")
    print(f"thresholds: {describe(router)}")
    print(f"wrote {args.out} ({size / 1024:.0f} KiB), version {clf.version}")
    print_warnings(router.warnings(), op="train")
    return 0
