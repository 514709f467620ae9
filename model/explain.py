"""Signed token contributions: why a comment got its score.

The logit of a comment is ``bias + Σ_b w_b · (E[b] · g)`` over the buckets
``b`` it touches, where ``w_b`` is the bucket's pooling weight and ``g`` the
head's direction (:func:`model.network.token_direction`).  A bucket's
contribution is its term of that sum: positive pushes toward spam, negative
toward ham.  With a linear head the terms add up exactly to ``logit - bias``,
so removing the most spam-ward tokens lowers the score (a test checks it).
The contributions come out of the scoring pass itself; explaining a batch
takes the k largest out of a comment-by-pair matrix, with a sort only for
ties and very long comments.
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
    indptr: np.ndarray | None = None,
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
    indptr : optional int (n_docs + 1,): the pairs are grouped by comment, in
        order, comment ``i``'s being ``indptr[i]:indptr[i + 1]`` (as a scoring
        bag holds them).  The ranking then runs on a comment-by-pair matrix,
        without a sort; any order of ``doc`` is accepted without it.

    Returns
    -------
    list of lists of ``(token, contribution)``, largest magnitude first;
    equal magnitudes in the order of ``first`` (the order the tokens appear
    in), so the ranking is the same whichever path scored.

    Examples
    --------
    >>> top_contributions(np.array([0, 0, 1]), np.array([0.5, -2.0, 0.1]),
    ...                   np.array([0, 1, 2]), ["a", "b", "c"], 2, 1)
    [[('b', -2.0)], [('c', 0.1)]]
    """
    if top_k <= 0 or doc.size == 0 or not contribution.any():
        return [[] for _ in range(n_docs)]
    key = np.abs(contribution)  # the ranking key, > 0 for every pair that may be named
    if spamward is not None:
        lift = (np.asarray(spamward, dtype=bool)[doc] & (contribution > 0)) * (key.max() + 1.0)
        key = key + lift  # spam-ward pairs of those comments above every other
    if indptr is not None and top_k <= _FEW_ROUNDS:
        chosen, per_doc = _top_in_rows(doc, key, first, indptr, top_k)
    else:
        chosen, per_doc = _top_by_sort(doc, key, first, n_docs, top_k)
    take = getattr(tokens, "take", None)
    names = take(first[chosen]) if take is not None else [tokens[f] for f in first[chosen].tolist()]
    pairs = list(zip(names, contribution[chosen].tolist()))
    if len(pairs) == n_docs * top_k:  # the usual case: every comment has top_k; cut in C
        return list(map(list, zip(*[iter(pairs)] * top_k)))
    ends = np.cumsum(per_doc).tolist()
    begins = [0] + ends[:-1]
    return [pairs[a:b] for a, b in zip(begins, ends)]


#: Comments with more pairs than this are ranked by the sort, so that the
#: comment-by-pair matrix stays small.
_WIDE = 256
#: Up to this top_k, the ranking takes the row maxima out k times; above it, the sort.
_FEW_ROUNDS = 16


def _top_by_sort(doc: np.ndarray, key: np.ndarray, first: np.ndarray, n_docs: int,
                 top_k: int) -> tuple[np.ndarray, np.ndarray]:
    """The chosen pairs by comment, then rank (key descending, then ``first``), and the count per comment."""
    live = np.flatnonzero(key > 0)
    order = live[np.lexsort((first[live], -key[live], doc[live]))]
    sorted_doc = doc[order]
    starts = np.searchsorted(sorted_doc, np.arange(n_docs + 1))
    rank = np.arange(sorted_doc.size) - starts[sorted_doc]
    chosen = order[rank < top_k]
    return chosen, np.bincount(doc[chosen], minlength=n_docs)


def _top_in_rows(doc: np.ndarray, key: np.ndarray, first: np.ndarray, indptr: np.ndarray,
                 top_k: int) -> tuple[np.ndarray, np.ndarray]:
    """:func:`_top_by_sort` for pairs grouped by comment (``indptr``).

    The keys go into a comment-by-pair matrix in the comment's pair order, and
    the row maxima are taken out ``top_k`` times.  That order is not the order
    of ``first``, so a comment where two chosen keys are equal, or the last
    chosen equals the best one left, is ranked again by the sort, as are the
    comments wider than :data:`_WIDE`.
    """
    n_docs = indptr.size - 1
    starts = indptr[:-1]
    counts = np.diff(indptr)
    width = int(min(counts.max(), _WIDE))
    wide = counts > _WIDE
    scratch = np.full(n_docs * width, -1.0)
    slot = np.arange(key.size) + np.repeat(np.arange(n_docs) * width - starts, counts)
    if wide.any():
        narrow = np.repeat(~wide, counts)
        scratch[slot[narrow]] = key[narrow]
    else:
        scratch[slot] = key
    scratch = scratch.reshape(n_docs, width)
    k = min(top_k, width)
    rows = np.arange(n_docs)
    at = np.empty((n_docs, k), dtype=np.int64)
    value = np.empty((n_docs, k))
    for j in range(k):
        col = scratch.argmax(axis=1)
        at[:, j] = col
        value[:, j] = scratch[rows, col]
        scratch[rows, col] = -1.0
    valid = value > 0  # a prefix of each row: the values fall along it
    redo = wide
    if k > 1:
        redo = redo | np.any(valid[:, 1:] & (value[:, 1:] == value[:, :-1]), axis=1)
    if width > k:
        redo = redo | (valid[:, -1] & (scratch.max(axis=1) == value[:, -1]))
    if not redo.any():
        return (at + starts[:, None])[valid], valid.sum(axis=1)
    valid &= ~redo[:, None]
    again = np.flatnonzero(np.repeat(redo, counts))
    sorted_chosen, _ = _top_by_sort(doc[again], key[again], first[again], n_docs, top_k)
    chosen = np.concatenate([(at + starts[:, None])[valid], again[sorted_chosen]])
    chosen = chosen[np.argsort(doc[chosen], kind="stable")]  # each comment's pairs come from one side, in rank order
    return chosen, np.bincount(doc[chosen], minlength=n_docs)
