"""Signed token contributions: why a comment got its score.

The logit of a comment is ``bias + Σ_b w_b · (E[b] · g)`` over the buckets
``b`` it touches, where ``w_b`` is the bucket's pooling weight and ``g`` the
head's direction (:func:`model.network.token_direction`).  A bucket's
contribution is its term of that sum: positive pushes toward spam, negative
toward ham.  With a linear head the terms add up exactly to ``logit - bias``,
so removing the most spam-ward tokens lowers the score (a test checks it).
The contributions come out of the scoring pass itself; explaining costs one
sort per batch.
"""
from __future__ import annotations

import numpy as np


def top_contributions(
    doc: np.ndarray,
    contribution: np.ndarray,
    first: np.ndarray,
    tokens: list[str],
    n_docs: int,
    top_k: int,
) -> list[list[tuple[str, float]]]:
    """The ``top_k`` largest contributions by magnitude, per comment.

    Parameters
    ----------
    doc : np.ndarray (m,), the comment each (comment, bucket) pair belongs to.
    contribution : np.ndarray (m,), the pair's signed contribution to the logit.
    first : np.ndarray (m,), index into ``tokens`` of the pair's first token
        occurrence, which names the bucket in the explanation.
    tokens : the comments' tokens, concatenated.
    n_docs : number of comments.
    top_k : how many per comment; pairs contributing exactly 0 (unknown
        buckets) are left out.

    Returns
    -------
    list of lists of ``(token, contribution)``, largest magnitude first.

    Examples
    --------
    >>> top_contributions(np.array([0, 0, 1]), np.array([0.5, -2.0, 0.1]),
    ...                   np.array([0, 1, 2]), ["a", "b", "c"], 2, 1)
    [[('b', -2.0)], [('c', 0.1)]]
    """
    out: list[list[tuple[str, float]]] = [[] for _ in range(n_docs)]
    if top_k <= 0 or doc.size == 0:
        return out
    keep = np.flatnonzero(contribution)
    doc, contribution, first = doc[keep], contribution[keep], first[keep]
    if doc.size == 0:
        return out
    # Pairs in order of first appearance (which also groups them by comment),
    # then one stable sort on a composite key: the comment, then magnitude
    # descending as a fraction in [0, 0.5].  Equal contributions keep the order
    # the tokens appear in, so the ranking is the same whichever path scored.
    by_position = np.argsort(first)
    magnitude = np.abs(contribution[by_position])
    key = doc[by_position] + 0.5 * (1.0 - magnitude / magnitude.max())
    order = by_position[np.argsort(key, kind="stable")]
    sorted_doc = doc[order]
    starts = np.searchsorted(sorted_doc, np.arange(n_docs))
    rank = np.arange(sorted_doc.size) - starts[sorted_doc]
    chosen = order[rank < top_k]
    for d, f, c in zip(doc[chosen].tolist(), first[chosen].tolist(), contribution[chosen].tolist()):
        out[d].append((tokens[f], c))
    return out
