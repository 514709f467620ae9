"""The reference side of ``seawall bench score``: a plain scikit-learn scoring script.

``python -m ops.bench.score_reference REFERENCE.npz < comments.jsonl``
reads JSON Lines (``id``, ``text``) from stdin, scores them in batches of
1,024 with ``HashingVectorizer(n_features=2**18, ngram_range=(1, 2),
alternate_sign=False)`` and a logistic ``SGDClassifier`` whose weights come
from the file (``coef``, ``intercept``), and prints ``{"id": ..., "score": ...}``
per comment: what a user would write around scikit-learn, with Python's
``json`` module.
"""
from __future__ import annotations

import json
import sys

BATCH = 1024


def load(path: str):
    import numpy as np
    from sklearn.feature_extraction.text import HashingVectorizer
    from sklearn.linear_model import SGDClassifier

    with np.load(path, allow_pickle=False) as arrays:
        clf = SGDClassifier(loss="log_loss")
        clf.coef_ = arrays["coef"]
        clf.intercept_ = arrays["intercept"]
    clf.classes_ = np.array([0, 1])
    clf.n_features_in_ = clf.coef_.shape[1]
    return HashingVectorizer(n_features=clf.coef_.shape[1], ngram_range=(1, 2), alternate_sign=False), clf


def main(argv: list[str]) -> int:
    vectorizer, clf = load(argv[0])
    write = sys.stdout.write

    def flush(batch):
        scores = clf.predict_proba(vectorizer.transform([r["text"] for r in batch]))[:, 1]
        for record, score in zip(batch, scores):
            write(json.dumps({"id": record.get("id"), "score": round(float(score), 6)}) + "\n")

    batch = []
    for line in sys.stdin:
        if line.strip():
            batch.append(json.loads(line))
            if len(batch) == BATCH:
                flush(batch)
                batch = []
    if batch:
        flush(batch)
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
