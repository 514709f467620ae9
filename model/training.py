"""Mini-batch Adam with sparse updates for the averaged-embedding network.

One routine, :func:`update`, takes one gradient step on one batch.  Fitting,
warm-started batch learning and learning from a single labelled comment all
call it, so they cannot drift apart.

The embedding table uses lazy ("sparse") Adam: a step updates the first and
second moments, and the weights, of the rows the batch touches and of no
other row (as in TensorFlow's LazyAdam).  Rows a batch does not touch keep
their weights *and* their moments bit for bit.  The dense head uses ordinary
Adam (Kingma & Ba 2015).
"""
from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp

from model import network

BETA1 = 0.9
BETA2 = 0.999
EPSILON = 1e-8


@dataclass
class Weights:
    """The trainable parameters: the full embedding table and the dense head."""

    table: np.ndarray
    head: dict[str, np.ndarray]

    def copy(self) -> "Weights":
        return Weights(self.table.copy(), {k: v.copy() for k, v in self.head.items()})


@dataclass
class Optimizer:
    """Adam moments and step count; lazily sized to the table."""

    learning_rate: float
    l2: float = 0.0
    step: int = 0
    m_table: np.ndarray | None = None
    v_table: np.ndarray | None = None
    m_head: dict[str, np.ndarray] = field(default_factory=dict)
    v_head: dict[str, np.ndarray] = field(default_factory=dict)

    def ensure(self, weights: Weights) -> None:
        if self.m_table is None or self.m_table.shape != weights.table.shape:
            self.m_table = np.zeros_like(weights.table)
            self.v_table = np.zeros_like(weights.table)
        for k, v in weights.head.items():
            if k not in self.m_head or self.m_head[k].shape != v.shape:
                self.m_head[k] = np.zeros_like(v)
                self.v_head[k] = np.zeros_like(v)


def log_loss(p: np.ndarray, y: np.ndarray, w: np.ndarray) -> float:
    """Weighted mean binary cross-entropy of probabilities ``p``."""
    p = np.clip(p, 1e-12, 1 - 1e-12)
    ll = -(y * np.log(p) + (1 - y) * np.log1p(-p))
    return float(np.sum(w * ll) / max(float(np.sum(w)), 1e-12))


def log_loss_from_logits(z: np.ndarray, y: np.ndarray, w: np.ndarray) -> float:
    """Weighted mean binary cross-entropy of logits ``z``: ``softplus(z) - y z``, exact for any ``z``."""
    ll = np.logaddexp(0.0, z) - y * z
    return float(np.dot(w, ll) / max(float(np.sum(w)), 1e-12))


def batch_gradients(weights: Weights, batch: sp.csr_matrix, y: np.ndarray, w: np.ndarray):
    """Loss and gradients of one batch (weighted mean log loss).

    Returns ``(loss, rows, d_rows, d_head)``; ``d_rows`` is the gradient of
    ``weights.table[rows]``, the rows the batch touches.
    """
    rows, local = network.localize(batch)
    z, cache = network.forward(local, weights.table[rows], weights.head)
    p = network.sigmoid(z)
    total = max(float(np.sum(w)), 1e-12)
    dz = (p - y) * w / total
    d_rows, d_head = network.backward(cache, dz, weights.head)
    return log_loss_from_logits(z, y, w), rows, d_rows, d_head


def update(weights: Weights, opt: Optimizer, batch: sp.csr_matrix, y: np.ndarray, w: np.ndarray) -> float:
    """One Adam step on one batch; returns the batch loss before the step.

    Only ``weights.table[rows]`` (and their moments) change, where ``rows``
    are the buckets present in ``batch``.
    """
    opt.ensure(weights)
    loss, rows, d_rows, d_head = batch_gradients(weights, batch, y, w)
    opt.step += 1
    t = opt.step
    lr = np.float32(opt.learning_rate * np.sqrt(1.0 - BETA2**t) / (1.0 - BETA1**t))
    if rows.size:
        if opt.l2:
            d_rows = d_rows + np.float32(opt.l2) * weights.table[rows]
        _adam_rows(weights.table, opt.m_table, opt.v_table, rows, d_rows, lr)
    for k, g in d_head.items():
        _adam_dense(weights.head[k], opt.m_head[k], opt.v_head[k], g, lr)
    return loss


