"""``seawall bench calibration``: which probability calibration holds up off the model's home ground.

A model is trained on one invented community (the demo's forum, ops/lab/scenario.py,
or one of ops/lab/communities.py) and calibrated on a held-out share of that same
community, once per method (identity, Platt, temperature, isotonic).  Each is
then judged on the *other* communities' labelled comments, which it never saw:

* log loss, Brier score and expected calibration error (10 equal-width bins)
  of the calibrated probabilities;
* the share of their ordinary comments (no links, no offers) held or rejected
  under the default thresholds (targets 2 % / 0.1 % of held-out ham, floors
  0.5 / 0.9), and the share of their spam held or rejected.

The reference in the same run is scikit-learn's ``CalibratedClassifierCV``
(method="sigmoid", the frozen model, the same held-out rows): the largest
difference between its probabilities and Seawall's Platt scaling is printed.
Figures are means over the (train, other) community pairs; the worst pair is
printed beside each.
"""
from __future__ import annotations

from typing import TYPE_CHECKING

from ops.bench import report

if TYPE_CHECKING:  # numpy is imported where the bench runs, so that the CLI starts without it
    import numpy as np

HOMES = ("hl", "sq", "lc", "kc")
METHOD_ORDER = ("identity", "platt", "temperature", "isotonic")


def register(sub) -> None:
    parser = sub.add_parser("calibration", help="probability calibration methods judged on communities the model never saw")
    parser.add_argument("--train", type=int, default=3000, help="labelled comments per training community")
    parser.add_argument("--held-out", type=int, default=400, help="held-out comments the calibration is fitted on")
    parser.add_argument("--judge", type=int, default=1000, help="labelled comments per other community")
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    parser.set_defaults(func=run)


def labelled(home: str, seed: int, n: int):
    """``n`` labelled comments of community ``home`` (``hl`` is the demo's forum)."""
    from ops.lab.communities import CommunityScenario
    from ops.lab.scenario import Scenario

    if home == "hl":
        return Scenario(seed=seed).training_set(n)
    return CommunityScenario(home, seed=seed).labelled(n)


def ordinary(home: str, seed: int, n: int):
    """``n`` ordinary comments (no link, price or offer) of community ``home``."""
    from ops.lab.communities import CommunityScenario
    from ops.lab.scenario import Scenario

    if home == "hl":
        rows = [c for c in Scenario(seed=seed).training_set(4 * n) if c.label == 0 and not _offer(c.text)]
        return rows[:n]
    return CommunityScenario(home, seed=seed).ordinary(n)


def _offer(text: str) -> bool:
    return any(mark in text for mark in ("http", "£", "%", "free", "Free", "price", "07700"))


def calibration_errors(p: np.ndarray, y: np.ndarray) -> tuple[float, float, float]:
    """Log loss, Brier score and expected calibration error (10 equal-width bins)."""
    import numpy as np

    q = np.clip(p, 1e-7, 1 - 1e-7)
    log_loss = float(-np.mean(y * np.log(q) + (1 - y) * np.log(1 - q)))
    brier = float(np.mean((p - y) ** 2))
    bins = np.minimum((p * 10).astype(int), 9)
    ece = sum(abs(p[bins == b].mean() - y[bins == b].mean()) * np.mean(bins == b) for b in range(10) if np.any(bins == b))
    return log_loss, brier, float(ece)


def sklearn_sigmoid(model, texts, labels):
    """scikit-learn's Platt scaling of ``model`` (frozen) fitted on ``texts``: a function texts -> probabilities."""
    import numpy as np
    from sklearn.base import BaseEstimator, ClassifierMixin
    from sklearn.calibration import CalibratedClassifierCV
    from sklearn.frozen import FrozenEstimator

    class RawLogOdds(ClassifierMixin, BaseEstimator):
        """The model's raw log-odds as a fitted scikit-learn binary classifier."""

        def __init__(self, clf=None):
            self.clf = clf

        def fit(self, X, y):
            self.classes_ = np.array([0, 1])
            return self

        def decision_function(self, X):
            return self.clf.logits_many([str(x) for x in X])

        def predict(self, X):
            return (self.decision_function(X) > 0).astype(int)

    frozen = FrozenEstimator(RawLogOdds(model).fit(None, None))
    ref = CalibratedClassifierCV(frozen, method="sigmoid").fit(np.asarray(texts, dtype=object), np.asarray(labels))
    return lambda xs: ref.predict_proba(np.asarray(xs, dtype=object))[:, 1]


