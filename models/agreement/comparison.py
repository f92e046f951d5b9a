"""One comparison of methods with the reference: one night (:func:`compare_night`), many nights
(:func:`comparison_tables`).

Every report that sets a method next to the PSG reference goes through :func:`compare_night`,
so a parameter or a metric means the same thing in all of them:

- every method scores the whole recording (its windows see the epochs around lights-off and
  lights-on); the comparison uses the in-bed epochs only;
- an epoch is *unscored by the methods* when its counts are missing (``missing``) or any
  method left it unscored (NaN call); every method's calls are masked there, so all methods of
  a night are compared on the same epochs (the always-sleep baseline included);
- epoch metrics (:func:`models.agreement.epoch_metrics.epoch_agreement`) are computed on the
  in-bed epochs, the reference's unscored epochs and the epochs unscored by the methods dropped
  (the latter counted in ``unscored_epochs``);
- sleep parameters (:func:`models.scoring.parameters.sleep_parameters`) of the reference and of
  each method are computed with both kinds of unscored epoch masked on both sides, so both
  sides of a difference cover the same epochs (``unscored_epochs`` is the same on both sides),
  with the same ``parameter_options``;
- differences are method - reference.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray

from ..scoring.parameters import PARAMETER_NAMES, SleepParameters, sleep_parameters
from ..scoring.rescoring import InvalidSleepVectorError, as_sleep_vector
from .bland_altman import BLAND_ALTMAN_PARAMETERS, REFERENCE, bland_altman_table
from .epoch_metrics import ScoredNight, agreement_table, epoch_agreement

__all__ = ["ERROR_PARAMETERS", "PARAMETER_COLUMNS", "ComparisonTables", "NightComparison", "compare_night",
           "comparison_tables"]

#: Parameters whose per-night error (method - reference) is tabulated.
ERROR_PARAMETERS: tuple[str, ...] = ("sol_min", "tst_min", "waso_min", "awakenings", "sleep_efficiency_pct")
#: Columns of :attr:`ComparisonTables.parameters`, in order.
PARAMETER_COLUMNS: tuple[str, ...] = ("participant_id", "night_id", "method", *PARAMETER_NAMES, "sleep_onset_idx",
                                      "final_awakening_idx", "label")


@dataclass(frozen=True, eq=False)
class NightComparison:
    """Result of :func:`compare_night`: every method of one night next to the reference.

    Attributes
    ----------
    participant_id, night_id : str
        Name the night in the tables of :func:`comparison_tables`.
    label : str or None
        The lab's own name for the night.
    reference_parameters : SleepParameters
        The reference's sleep parameters over the in-bed epochs (minutes, percent, counts), the
        epochs unscored by the methods masked.
    parameters : dict of str to SleepParameters
        Per method, its sleep parameters with the reference's unscored epochs (and those unscored
        by the methods) masked.
    differences : dict of str to dict of str to float
        Per method, method - reference for :data:`~models.agreement.bland_altman.BLAND_ALTMAN_PARAMETERS`
        (the parameter's unit; NaN where either side is undefined).
    epoch_metrics : dict of str to dict of str to float
        Per method, :func:`~models.agreement.epoch_metrics.epoch_agreement` on the in-bed epochs.
    scored : list of ScoredNight
        Per method, its in-bed calls (NaN where unscored by the methods) and score next to the
        in-bed reference (for
        :func:`~models.agreement.epoch_metrics.agreement_table`).
    """

    participant_id: str
    night_id: str
    label: str | None
    reference_parameters: SleepParameters
    parameters: dict[str, SleepParameters]
    differences: dict[str, dict[str, float]]
    epoch_metrics: dict[str, dict[str, float]]
    scored: list[ScoredNight] = field(repr=False)


def compare_night(reference: ArrayLike, sides: Mapping[str, tuple[ArrayLike, ArrayLike | None]], *,
                  epoch_seconds: int, lights_off_idx: int = 0, lights_on_idx: int | None = None,
                  parameter_options: Mapping[str, Any] | None = None, participant_id: str = "",
                  night_id: str = "", label: str | None = None,
                  missing: ArrayLike | None = None) -> NightComparison:
    """Compare every method of one night with its reference.

    Parameters
    ----------
    reference : array-like of shape (n_epochs,)
        Reference labels of the whole recording: 1 = sleep, 0 = wake, NaN = unscored.
    sides : mapping of str to (sleep, score)
        Per method (in table order): ``sleep`` of shape (n_epochs,), 1 = sleep, 0 = wake, NaN =
        unscored, over the whole recording, and ``score`` of shape (n_epochs,) (higher = more
        likely sleep, for ROC AUC) or None. May be empty (the reference's parameters only).
    epoch_seconds : {15, 30, 60}
        Epoch length in seconds.
    lights_off_idx : int, default=0
        First in-bed epoch.
    lights_on_idx : int or None, default=None
        End of the in-bed interval (exclusive); None = end of the recording.
    parameter_options : mapping, default=None
        Keyword options of :func:`models.scoring.parameters.sleep_parameters` (onset run,
        awakening length, WASO end), the same for the reference and every method.
    participant_id, night_id : str, default=""
        Name the night in :func:`comparison_tables`.
    label : str or None, default=None
        The lab's own name for the night, kept beside ``night_id``.
    missing : array-like of bool, shape (n_epochs,), default=None
        Epochs without counts (:attr:`Night.missing <models.nights.night.Night.missing>`): no
        method can score them, so they are masked for the reference too, also when ``sides`` is
        empty. None = only the methods' own NaN calls mark such epochs.

    Returns
    -------
    NightComparison

    Raises
    ------
    InvalidSleepVectorError
        If a method's calls or score or ``missing`` differ in length from the reference, or the
        calls hold other values than 0, 1 and NaN.
    InvalidInBedIntervalError, UnsupportedEpochLengthError, NightbankError
        As :func:`~models.scoring.parameters.sleep_parameters` (bad in-bed interval, epoch length
        or parameter option).
    """
    ref = as_sleep_vector(reference, allow_unscored=True, name="reference")
    options = dict(parameter_options or {})

    def parameters_of(sleep: NDArray[np.float64]) -> SleepParameters:
        return sleep_parameters(sleep, epoch_seconds, lights_off_idx=lights_off_idx, lights_on_idx=lights_on_idx,
                                **options)

    checked: dict[str, tuple[NDArray[np.float64], NDArray[np.float64] | None]] = {}
    for method, (sleep, score) in sides.items():
        calls = as_sleep_vector(sleep, name=method)
        scores = None if score is None else np.asarray(score, dtype=np.float64)
        if calls.size != ref.size or (scores is not None and scores.shape != ref.shape):
            raise InvalidSleepVectorError(f"night {night_id!r}, method {method!r}: calls and score must cover the "
                                          f"{ref.size} epochs of the reference, got {calls.size}")
        checked[method] = (calls, scores)
    no_call = np.zeros(ref.size, dtype=bool) if missing is None else np.asarray(missing, dtype=bool)
    if no_call.shape != ref.shape:
        raise InvalidSleepVectorError(f"night {night_id!r}: missing must cover the {ref.size} epochs of the "
                                      f"reference, got shape {no_call.shape}")
    for calls, _ in checked.values():
        no_call = no_call | np.isnan(calls)
    unscored = np.isnan(ref) | no_call
    reference_parameters = parameters_of(np.where(unscored, np.nan, ref))  # checks the in-bed interval first
    bed = slice(lights_off_idx, ref.size if lights_on_idx is None else lights_on_idx)
    parameters: dict[str, SleepParameters] = {}
    differences: dict[str, dict[str, float]] = {}
    epoch_metrics: dict[str, dict[str, float]] = {}
    scored: list[ScoredNight] = []
    for method, (calls, scores) in checked.items():
        own = parameters_of(np.where(unscored, np.nan, calls))
        parameters[method] = own
        differences[method] = {name: getattr(own, name) - getattr(reference_parameters, name)
                               for name in BLAND_ALTMAN_PARAMETERS}
        night = ScoredNight(participant_id=participant_id, night_id=night_id, method=method, reference=ref[bed],
                            predicted=np.where(no_call, np.nan, calls)[bed],
                            score=None if scores is None else scores[bed])
        epoch_metrics[method] = epoch_agreement(night.reference, night.predicted, score=night.score)
        scored.append(night)
    return NightComparison(participant_id=participant_id, night_id=night_id, label=label,
                           reference_parameters=reference_parameters, parameters=parameters,
                           differences=differences, epoch_metrics=epoch_metrics, scored=scored)


@dataclass(frozen=True, eq=False)
class ComparisonTables:
    """Result of :func:`comparison_tables` (pandas DataFrames).

    Attributes
    ----------
    epoch_metrics : pandas.DataFrame
        :func:`~models.agreement.epoch_metrics.agreement_table` of every method: per night, per
        participant (mean and SD over nights) and pooled over all in-bed epochs.
    parameters : pandas.DataFrame
        One row per night and method, the reference first on each night (method
        ``"reference"``), then the methods in their order: :data:`PARAMETER_COLUMNS`.
    parameter_errors : pandas.DataFrame
        One row per night and method (the reference left out): ``participant_id``, ``night_id``,
        ``method``, ``<parameter>_error`` = method - reference for :data:`ERROR_PARAMETERS`, and
        ``label``.
    bland_altman : pandas.DataFrame
        :func:`~models.agreement.bland_altman.bland_altman_table` of every method against the
        reference, across all nights.
    """

    epoch_metrics: pd.DataFrame = field(repr=False)
    parameters: pd.DataFrame = field(repr=False)
    parameter_errors: pd.DataFrame = field(repr=False)
    bland_altman: pd.DataFrame = field(repr=False)


def comparison_tables(nights: Iterable[NightComparison]) -> ComparisonTables:
    """The study tables of many compared nights.

    Parameters
    ----------
    nights : iterable of NightComparison
        As returned by :func:`compare_night`, in table order (a night's methods may differ from
        another's, e.g. a model that has no held-out prediction for it).

    Returns
    -------
    ComparisonTables
        Nights are matched on (``participant_id``, ``night_id``).
    """
    scored: list[ScoredNight] = []
    metrics: list[dict[str, float]] = []
    parameter_rows: list[dict[str, Any]] = []
    error_rows: list[dict[str, Any]] = []
    for night in nights:
        ids = {"participant_id": night.participant_id, "night_id": night.night_id}
        parameter_rows.append(ids | {"method": REFERENCE} | night.reference_parameters.as_dict()
                              | {"label": night.label})
        for method, params in night.parameters.items():
            parameter_rows.append(ids | {"method": method} | params.as_dict() | {"label": night.label})
            error_rows.append(ids | {"method": method}
                              | {f"{name}_error": night.differences[method][name] for name in ERROR_PARAMETERS}
                              | {"label": night.label})
        scored += night.scored
        metrics += [night.epoch_metrics[n.method] for n in night.scored]
    parameters = pd.DataFrame(parameter_rows, columns=list(PARAMETER_COLUMNS))
    errors = pd.DataFrame(error_rows, columns=["participant_id", "night_id", "method",
                                               *(f"{name}_error" for name in ERROR_PARAMETERS), "label"])
    return ComparisonTables(epoch_metrics=agreement_table(scored, night_metrics=metrics), parameters=parameters,
                            parameter_errors=errors, bland_altman=bland_altman_table(parameters))
