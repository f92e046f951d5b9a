"""Cross-validation splitters over nights and participants (scikit-learn protocol).

Every splitter implements ``split(X, y, groups)`` yielding ``(train_idx, test_idx)`` index arrays
and ``get_n_splits``; epochs are rows and the *groups* say which night (or participant) each
row belongs to, so a night is never cut in two: all its epochs fall on the same side.

=========================  ==================================  =====================================
registry key               class                               groups
=========================  ==================================  =====================================
``leave-one-night-out``    :class:`sklearn.model_selection.    night group of each epoch
                           LeaveOneGroupOut`                   (:func:`fold_groups`); every group is
                                                               held out once (outer loop, personal)
``forward-chained``        :class:`ForwardChainedSplit`        night group of each epoch, values
                                                               sorting in chronological order
                                                               (inner loop)
``leave-participants-out`` :class:`sklearn.model_selection.    participant group of each epoch
                           GroupKFold`                         (:func:`participant_groups`); k folds
                                                               of whole groups (pooled model)
=========================  ==================================  =====================================

The two scikit-learn classes are used as they are; :data:`SPLITTERS` names all three.

Fold groups
-----------
A night stored twice must never be validated by a model that trained on its copy, or held-out
figures are inflated. The groups given to the splitters are therefore computed from the nights
themselves (:func:`fold_groups`, :func:`participant_groups`), not taken from their ids:

- within a participant, nights whose clock-time intervals ``[start, end)`` overlap are one
  group, transitively (a re-scored or re-imported copy, shifted by a few epochs, overlaps its
  original; two real nights of one person never overlap);
- nights with the same :attr:`~models.nights.night.Night.content_hash` are one group whatever
  their participants (the same recording stored under two ids), and so link those
  participants: linked participants are held out together.

The personal outer loop holds out a whole night group at once and its inner forward-chained
splits validate on whole groups, training only on earlier groups; the pooled folds and
validation participants are whole participant groups.
"""

from __future__ import annotations

from collections.abc import Iterator, Mapping, Sequence
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from sklearn.model_selection import BaseCrossValidator, GroupKFold, LeaveOneGroupOut

from ..errors import NightbankError
from ..nights.night import Night

__all__ = ["ForwardChainedSplit", "SPLITTERS", "TooFewNightsError", "fold_groups", "participant_groups"]


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


class _Links:
    """Union-find over ``n`` items (path halving); groups numbered by their first item."""

    def __init__(self, n: int) -> None:
        self.parent = list(range(n))

    def find(self, i: int) -> int:
        while self.parent[i] != i:
            self.parent[i] = self.parent[self.parent[i]]
            i = self.parent[i]
        return i

    def join(self, i: int, j: int) -> None:
        a, b = self.find(i), self.find(j)
        if a != b:
            self.parent[max(a, b)] = min(a, b)

    def numbers(self) -> list[int]:
        first: dict[int, int] = {}
        return [first.setdefault(self.find(i), len(first)) for i in range(len(self.parent))]


def fold_groups(nights: Sequence[Night]) -> list[int]:
    """Fold group of each night: the nights that must fall on the same side of every split.

    Two nights are linked when they belong to the same participant and their clock-time
    intervals ``[start, end)`` overlap, or when they have the same content hash (whatever their
    participants); groups are the connected sets of links (see "Fold groups" above).

    Parameters
    ----------
    nights : sequence of Night
        Any nights, of one or several participants, in any order.

    Returns
    -------
    groups : list of int, length n_nights
        Group number of each night, ``0 .. n_groups - 1``, numbered in the order of each group's
        first night in ``nights``.

    Examples
    --------
    >>> import pandas as pd
    >>> t = pd.Timestamp("2031-03-02 22:00", tz="UTC")
    >>> a = Night("p1", t, 30, [0.0] * 960)                                  # 22:00-06:00
    >>> a_copy = Night("p1", t + pd.Timedelta(minutes=2), 30, [0.0] * 960)  # shifted copy
    >>> b = Night("p1", t + pd.Timedelta(days=1), 30, [0.0] * 960)
    >>> a_elsewhere = Night("p2", t, 30, [0.0] * 960)                        # same content, other id
    >>> fold_groups([a, b, a_copy, a_elsewhere])
    [0, 1, 0, 0]
    """
    links = _Links(len(nights))
    by_hash: dict[str, int] = {}
    for i, night in enumerate(nights):
        links.join(i, by_hash.setdefault(night.content_hash, i))
    by_participant: dict[str, list[int]] = {}
    for i, night in enumerate(nights):
        by_participant.setdefault(night.participant_id, []).append(i)
    for members in by_participant.values():
        # sweep in start order: a night overlaps the group so far when it starts before that group's latest end
        order = sorted(members, key=lambda i: nights[i].start)
        last, latest_end = order[0], nights[order[0]].end
        for i in order[1:]:
            if nights[i].start < latest_end and nights[i].n_epochs > 0:
                links.join(last, i)
                latest_end = max(latest_end, nights[i].end)
            elif nights[i].n_epochs > 0:
                last, latest_end = i, nights[i].end
    return links.numbers()


def participant_groups(nights: Mapping[str, Sequence[Night]]) -> dict[str, int]:
    """Group of each participant: participants linked by a night they share (same content hash).

    Parameters
    ----------
    nights : mapping of str to sequence of Night
        Participant id -> their nights.

    Returns
    -------
    groups : dict of str to int
        Participant id -> group number ``0 .. n_groups - 1``, numbered in the order of the
        mapping; linked participants (transitively) share a number.
    """
    pids = list(nights)
    flat = [(k, night) for k, pid in enumerate(pids) for night in nights[pid]]
    links = _Links(len(pids))
    night_groups = fold_groups([night for _, night in flat])
    first_owner: dict[int, int] = {}
    for (k, _), g in zip(flat, night_groups, strict=True):
        links.join(k, first_owner.setdefault(g, k))
    return dict(zip(pids, links.numbers(), strict=True))
