"""The averaged-embedding network.

A comment is a bag of hashed token buckets.  Its vector is the mean of the
bucket rows of an embedding table ``E[B, d]``; a small dense head turns that
vector into one logit and a sigmoid into a spam probability::

    h = A · E            A: (n, B) sparse, row i = the pooling weights of comment i
    u = relu(h · W1 + b1)        (only when the head has a hidden layer)
    z = u · w2 + b2              (or h · w2 + b2 without a hidden layer)
    p = sigmoid(z)

Training never materialises a dense ``(n, B)`` matrix nor a dense gradient of
``E``: a batch is re-indexed onto the rows it touches (:func:`localize`), the
forward pass is ``A_local · E[rows]`` and the backward pass ``A_localᵀ · dH``,
so the gradient exists only for the touched rows.  Arrays keep the dtype of
the table rows (float32 in training, float64 in the gradient check).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

HEAD_KEYS = ("w1", "b1", "w2", "b2")


def sigmoid(z: np.ndarray) -> np.ndarray:
    """Logistic function, float64: ``exp(-log(1 + exp(-z)))``, stable for any ``z``.

    A handful of values (one comment) go through :mod:`math` with the same
    formula, which costs less than four numpy calls on a tiny array.

    Examples
    --------
    >>> sigmoid(np.array([-800.0, 0.0, 800.0])).tolist()
    [0.0, 0.5, 1.0]
    >>> z = np.linspace(-40, 40, 81)
    >>> sigmoid(z[::20]).tolist() == sigmoid(z)[::20].tolist()  # the two routes agree
    True
    """
    z = np.asarray(z, dtype=np.float64)
    if z.ndim == 1 and z.size <= _FEW_VALUES:
        return np.array([sigmoid_one(v) for v in z.tolist()])
    return np.exp(-np.logaddexp(0.0, -z))


#: Up to this many values, :func:`sigmoid` uses plain floats.
_FEW_VALUES = 8


def sigmoid_one(v: float) -> float:
    # logaddexp(0, -v) = max(0, -v) + log1p(exp(-|v|)), as numpy computes it
    return math.exp(-(max(0.0, -v) + math.log1p(math.exp(-abs(v))))) if v == v else math.nan


def localize(batch: sp.csr_matrix) -> tuple[np.ndarray, sp.csr_matrix]:
    """Re-index a batch onto the bucket rows it touches.

    Parameters
    ----------
    batch : scipy.sparse.csr_matrix, shape (n, B)

    Returns
    -------
    rows : np.ndarray of int64, shape (k,)
        The distinct buckets the batch touches, sorted.
    local : scipy.sparse.csr_matrix, shape (n, k)
        The same batch with column ``j`` standing for bucket ``rows[j]``.
    """
    ordered = np.sort(batch.indices)
    if ordered.size:
        rows = ordered[np.concatenate(([True], ordered[1:] != ordered[:-1]))]
    else:
        rows = ordered
    import scipy.sparse as sp  # training only; scoring needs numpy alone

    inverse = np.searchsorted(rows, batch.indices).astype(np.int32, copy=False)
    local = sp.csr_matrix((batch.data, inverse, batch.indptr), shape=(batch.shape[0], rows.size))
    return rows.astype(np.int64, copy=False), local


@dataclass
class Cache:
    """What the backward pass needs from a forward pass."""

    local: sp.csr_matrix
    h: np.ndarray
    pre: np.ndarray | None


def init_head(dim: int, hidden: int, rng: np.random.Generator) -> dict[str, np.ndarray]:
    """A fresh dense head.

    The embedding table starts at zero (so untouched buckets contribute
    nothing, whether stored or not); the head therefore carries the random
    start that breaks symmetry.  Glorot-uniform scale (Glorot & Bengio 2010).
    """
    if hidden:
        lim1 = np.sqrt(6.0 / (dim + hidden))
        lim2 = np.sqrt(6.0 / (hidden + 1))
        return {
            "w1": rng.uniform(-lim1, lim1, size=(dim, hidden)).astype(np.float32),
            "b1": np.full(hidden, 0.01, dtype=np.float32),
            "w2": rng.uniform(-lim2, lim2, size=hidden).astype(np.float32),
            "b2": np.zeros(1, dtype=np.float32),
        }
    lim = np.sqrt(6.0 / (dim + 1))
    return {
        "w2": rng.uniform(-lim, lim, size=dim).astype(np.float32),
        "b2": np.zeros(1, dtype=np.float32),
    }


def head_forward(h: np.ndarray, head: dict[str, np.ndarray]) -> tuple[np.ndarray, np.ndarray | None]:
    """Logits of pooled vectors ``h`` (n, d); also the hidden pre-activation."""
    if "w1" in head:
        pre = h @ head["w1"] + head["b1"]
        return np.maximum(pre, 0.0) @ head["w2"] + head["b2"][0], pre
    return h @ head["w2"] + head["b2"][0], None


def forward(local: sp.csr_matrix, table_rows: np.ndarray, head: dict[str, np.ndarray]) -> tuple[np.ndarray, Cache]:
    """Logits of a localized batch.

    Parameters
    ----------
    local : csr_matrix (n, k), from :func:`localize`.
    table_rows : np.ndarray (k, d), the embedding rows the batch touches.
    head : the dense head parameters.
    """
    h = np.asarray(local @ table_rows, dtype=table_rows.dtype)
    z, pre = head_forward(h, head)
    return z, Cache(local=local, h=h, pre=pre)


def backward(cache: Cache, dz: np.ndarray, head: dict[str, np.ndarray]) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """Gradients of ``sum(dz * z)`` for the touched rows and the head.

    Parameters
    ----------
    cache : from :func:`forward`.
    dz : np.ndarray (n,), the loss gradient with respect to each logit.

    Returns
    -------
    d_rows : np.ndarray (k, d), gradient for ``table_rows`` only (``Aᵀ · dH``).
    d_head : dict of gradients, same keys as ``head``.
    """
    dz = dz.astype(cache.h.dtype, copy=False)
    grads: dict[str, np.ndarray] = {"b2": np.array([dz.sum()], dtype=cache.h.dtype)}
    if "w1" in head:
        u = np.maximum(cache.pre, 0.0)
        grads["w2"] = u.T @ dz
        du = np.outer(dz, head["w2"]) * (cache.pre > 0)
        grads["w1"] = cache.h.T @ du
        grads["b1"] = du.sum(axis=0)
        dh = du @ head["w1"].T
    else:
        grads["w2"] = cache.h.T @ dz
        dh = np.outer(dz, head["w2"])
    d_rows = np.asarray(cache.local.T @ dh, dtype=cache.h.dtype)
    return d_rows, grads


def token_direction(h: np.ndarray, head: dict[str, np.ndarray]) -> np.ndarray:
    """Per comment, the direction ``g`` (n, d) with ``z ≈ b + h · g``.

    Without a hidden layer the logit is exactly ``b2 + h · w2``.  With one,
    ``g = W1 · (relu'(pre) ⊙ w2)`` is the gradient of the logit at ``h``;
    because a ReLU head is piecewise linear and the biases are folded in
    separately, ``h · g`` is the exact logit minus the active units' biases.
    A token's contribution is then ``(its share of h) · g``, which sums to
    ``h · g`` over the comment's tokens.
    """
    if "w1" in head:
        pre = h @ head["w1"] + head["b1"]
        return ((pre > 0) * head["w2"]) @ head["w1"].T
    return np.broadcast_to(head["w2"], h.shape)