def _adam_rows(table, m_table, v_table, rows, grad, lr) -> None:
    """Lazy Adam on ``rows`` only: gather, update in place, scatter back."""
    m = m_table[rows]
    m *= BETA1
    m += (1.0 - BETA1) * grad
    v = v_table[rows]
    v *= BETA2
    v += (1.0 - BETA2) * (grad * grad)
    m_table[rows] = m
    v_table[rows] = v
    np.sqrt(v, out=v)
    v += EPSILON
    m *= lr
    m /= v
    table[rows] -= m


def _adam_dense(param, m, v, grad, lr) -> None:
    m *= BETA1
    m += (1.0 - BETA1) * grad
    v *= BETA2
    v += (1.0 - BETA2) * (grad * grad)
    param -= (lr * m / (np.sqrt(v) + EPSILON)).astype(param.dtype, copy=False)


def row_slice(matrix: sp.csr_matrix, start: int, stop: int) -> sp.csr_matrix:
    """Rows ``start:stop`` of a canonical CSR matrix, as views of its arrays (no checks, no copies)."""
    lo, hi = matrix.indptr[start], matrix.indptr[stop]
    out = sp.csr_matrix((stop - start, matrix.shape[1]), dtype=matrix.dtype)
    out.data = matrix.data[lo:hi]
    out.indices = matrix.indices[lo:hi]
    out.indptr = matrix.indptr[start:stop + 1] - lo
    return out


def predict_logits(weights: Weights, matrix: sp.csr_matrix, chunk: int = 4096) -> np.ndarray:
    """Logits for every row of ``matrix`` (no gradients)."""
    out = np.empty(matrix.shape[0], dtype=np.float64)
    for start in range(0, matrix.shape[0], chunk):
        part = matrix[start:start + chunk]
        rows, local = network.localize(part)
        z, _ = network.forward(local, weights.table[rows], weights.head)
        out[start:start + part.shape[0]] = z
    return out


@dataclass
class EpochReport:
    """One line of training progress."""

    epoch: int
    loss: float
    val_loss: float | None
    val_auc: float | None


def run_epochs(
    weights: Weights,
    opt: Optimizer,
    matrix: sp.csr_matrix,
    y: np.ndarray,
    w: np.ndarray,
    *,
    epochs: int,
    batch_size: int,
    rng: np.random.Generator,
    shuffle: bool = True,
    validation: tuple[sp.csr_matrix, np.ndarray, np.ndarray] | None = None,
    patience: int = 2,
    on_epoch: Callable[[EpochReport], None] | None = None,
) -> dict:
    """Train for up to ``epochs`` passes of :func:`update` over the data.

    With ``validation`` (matrix, labels, weights) training stops early once the
    validation loss has not improved for ``patience`` epochs, and the weights
    of the best epoch are restored in place.

    Returns a summary dict (epochs run, best epoch, final losses).
    """
    from model.evaluation import roc_auc

    n = matrix.shape[0]
    best = None
    best_loss = np.inf
    best_epoch = 0
    stale = 0
    history = []
    epoch = 0
    for epoch in range(1, epochs + 1):
        order = rng.permutation(n) if shuffle else np.arange(n)
        shuffled = matrix[order] if shuffle else matrix
        ys, ws = y[order], w[order]
        total = 0.0
        weight_sum = 0.0
        for start in range(0, n, batch_size):
            stop = min(start + batch_size, n)
            bw = ws[start:stop]
            batch = row_slice(shuffled, start, stop)
            total += update(weights, opt, batch, ys[start:stop], bw) * float(bw.sum())
            weight_sum += float(bw.sum())
        report = EpochReport(epoch, total / max(weight_sum, 1e-12), None, None)
        if validation is not None:
            vm, vy, vw = validation
            vp = network.sigmoid(predict_logits(weights, vm))
            report.val_loss = log_loss(vp, vy, vw)
            report.val_auc = roc_auc(vy, vp) if len(np.unique(vy)) == 2 else None
        history.append(report)
        if on_epoch is not None:
            on_epoch(report)
        if validation is None:
            continue
        if report.val_loss < best_loss - 1e-6:
            best_loss, best_epoch, stale = report.val_loss, epoch, 0
            best = weights.copy()
        else:
            stale += 1
            if stale >= patience:
                break
    if best is not None and best_epoch != epoch:
        weights.table[...] = best.table
        for k in weights.head:
            weights.head[k][...] = best.head[k]
    last = history[-1] if history else None
    return {
        "epochs_run": epoch if history else 0,
        "best_epoch": best_epoch or (epoch if history else 0),
        "train_loss": last.loss if last else None,
        "val_loss": float(best_loss) if best is not None else None,
        "val_auc": next((h.val_auc for h in history if h.epoch == best_epoch), None),
    }
