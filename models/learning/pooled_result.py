"""What :func:`models.learning.pooled.train_pooled` returns: the final and fold models, held-out nights, offsets."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import pandas as pd

from ..nights.night import Night
from .classifier import SleepModel
from .config import TrainingDataError
from .descriptors import participant_descriptors
from .held_out import HeldOutNight
from .offset import ShrinkageChoice
from .pooled_start import PooledBase

__all__ = ["OFFSET_RULE", "PooledResult"]

#: How the deployed offset of a participant the final pooled model trained on is estimated.
OFFSET_RULE = ("cross-fitted: offset estimated on the out-of-fold margins of the fold model that left the "
               "participant out (plus its baseline), added to the final model's margin")


@dataclass(frozen=True, eq=False)
class PooledResult:
    """Result of :func:`train_pooled`.

    Attributes
    ----------
    model : SleepModel
        Final pooled model (all participants).
    held_out : dict of str to list of HeldOutNight
        Per participant, leave-participants-out predictions of each labelled night (empty for a
        participant without labelled nights).
    offsets : dict of str to float
        Per participant, log-odds offset from all labelled nights (0.0 without labels).
    shrinkage : float
        Chosen offset penalty.
    shrinkage_search : ShrinkageChoice
        The penalty search (log-likelihood per candidate).
    offset_held_out : dict of str to list of HeldOutNight
        Per participant with two or more labelled night groups, ``pooled+offset`` predictions of
        each labelled night (offset from the nights outside its group).
    descriptors : dict of str to dict
        Per participant, the descriptors the model used.
    folds : dict of str to int
        Outer fold of each participant with labelled nights (linked participants share one).
    baselines : dict of str to float
        Per participant with labelled nights, the ``offset_baseline_`` of the fold model that
        predicted them (add it to their held-out margins to estimate offsets).
    night_metrics, summary : pandas.DataFrame
        Epoch metrics per held-out night (``pooled`` and ``pooled+offset`` rows) and their mean/SD
        per method.
    offset_rule : str, default=OFFSET_RULE
        How ``offsets`` were estimated (see the module docstring).
    fold_models : dict of int to SleepModel, default={}
        The model of each outer fold (key = ``folds`` value): fold ``k``'s model never saw the
        participants of fold ``k``.
    """

    model: SleepModel
    held_out: dict[str, list[HeldOutNight]] = field(repr=False)
    offsets: dict[str, float]
    shrinkage: float
    shrinkage_search: ShrinkageChoice = field(repr=False)
    offset_held_out: dict[str, list[HeldOutNight]] = field(repr=False)
    descriptors: dict[str, dict[str, float]] = field(repr=False)
    folds: dict[str, int] = field(repr=False)
    baselines: dict[str, float] = field(repr=False)
    night_metrics: pd.DataFrame = field(repr=False)
    summary: pd.DataFrame = field(repr=False)
    offset_rule: str = OFFSET_RULE
    fold_models: dict[int, SleepModel] = field(default_factory=dict, repr=False)

    def base_for(self, participant_id: str, *, nights: Sequence[Night] | None = None) -> PooledBase:
        """The pooled models a personal model of ``participant_id`` starts from.

        Parameters
        ----------
        participant_id : str
        nights : sequence of Night, default=None
            The participant's nights, for the descriptors of a participant the pooled models were
            not given (ignored otherwise).

        Returns
        -------
        PooledBase
            ``held_out`` = the fold model that left the participant out (the final model for a
            participant it never saw); ``final`` = :attr:`model`.

        Raises
        ------
        TrainingDataError
            If the participant is unknown to the pooled training and no ``nights`` are given
            (code ``no_descriptors``).
        """
        if participant_id in self.descriptors:
            descriptors = dict(self.descriptors[participant_id])
        elif nights is not None:
            descriptors = participant_descriptors(list(nights))
        else:
            raise TrainingDataError(f"the pooled model has no descriptors of participant {participant_id!r}; "
                                    "pass their nights", code="no_descriptors")
        fold = self.folds.get(participant_id)
        held_out = self.model if fold is None else self.fold_models[fold]
        return PooledBase(final=self.model, held_out=held_out, descriptors=descriptors)

    def to_dict(self) -> dict[str, Any]:
        """JSON-able summary (no per-epoch arrays)."""
        return {"threshold": self.model.threshold_, "n_rounds": self.model.n_rounds_, "offsets": self.offsets,
                "shrinkage": self.shrinkage_search.to_dict(), "folds": self.folds, "offset_rule": self.offset_rule,
                "night_metrics": self.night_metrics.to_dict(orient="records"),
                "summary": self.summary.reset_index().to_dict(orient="records")}
