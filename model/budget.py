"""The size budget: every model file fits in ``max_bytes`` (1 MiB by default).

A model file holds one int8 row per bucket that training touched, so its size
grows with the vocabulary (rows) and the width ``d``.  Three levers bring it
under the budget, in this order:

1. **Before training, the plan** (:func:`plan`).  Start from the 4th-root
   rule's ``d`` and a document-frequency cut of 2; while the estimated file
   (:func:`estimate_bytes`) is over the budget, raise the cut up to
   :data:`CUT_FIRST`, then narrow ``d`` by quarters down to :data:`DIM_FLOOR`,
   then raise the cut further.  A setting the caller fixed (an int ``dim`` or
   ``min_df``) is never changed.
2. **After training, the exact fit** (:func:`largest_fit`): if the written
   file is still over the budget, the rows with the smallest L2 norm are
   dropped until it fits.
3. The file format itself: delta-encoded row ids, int8 rows, compressed.

On the 2002 public mail corpus, raising the cut up to 4 costs nothing on a
random split and helps on a split by time (older mail to train, newer to
test); narrowing ``d`` costs nothing measurable on either.  Dropping rows by
smallest norm kept more ROC-AUC per byte than by lowest document frequency
on the random split, and less on the split by time (by up to 0.0006): the
cut, a document-frequency lever, comes first, and the norm only trims what
the estimate missed, where the trained values are known.  The README's model
section has the tables.
"""
from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from model.errors import BudgetError

#: Estimated compressed bytes per stored row: ``BYTES_PER_ROW[0] + BYTES_PER_ROW[1] * d``
#: (measured on the mail corpus with d from 4 to 26: 4.5 to 18 bytes a row; a
#: little above most of them, so that the exact fit seldom has to prune).
BYTES_PER_ROW = (2.5, 0.5)
#: The plan aims at this share of the budget; the exact fit uses all of it.
PLAN_SHARE = 0.95
#: Bytes of the budget kept free for what is written after training (thresholds,
#: calibration, metrics in the manifest).
HEADROOM = 2048
#: The document-frequency cut when the budget does not ask for more.
CUT_START = 2
#: The plan raises the cut up to this before it narrows ``d``.
CUT_FIRST = 4
#: The plan never narrows ``d`` below this.
DIM_FLOOR = 4
#: ``fit`` refuses (rather than keep a model with almost no vocabulary) when
#: fewer than this share of the trained rows would fit.
MIN_KEPT_SHARE = 1 / 8


@dataclass(frozen=True)
class Plan:
    """What training uses: the width, the document-frequency cut, and why.

    ``steps`` names each change from the starting point, e.g. ``("min_df 3",
    "min_df 4", "dim 19")``.
    """

    dim: int
    min_df: int
    steps: tuple[str, ...] = ()


def estimate_bytes(rows: int, dim: int) -> int:
    """Estimated file size of ``rows`` stored rows of width ``dim`` (see :data:`BYTES_PER_ROW`).

    Examples
    --------
    >>> estimate_bytes(1000, 8)
    6500
    """
    return int(rows * (BYTES_PER_ROW[0] + BYTES_PER_ROW[1] * dim))


def rows_by_cut(doc_freq: np.ndarray) -> Callable[[int], int]:
    """``rows_at(cut)``: how many buckets have a document frequency of at least ``cut``.

    Examples
    --------
    >>> rows_at = rows_by_cut(np.array([0, 1, 2, 2, 5]))
    >>> rows_at(1), rows_at(2), rows_at(3), rows_at(6)
    (4, 3, 1, 0)
    """
    counts = np.bincount(np.asarray(doc_freq, dtype=np.int64))
    at_least = np.cumsum(counts[::-1])[::-1]  # at_least[c] = buckets with df >= c

    def rows_at(cut: int) -> int:
        cut = max(int(cut), 1)
        return int(at_least[cut]) if cut < at_least.size else 0

    return rows_at


def plan(rows_at: Callable[[int], int], *, rule_dim: int, dim, min_df, max_bytes: int | None) -> Plan:
    """The width and document-frequency cut to train with (lever 1 above).

    Parameters
    ----------
    rows_at : ``rows_at(cut)``, rows a cut would keep (:func:`rows_by_cut`).
    rule_dim : the 4th-root rule's width for these data.
    dim, min_df : the parameters; ``"auto"`` lets the plan choose, an int is kept.
    max_bytes : the budget, or ``None`` for none.

    Examples
    --------
    >>> rows_at = rows_by_cut(np.repeat([1, 2, 3, 4, 5], 40_000))
    >>> plan(rows_at, rule_dim=20, dim="auto", min_df="auto", max_bytes=2**20)
    Plan(dim=15, min_df=4, steps=('min_df 3', 'min_df 4', 'dim 15'))
    >>> plan(rows_at, rule_dim=20, dim=8, min_df=2, max_bytes=2**20).steps
    ()
    """
    d = rule_dim if dim == "auto" else int(dim)
    cut = CUT_START if min_df == "auto" else int(min_df)
    steps: list[str] = []
    if max_bytes is None:
        return Plan(d, cut)
    target = PLAN_SHARE * (max_bytes - HEADROOM)
    while estimate_bytes(rows_at(cut), d) > target:
        may_cut = min_df == "auto" and rows_at(cut) > 0
        may_narrow = dim == "auto" and d > DIM_FLOOR
        if may_cut and (cut < CUT_FIRST or not may_narrow):
            cut += 1
            steps.append(f"min_df {cut}")
        elif may_narrow:
            d = max(DIM_FLOOR, d * 3 // 4)
            steps.append(f"dim {d}")
        else:
            break  # both fixed: the exact fit prunes rows
    return Plan(d, cut, tuple(steps))


def largest_fit(size_of: Callable[[int], int], n_rows: int, limit: int, *, max_calls: int = 16) -> int:
    """The largest ``k`` (rows kept, best first) whose file ``size_of(k)`` is at most ``limit``.

    ``size_of`` grows with ``k`` (not strictly: compression), so the search
    interpolates between the sizes it has seen and returns the largest ``k``
    it has checked that fits, within a tenth of a percent of ``n_rows`` of the
    best unless ``max_calls`` runs out first.

    Raises
    ------
    BudgetError
        When even ``size_of(0)`` (the manifest and the head) is over ``limit``.

    Examples
    --------
    >>> largest_fit(lambda k: 100 + 10 * k, 1000, 5000)
    490
    """
    low, low_size = 0, size_of(0)
    if low_size > limit:
        raise BudgetError(f"{low_size}")
    high, high_size = n_rows, size_of(n_rows)
    if high_size <= limit:
        return n_rows
    for _ in range(max_calls - 2):
        gap = high - low
        if gap <= max(1, n_rows // 1000):
            break
        share = (limit - low_size) / max(high_size - low_size, 1)
        # Interpolate, but move at least a sixteenth of the gap from either
        # end, so that the bracket keeps shrinking when one end sits on the limit.
        step = max(1, gap // 16)
        k = min(high - step, max(low + step, low + int(gap * share)))
        size = size_of(k)
        if size <= limit:
            low, low_size = k, size
        else:
            high, high_size = k, size
    return low
