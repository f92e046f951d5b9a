"""Splitters: forward-chained expanding windows over nights, the registry of splitters."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.model_selection import GroupKFold, LeaveOneGroupOut, TimeSeriesSplit

from models.learning.splits import SPLITTERS, ForwardChainedSplit, TooFewNightsError


@st.composite
def _nights(draw: st.DrawFn) -> tuple[np.ndarray, int]:
    """Night of each epoch (arbitrary chronological keys, shuffled epoch order) and min_train_nights."""
    n_nights = draw(st.integers(2, 9))
    keys = draw(st.lists(st.integers(-10**12, 10**12), min_size=n_nights, max_size=n_nights, unique=True))
    sizes = draw(st.lists(st.integers(1, 6), min_size=n_nights, max_size=n_nights))
    groups = np.repeat(np.array(keys), sizes)
    order = draw(st.permutations(range(groups.size)))
    min_train = draw(st.integers(1, n_nights - 1))
    return groups[list(order)], min_train


@settings(max_examples=200, deadline=None)
@given(_nights())
def test_forward_chained_never_validates_before_its_training_nights(case: tuple[np.ndarray, int]) -> None:
    groups, min_train = case
    cv = ForwardChainedSplit(min_train_nights=min_train)
    splits = list(cv.split(groups, groups=groups))
    n_nights = np.unique(groups).size
    assert len(splits) == cv.get_n_splits(groups=groups) == n_nights - min_train
    seen_validation = []
    for k, (train, test) in enumerate(splits):
        val_nights, train_nights = np.unique(groups[test]), np.unique(groups[train])
        assert val_nights.size == 1  # one whole night validated
        assert train_nights.max() < val_nights[0]  # never a night earlier than any training night
        assert train_nights.size == min_train + k  # expanding window
        assert np.intersect1d(train, test).size == 0
        # a night is never cut: every epoch of each night lies on one side
        for g in np.concatenate([train_nights, val_nights]):
            rows = np.flatnonzero(groups == g)
            assert set(rows) <= set(train) or set(rows) <= set(test)
        seen_validation.append(val_nights[0])
    assert seen_validation == sorted(seen_validation)


def test_forward_chained_matches_sklearn_time_series_split_on_one_epoch_nights() -> None:
    # Reference: scikit-learn TimeSeriesSplit with n_splits = n - 1 trains on [0, k) and tests on k.
    n = 7
    groups = np.arange(n)
    ours = [(tr.tolist(), te.tolist()) for tr, te in ForwardChainedSplit().split(groups, groups=groups)]
    reference = [(tr.tolist(), te.tolist()) for tr, te in TimeSeriesSplit(n_splits=n - 1).split(groups)]
    assert ours == reference


def test_forward_chained_two_nights_give_one_split() -> None:
    groups = np.array([5, 5, 5, 9, 9])
    (train, test), = ForwardChainedSplit().split(groups, groups=groups)
    assert train.tolist() == [0, 1, 2] and test.tolist() == [3, 4]


def test_forward_chained_max_splits_keeps_the_latest() -> None:
    groups = np.arange(6)
    splits = list(ForwardChainedSplit(max_splits=2).split(groups, groups=groups))
    assert [te.tolist() for _, te in splits] == [[4], [5]]
    assert ForwardChainedSplit(max_splits=2).get_n_splits(groups=groups) == 2


@pytest.mark.parametrize("groups", [None, np.array([1, 1, 1])])
def test_forward_chained_refuses_too_few_nights(groups: np.ndarray | None) -> None:
    with pytest.raises(TooFewNightsError, match="night") as info:
        list(ForwardChainedSplit().split(np.zeros(3), groups=groups))
    assert info.value.code == "too_few_nights"


def test_registry_names_the_three_splitters() -> None:
    assert SPLITTERS == {"leave-one-night-out": LeaveOneGroupOut, "forward-chained": ForwardChainedSplit,
                         "leave-participants-out": GroupKFold}
    groups = np.array([0, 0, 1, 2, 2])
    for cls in SPLITTERS.values():
        cv = cls(n_splits=2) if cls is GroupKFold else cls()
        for train, test in cv.split(groups, groups=groups):
            assert not set(groups[train]) & set(groups[test])  # nights (groups) never straddle train/test
