"""Epoch-by-epoch agreement at participant level, with participant-bootstrap intervals.

A pooled-over-epochs figure is dominated by the participants with most nights (and most wake).
Here each participant's nights are pooled into one confusion per participant and method
(:func:`models.agreement.epoch_metrics.epoch_agreement`), and the group figure is the mean over
participants with a participant-bootstrap interval (bootstrap-t; Menghini et al. 2021 recommend
individual-level figures, from memory; resampling participants is common practice). Every
method is resampled with the same draws of participant indices (same seed), so differences
between methods of the same participants are comparable.

Paired differences (e.g. personal - pooled model, model - best rule) are taken per participant
first and then averaged, with a participant-bootstrap interval and, beside it, the paired
t-interval.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import NDArray
from scipy import stats

from ..scoring.protocol import DEFAULT_PROTOCOL, StudyProtocol
from ._bootstrap import (
    InvalidAgreementInputError,
    draw_counts,
    effective_protocol,
    json_dict,
    json_safe,
    weighted_mean_interval,
)
from .epoch_metrics import EPOCH_METRIC_NAMES, ScoredNight, epoch_agreement

__all__ = ["PARTICIPANT_METRICS", "PairedDifference", "ParticipantEpochFigures", "paired_participant_difference",
           "participant_epoch_figures"]

#: Metrics summarised at group level by default.
PARTICIPANT_METRICS: tuple[str, ...] = ("sensitivity", "specificity", "balanced_accuracy", "accuracy", "kappa",
                                        "f1_wake", "mcc")


@dataclass(frozen=True, eq=False)
class PairedDifference:
    """Mean over participants of a per-participant difference a - b.

    Attributes
    ----------
    label_a, label_b, metric : str
    n_participants : int
        Participants with a finite value on both sides.
    mean_a, mean_b, mean_difference : float
    ci : tuple of float
        Participant-bootstrap (bootstrap-t) interval of ``mean_difference``.
    t_ci : tuple of float
        Paired t-interval (``scipy.stats.t``), for comparison.
    ci_level : float
    n_boot, seed : int
    per_participant : dict of str to float
        The difference of each participant.
    """

    label_a: str
    label_b: str
    metric: str
    n_participants: int
    mean_a: float
    mean_b: float
    mean_difference: float
    ci: tuple[float, float]
    t_ci: tuple[float, float]
    ci_level: float
    n_boot: int
    seed: int
    per_participant: dict[str, float] = field(repr=False)

    def to_dict(self) -> dict[str, Any]:
        """Every field, JSON-safe."""
        return json_dict({name: getattr(self, name) for name in self.__dataclass_fields__})


def paired_participant_difference(values_a: Mapping[str, float] | pd.Series, values_b: Mapping[str, float] | pd.Series,
                                  *, label_a: str = "a", label_b: str = "b", metric: str = "value",
                                  protocol: StudyProtocol = DEFAULT_PROTOCOL, ci_level: float | None = None,
                                  n_boot: int | None = None, seed: int | None = None) -> PairedDifference:
    """Mean per-participant difference ``a - b`` with a participant-bootstrap interval.

    Parameters
    ----------
    values_a, values_b : mapping or Series of participant id to float
        One value per participant (e.g. that participant's balanced accuracy under two methods);
        participants missing or non-finite on either side are left out.
    label_a, label_b, metric : str
        Labels copied into the result.
    protocol : StudyProtocol, default=DEFAULT_PROTOCOL
        Gives ``ci_level``, ``bootstrap_resamples`` and ``seed``; the keywords override them.

    Returns
    -------
    PairedDifference
    """
    proto = effective_protocol(protocol, ci_level, n_boot, seed)
    a, b = pd.Series(dict(values_a), dtype=np.float64), pd.Series(dict(values_b), dtype=np.float64)
    both = a.index.intersection(b.index, sort=False)
    diff = (a[both] - b[both]).astype(np.float64)
    diff = diff[np.isfinite(diff.to_numpy())]
    d: NDArray[np.float64] = np.asarray(diff.to_numpy(), dtype=np.float64)
    k = int(d.size)
    nan = float("nan")
    ci = t_ci = (nan, nan)
    if k >= 2:
        ci = weighted_mean_interval(d, draw_counts(k, proto.bootstrap_resamples, proto.seed), proto.ci_level)
        half = float(stats.t.ppf(0.5 + proto.ci_level / 2.0, k - 1)) * float(d.std(ddof=1)) / np.sqrt(k)
        t_ci = (float(d.mean()) - half, float(d.mean()) + half)
    return PairedDifference(
        label_a=label_a, label_b=label_b, metric=metric, n_participants=k,
        mean_a=float(a[diff.index].mean()) if k else nan, mean_b=float(b[diff.index].mean()) if k else nan,
        mean_difference=float(d.mean()) if k else nan, ci=ci, t_ci=t_ci, ci_level=proto.ci_level,
        n_boot=proto.bootstrap_resamples, seed=proto.seed,
        per_participant={str(i): float(v) for i, v in diff.items()})


@dataclass(frozen=True, eq=False)
class ParticipantEpochFigures:
    """Result of :func:`participant_epoch_figures`.

    Attributes
    ----------
    participants : pandas.DataFrame
        One row per method and participant: ``method``, ``participant_id``, ``n_nights``,
        ``n_epochs`` and every name of :data:`EPOCH_METRIC_NAMES` (that participant's nights pooled).
    group : pandas.DataFrame
        One row per method and metric: ``method``, ``metric``, ``n_participants`` (finite values),
        ``n_nights``, ``mean``, ``sd`` (ddof=1), ``ci_low``, ``ci_high``.
    protocol : dict
        The protocol, with the statistics options as used.
    """

    participants: pd.DataFrame = field(repr=False)
    group: pd.DataFrame = field(repr=False)
    protocol: dict[str, Any]

    def difference(self, method_a: str, method_b: str, metric: str) -> PairedDifference:
        """:func:`paired_participant_difference` of ``metric`` between two methods (a - b)."""
        for name in (method_a, method_b):
            if name not in set(self.participants["method"]):
                raise InvalidAgreementInputError(f"no participant figures for method {name!r}")
        if metric not in EPOCH_METRIC_NAMES:
            raise InvalidAgreementInputError(f"unknown metric {metric!r}")
        per = self.participants.set_index("participant_id")
        return paired_participant_difference(
            per.loc[per["method"] == method_a, metric], per.loc[per["method"] == method_b, metric],
            label_a=method_a, label_b=method_b, metric=metric, protocol=StudyProtocol.from_dict(self.protocol))

    def to_dict(self) -> dict[str, Any]:
        """``participants`` and ``group`` as lists of JSON-safe records, and ``protocol``."""
        return {"participants": json_safe(self.participants.to_dict(orient="records")),
                "group": json_safe(self.group.to_dict(orient="records")), "protocol": json_safe(self.protocol)}


def _participant_rows(nights: Sequence[ScoredNight]) -> list[dict[str, Any]]:
    groups: dict[tuple[str, str], list[ScoredNight]] = {}
    for night in nights:
        groups.setdefault((night.method, night.participant_id), []).append(night)
    rows = []
    for (method, participant), mine in groups.items():
        scores: NDArray[np.float64] | None = None
        if all(n.score is not None for n in mine):
            scores = np.concatenate([np.asarray(n.score, dtype=np.float64) for n in mine])
        metrics = epoch_agreement(np.concatenate([np.asarray(n.reference, dtype=np.float64) for n in mine]),
                                  np.concatenate([np.asarray(n.predicted, dtype=np.float64) for n in mine]),
                                  score=scores)
        rows.append({"method": method, "participant_id": participant, "n_nights": len(mine),
                     "n_epochs": int(metrics["n_epochs"])} | {m: metrics[m] for m in EPOCH_METRIC_NAMES})
    return rows


def participant_epoch_figures(nights: Iterable[ScoredNight], *, metrics: Sequence[str] = PARTICIPANT_METRICS,
                              protocol: StudyProtocol = DEFAULT_PROTOCOL, ci_level: float | None = None,
                              n_boot: int | None = None, seed: int | None = None) -> ParticipantEpochFigures:
    """Per-participant epoch metrics and their group mean with a participant-bootstrap interval.

    Parameters
    ----------
    nights : iterable of ScoredNight
        Any number of methods, participants and nights (in-bed epochs; NaN = excluded/unscored).
    metrics : sequence of str, default=PARTICIPANT_METRICS
        Names of :data:`EPOCH_METRIC_NAMES` summarised in ``group``.
    protocol : StudyProtocol, default=DEFAULT_PROTOCOL
        Gives ``ci_level``, ``bootstrap_resamples`` and ``seed``; the keywords override them.

    Returns
    -------
    ParticipantEpochFigures

    Raises
    ------
    InvalidAgreementInputError
        For an unknown metric name.
    """
    unknown = [m for m in metrics if m not in EPOCH_METRIC_NAMES]
    if unknown:
        raise InvalidAgreementInputError(f"unknown metrics {', '.join(map(repr, unknown))}; known: "
                                         f"{', '.join(EPOCH_METRIC_NAMES)}")
    proto = effective_protocol(protocol, ci_level, n_boot, seed)
    rows = _participant_rows(list(nights))
    participants = pd.DataFrame(rows, columns=["method", "participant_id", "n_nights", "n_epochs",
                                               *EPOCH_METRIC_NAMES])
    group_rows = []
    for method, mine in participants.groupby("method", sort=False):
        counts = draw_counts(len(mine), proto.bootstrap_resamples, proto.seed)
        for metric in metrics:
            values = mine[metric].to_numpy(dtype=np.float64)
            finite = values[np.isfinite(values)]
            low, high = weighted_mean_interval(values, counts, proto.ci_level)
            group_rows.append({
                "method": method, "metric": metric, "n_participants": int(finite.size),
                "n_nights": int(mine.loc[np.isfinite(values), "n_nights"].sum()),
                "mean": float(finite.mean()) if finite.size else float("nan"),
                "sd": float(finite.std(ddof=1)) if finite.size >= 2 else float("nan"),
                "ci_low": low, "ci_high": high})
    group = pd.DataFrame(group_rows, columns=["method", "metric", "n_participants", "n_nights", "mean", "sd",
                                              "ci_low", "ci_high"])
    return ParticipantEpochFigures(participants=participants, group=group, protocol=proto.to_dict())
