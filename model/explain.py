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
    *,
    spamward: np.ndarray | None = None,
) -> list[list[tuple[str, float]]]:
    """The ``top_k`` largest contributions by magnitude, per comment.

    Parameters
    ----------
    doc : np.ndarray (m,), the comment each (comment, bucket) pair belongs to.
    contribution : np.ndarray (m,), the pair's signed contribution to the logit.
    first : np.ndarray (m,), index into ``tokens`` of the pair's first token
        occurrence, which names the bucket in the explanation.
    tokens : indexable; ``tokens[f]`` names the feature occurrence ``f``.
    n_docs : number of comments.
    top_k : how many per comment; pairs contributing exactly 0 (unknown
        buckets) are left out.
    spamward : optional bool per comment: those comments list their positive
        (spam-ward) contributions first, largest first, then the others.

    Returns
    -------
    list of lists of ``(token, contribution)``, largest magnitude first.

    Examples
    --------
    >>> top_contributions(np.array([0, 0, 1]), np.array([0.5, -2.0, 0.1]),
    ...                   np.array([0, 1, 2]), ["a", "b", "c"], 2, 1)
    [[('b', -2.0)], [('c', 0.1)]]
    """
    if top_k <= 0 or doc.size == 0:
        return [[] for _ in range(n_docs)]
    keep = np.flatnonzero(contribution)
    if keep.size == 0:
        return [[] for _ in range(n_docs)]
    doc, contribution, first = doc[keep], contribution[keep], first[keep]
    magnitude = np.abs(contribution)
    if spamward is not None:
        lift = (np.asarray(spamward, dtype=bool)[doc] & (contribution > 0)) * (magnitude.max() + 1.0)
        magnitude = magnitude + lift  # the ranking key: spam-ward pairs of those comments above every other
    # Only pairs at or above their comment's top_k-th magnitude can be chosen;
    # the exact ranking then runs on those few.
    candidates = _at_least_kth(doc, magnitude, n_docs, top_k)
    if candidates is not None:
        doc, contribution, first, magnitude = doc[candidates], contribution[candidates], first[candidates], magnitude[candidates]
    # By comment, then magnitude descending, then position: equal
    # contributions keep the order the tokens appear in, so the ranking is the
    # same whichever path scored.  In order of position first, then one stable
    # sort on the comment plus a fraction in [0, 0.5] that falls with magnitude.
    by_position = np.argsort(first)
    fraction = 0.5 * (1.0 - magnitude[by_position] / magnitude.max())
    order = by_position[np.argsort(doc[by_position] + fraction, kind="stable")]
    sorted_doc = doc[order]
    starts = np.searchsorted(sorted_doc, np.arange(n_docs + 1))
    rank = np.arange(sorted_doc.size) - starts[sorted_doc]
    chosen = order[rank < top_k]
    take = getattr(tokens, "take", None)
    names = take(first[chosen]) if take is not None else [tokens[f] for f in first[chosen].tolist()]
    pairs = list(zip(names, contribution[chosen].tolist()))
    per_doc = np.bincount(doc[chosen], minlength=n_docs)
    if len(pairs) == n_docs * top_k:  # the usual case: every comment has top_k; cut in C
        return list(map(list, zip(*[iter(pairs)] * top_k)))
    ends = np.cumsum(per_doc).tolist()
    begins = [0] + ends[:-1]
    return [pairs[a:b] for a, b in zip(begins, ends)]


#: Above this many scored pairs in one comment, its pairs skip the pre-filter
#: (they all go to the exact ranking) so the scratch matrix stays small.
_WIDE = 256
#: Up to this top_k, the k-th largest is found by k rounds of row maxima.
_FEW_ROUNDS = 16


def _at_least_kth(doc: np.ndarray, magnitude: np.ndarray, n_docs: int, top_k: int) -> np.ndarray | None:
    """Indices of the pairs whose magnitude is at least their comment's ``top_k``-th largest.

    ``None`` when every pair qualifies.  Comments with more than :data:`_WIDE`
    pairs keep all of theirs.
    """
    counts = np.bincount(doc, minlength=n_docs)
    if counts.max() <= top_k:
        return None
    order = None
    if doc.size > 1 and np.any(doc[1:] < doc[:-1]):
        order = np.argsort(doc, kind="stable")
        doc, magnitude = doc[order], magnitude[order]
    starts = np.cumsum(counts) - counts
    rank = np.arange(doc.size) - starts[doc]
    widest = int(counts.max())
    width = min(widest, _WIDE)
    scratch = np.full((n_docs, width), -1.0)
    if widest <= _WIDE:
        scratch[doc, rank] = magnitude
    else:
        narrow = counts[doc] <= _WIDE
        scratch[doc[narrow], rank[narrow]] = magnitude[narrow]
    if width > top_k:
        if top_k <= _FEW_ROUNDS:
            # The k-th largest per row: take the row maxima out k times
            # (np.partition along rows pays a setup per row).
            rows = np.arange(n_docs)
            for _ in range(top_k):
                at = scratch.argmax(axis=1)
                kth = scratch[rows, at]
                scratch[rows, at] = -1.0
        else:
            kth = np.partition(scratch, width - top_k, axis=1)[:, width - top_k]
        kth[counts > _WIDE] = -1.0  # wide comments keep all their pairs
    else:
        kth = np.full(n_docs, -1.0)
    picked = np.flatnonzero(magnitude >= kth[doc])
    return picked if order is None else np.sort(order[picked])