def measure(n_train: int, n_held: int, n_judge: int) -> dict:
    import numpy as np

    from model.actions import FLAGGED_ACTIONS
    from model.classifier import EmbeddingClassifier
    from worker.routing import Router, RoutingSettings

    figures: dict[str, list] = {m: [] for m in METHOD_ORDER}
    sk_gap = 0.0
    for home in HOMES:
        train, held = labelled(home, 7, n_train), labelled(home, 8, n_held)
        base = EmbeddingClassifier(seed=0, calibration="identity").fit([c.text for c in train], [c.label for c in train])
        held_texts, held_y = [c.text for c in held], [c.label for c in held]
        models = {}
        for method in METHOD_ORDER:
            models[method] = EmbeddingClassifier.from_bytes(base.to_bytes())
            models[method].calibrate(held_texts, held_y, method=method)
        reference = sklearn_sigmoid(models["platt"], held_texts, held_y)  # the same (saved, int8) model
        for other in HOMES:
            if other == home:
                continue
            judge = labelled(other, 9, n_judge)
            texts, y = [c.text for c in judge], np.array([c.label for c in judge], dtype=np.float64)
            plain = [c.text for c in ordinary(other, 3, 500)]
            sk_gap = max(sk_gap, float(np.max(np.abs(reference(texts) - models["platt"].predict_proba_many(texts)))))
            for method, model in models.items():
                router = Router.for_model(model, RoutingSettings())
                p = model.predict_proba_many(texts)
                flagged = [d.action in FLAGGED_ACTIONS for d in router.decide_many(p, [""] * len(p))]
                plain_p = model.predict_proba_many(plain)
                plain_flagged = [d.action in FLAGGED_ACTIONS for d in router.decide_many(plain_p, [""] * len(plain_p))]
                figures[method].append((*calibration_errors(p, y), float(np.mean(plain_flagged)),
                                        float(np.mean(np.array(flagged)[y == 1]))))
    rows = {}
    for method, values in figures.items():
        v = np.array(values)
        rows[method] = {
            "log_loss": round(float(v[:, 0].mean()), 4), "log_loss_worst": round(float(v[:, 0].max()), 4),
            "brier": round(float(v[:, 1].mean()), 4), "ece": round(float(v[:, 2].mean()), 4),
            "ordinary_flagged": round(float(v[:, 3].mean()), 4), "ordinary_flagged_worst": round(float(v[:, 3].max()), 4),
            "spam_flagged": round(float(v[:, 4].mean()), 4), "spam_flagged_worst": round(float(v[:, 4].min()), 4),
        }
    rows["pairs"] = len(figures["identity"])
    rows["sklearn_sigmoid_max_abs_difference"] = sk_gap
    return rows


def as_text(rows: dict) -> dict:
    """One readable line per method (worst pair in brackets)."""
    out = {}
    for method in METHOD_ORDER:
        r = rows[method]
        out[method] = (f"log loss {r['log_loss']:.3f} ({r['log_loss_worst']:.3f})  Brier {r['brier']:.3f}  "
                       f"ECE {r['ece']:.3f}  ordinary comments flagged {r['ordinary_flagged']:.2%} "
                       f"({r['ordinary_flagged_worst']:.1%})  spam flagged {r['spam_flagged']:.1%} "
                       f"({r['spam_flagged_worst']:.1%})")
    out["pairs"] = rows["pairs"]
    out["scikit-learn sigmoid vs platt"] = f"largest difference {rows['sklearn_sigmoid_max_abs_difference']:.1e}"
    return out


def run(args) -> int:
    if args.train < 100 or args.held_out < 50 or args.judge < 100:
        from model.errors import DataError

        raise DataError("bench calibration: --train must be >= 100, --held-out >= 50 and --judge >= 100")
    rows = measure(args.train, args.held_out, args.judge)
    report("seawall bench calibration (means over train/other community pairs; worst pair in brackets)",
           rows if args.json else as_text(rows), as_json=args.json)
    return 0
