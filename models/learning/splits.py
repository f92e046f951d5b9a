"""Cross-validation splitters over nights and participants (scikit-learn protocol).

Every splitter implements ``split(X, y, groups)`` yielding ``(train_idx, test_idx)`` index arrays
and ``get_n_splits``; epochs are rows and the *groups* say which night (or participant) each
row belongs to, so a night is never cut in two: all its epochs fall on the same side.

=========================  ==================================  =====================================
registry key               class                               groups
=========================  ==================================  =====================================
``leave-one-night-out``    :class:`sklearn.model_selection.    night of each epoch; every night is
                           LeaveOneGroupOut`                   held out once (outer loop, personal)
``forward-chained``        :class:`ForwardChainedSplit`        night of each epoch, values sorting
                                                               in chronological order (inner loop)
``leave-participants-out`` :class:`sklearn.model_selection.    participant of each epoch; k folds of
                           GroupKFold`                         whole participants (pooled model)
=========================  ==================================  =====================================

The two scikit-learn classes are used as they are; :data:`SPLITTERS` names all three.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from sklearn.model_selection import BaseCrossValidator, GroupKFold, LeaveOneGroupOut

from ..errors import NightbankError

__all__ = ["ForwardChainedSplit", "SPLITTERS", "TooFewNightsError"]


class TooFewNightsError(NightbankError):
    """A splitter was given fewer groups (nights or participants) than it needs."""

    code = "too_few_nights"


class ForwardChainedSplit(BaseCrossValidator):  # type: ignore[misc]  # scikit-learn ships no types
    """Expanding-window splits over nights in chronological order.

    With nights ``g_0 < g_1 < ... < g_{n-1}`` (sorted group values), split ``k`` trains on
    ``g_0 .. g_{k-1}`` and validates on ``g_k``, for ``k = min_train_nights .. n-1``. A night is
    never split, and no split validates on a night earlier than any of its training nights.

    Parameters
    ----------
    min_train_nights : int, default=1
        Nights in the first training window. ``n - min_train_nights`` splits result; with two
        nights and the default there is exactly one split (train on the earlier night, validate
        on the later one).
    max_splits : int or None, default=None
        Keep only the last ``max_splits`` splits (the ones with the most training nights);
        None keeps all.

    Notes
    -----
    ``groups`` must sort chronologically: a night's rank by start time, or its start time as
    an integer (nanoseconds since the epoch) both work.

    Examples
    --------
    >>> groups = [0, 0, 1, 1, 2, 2]
    >>> [(tr.tolist(), te.tolist()) for tr, te in ForwardChainedSplit().split(groups, groups=groups)]
    [([0, 1], [2, 3]), ([0, 1, 2, 3], [4, 5])]
    """

    __metadata_request__split = {"groups": True}

    def __init__(self, *, min_train_nights: int = 1, max_splits: int | None = None) -> None:
        self.min_train_nights = min_train_nights
        self.max_splits = max_splits

    def _check(self, groups: ArrayLike | None) -> NDArray[Any]:
        if groups is None:
            raise TooFewNightsError("ForwardChainedSplit needs groups: the night of each epoch")
        if int(self.min_train_nights) < 1 or (self.max_splits is not None and int(self.max_splits) < 1):
            raise NightbankError("min_train_nights and max_splits must be >= 1", code="invalid_splitter_option")
        uniq = np.unique(np.asarray(groups))
        if uniq.size <= self.min_train_nights:
            raise TooFewNightsError(
                f"forward-chained splits need more than {self.min_train_nights} night(s), got {uniq.size}")
        return uniq

    def get_n_splits(self, X: object = None, y: object = None, groups: ArrayLike | None = None) -> int:
        """Number of splits for these groups.

        Parameters
        ----------
        X, y : object
            Ignored; present for API compatibility.
        groups : array-like of shape (n_epochs,)
            Night of each epoch (chronologically sortable).

        Returns
        -------
        int
        """
        n = self._check(groups).size - int(self.min_train_nights)
        return n if self.max_splits is None else min(n, int(self.max_splits))

    def split(self, X: ArrayLike, y: ArrayLike | None = None,
              groups: ArrayLike | None = None) -> Iterator[tuple[NDArray[np.intp], NDArray[np.intp]]]:
        """Yield ``(train_idx, test_idx)`` for each expanding window.

        Parameters
        ----------
        X : array-like of shape (n_epochs, ...)
            Only its length is used.
        y : array-like, default=None
            Ignored.
        groups : array-like of shape (n_epochs,)
            Night of each epoch; values sort chronologically.

        Yields
        ------
        train_idx, test_idx : ndarray of int
            Row indices (ascending) of the training nights and of the validation night.

        Raises
        ------
        TooFewNightsError
            If ``groups`` is missing or has ``min_train_nights`` nights or fewer.
        """
        uniq = self._check(groups)
        g = np.asarray(groups)
        if len(g) != len(X):  # type: ignore[arg-type]
            raise NightbankError(f"groups ({len(g)}) and X ({len(X)}) differ in length",  # type: ignore[arg-type]
                                 code="invalid_splitter_option")
        rank = np.searchsorted(uniq, g)
        first = int(self.min_train_nights)
        if self.max_splits is not None:
            first = max(first, uniq.size - int(self.max_splits))
        for k in range(first, uniq.size):
            yield np.flatnonzero(rank < k), np.flatnonzero(rank == k)


#: Splitter classes by name (see the module docstring for their groups).
SPLITTERS: dict[str, type[BaseCrossValidator] | type[GroupKFold]] = {
    "leave-one-night-out": LeaveOneGroupOut,
    "forward-chained": ForwardChainedSplit,
    "leave-participants-out": GroupKFold,
}
