"""Classical rules calibrated to a study's count units, leave-participants-out.

Every classical rule was fitted to the counts of one device (published-methods, general
caveat; Biegański et al. 2021: the rules are low-pass filters followed by a threshold), so on
another device the published coefficients are off by a scale. A study's labelled nights can
set that scale, but a rule calibrated on a participant's own nights and then scored on them is
flattered, so the calibrated rule is evaluated leave-participants-out: each participant's
nights are scored with the value chosen on the *other* participants' labelled nights
(participants sharing a night, :func:`models.learning.splits.participant_groups`, are left out
together).

One number per rule is calibrated:

==================  =============  ==================================================================
rule                parameter      grid
==================  =============  ==================================================================
cole-kripke         count_scale    :data:`COUNT_SCALE_GRID` x the published count scale (1 unless given)
sadeh               count_scale    the same
count-threshold     threshold      :data:`THRESHOLD_GRID`, counts (the published value is 40 counts)
==================  =============  ==================================================================

``+webster`` variants are calibrated on their own (the rescoring runs on the calibrated calls).
The value chosen maximises the mean over nights of the per-night balanced accuracy of the
in-bed epochs (sensitivity and specificity with sleep as the positive class; a night with one
reference class only does not count); ties go to the value nearest the published one (on a
log scale). Calibrated methods are named ``<method>`` + :data:`CALIBRATED_SUFFIX`.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from ..scoring.rescoring import webster_rescore
from ..scoring.rules import score_with_rule

__all__ = ["CALIBRATED_PARAMETER", "CALIBRATED_SUFFIX", "COUNT_SCALE_GRID", "THRESHOLD_GRID", "RuleCalibration",
           "calibrate_rule", "calibrate_rules", "calibrated_method"]

#: Suffix of a calibrated method's name, e.g. ``cole-kripke:calibrated``.
CALIBRATED_SUFFIX = ":calibrated"
#: Factors of the count scale tried (powers of sqrt 2 from 1/32 to 32; 1 = as published).
COUNT_SCALE_GRID: tuple[float, ...] = tuple(float(2.0 ** (k / 2)) for k in range(-10, 11))
#: Count-threshold thresholds tried, counts (40 x powers of sqrt 2, 0.3125 .. 640; 40 = as published).
THRESHOLD_GRID: tuple[float, ...] = tuple(float(40.0 * 2.0 ** (k / 2)) for k in range(-14, 9))
#: The calibrated parameter of each base rule.
CALIBRATED_PARAMETER: Mapping[str, str] = {"cole-kripke": "count_scale", "sadeh": "count_scale",
                                           "count-threshold": "threshold"}


def calibrated_method(method: str) -> str:
    """Name of the calibrated variant of ``method`` (``cole-kripke+webster:calibrated``)."""
    return f"{method}{CALIBRATED_SUFFIX}"


@dataclass(frozen=True, eq=False)
class RuleCalibration:
    """Result of :func:`calibrate_rule`.

    Attributes
    ----------
    method : str
        The rule's method id (``+webster`` included).
    parameter : {"count_scale", "threshold"}
    published : float
        The parameter's value as published (or as given).
    grid : tuple of float
        Values tried, ascending.
    per_participant : dict of str to float
        Participant -> value chosen without them (and without the participants linked to them);
        the value their nights are scored with.
    overall : float
        Value chosen on every participant (for scoring new participants; not for figures).
    mean_balanced_accuracy : tuple of float
        Mean per-night balanced accuracy over all nights at each grid value.
    """

    method: str
    parameter: str
    published: float
    grid: tuple[float, ...]
    per_participant: dict[str, float]
    overall: float
    mean_balanced_accuracy: tuple[float, ...] = field(repr=False)

    @property
    def at_grid_edge(self) -> bool:
        """Some chosen value is the smallest or largest tried (the best may lie outside the grid)."""
        return any(v in (self.grid[0], self.grid[-1]) for v in (self.overall, *self.per_participant.values()))

    @property
    def name(self) -> str:
        """The calibrated method's name in tables."""
        return calibrated_method(self.method)

    def options(self, participant_id: str, rule_options: Mapping[str, Any] | None = None,
                *, count_scale: float = 1.0) -> dict[str, Any]:
        """Keyword arguments of :func:`~models.scoring.rules.score_with_rule` for a participant's nights."""
        value = self.per_participant[participant_id]
        options = dict(rule_options or {})
        if self.parameter == "threshold":
            return options | {"threshold": value, "count_scale": count_scale}
        return options | {"count_scale": value}

    def to_dict(self) -> dict[str, Any]:
        """JSON-able form (values as plain numbers)."""
        return {"method": self.method, "name": self.name, "parameter": self.parameter, "published": self.published,
                "overall": self.overall, "per_participant": dict(self.per_participant), "grid": list(self.grid),
                "at_grid_edge": self.at_grid_edge}


def _balanced_accuracy(reference: NDArray[np.float64], sleep: NDArray[np.float64]) -> float:
    keep = np.isfinite(reference) & np.isfinite(sleep)
    y, s = reference[keep], sleep[keep]
    n_sleep, n_wake = int(np.sum(y == 1)), int(np.sum(y == 0))
    if n_sleep == 0 or n_wake == 0:
        return float("nan")
    return 0.5 * (float(np.sum((y == 1) & (s == 1))) / n_sleep + float(np.sum((y == 0) & (s == 0))) / n_wake)

#: zero-count minutes between nights scored together: more than any rule's window reaches on both sides
_GAP_MINUTES = 16


def _grid_scores(nights: Sequence[Any], method: str, options: Mapping[str, Any],
                 settings: Sequence[Mapping[str, float]]) -> NDArray[np.float64]:
    """Per-night balanced accuracy of the in-bed epochs, shape (n_nights, n_settings), one column per
    ``settings`` (keyword arguments of the rule).

    Nights without missing counts and of one epoch length are scored together: laid end to end, each
    starting on a minute and separated by :data:`_GAP_MINUTES` of zero counts, which is what a rule
    sees past the ends of a lone recording, so each night's calls are those of scoring it alone (a
    Webster-rescored method is rescored per night). Other nights are scored one by one.
    """
    scores = np.full((len(nights), len(settings)), np.nan)
    base, _, suffix = method.partition("+")
    together: dict[int, list[int]] = {}
    for i, night in enumerate(nights):
        counts = np.asarray(night.counts, dtype=np.float64)
        if np.isfinite(counts).all() and np.asarray(night.reference).shape == counts.shape:
            together.setdefault(int(night.epoch_seconds), []).append(i)
        else:
            bed = slice(night.lights_off_idx, night.lights_on_idx)
            reference = np.asarray(night.reference, dtype=np.float64)[bed]
            for j, kwargs in enumerate(settings):
                sleep = score_with_rule(night.counts, night.epoch_seconds, method, **options, **kwargs).sleep
                scores[i, j] = _balanced_accuracy(reference, np.asarray(sleep, dtype=np.float64)[bed])
    for epoch_seconds, rows in together.items():
        per_min = 60 // epoch_seconds
        starts, pieces, position = [], [], 0
        for i in rows:
            counts = np.asarray(nights[i].counts, dtype=np.float64)
            span = -(-counts.size // per_min) * per_min + _GAP_MINUTES * per_min
            starts.append(position)
            pieces += [counts, np.zeros(span - counts.size)]
            position += span
        laid = np.concatenate(pieces)
        where, code, truth = [], [], []
        for row, (i, start) in enumerate(zip(rows, starts, strict=True)):
            night = nights[i]
            n = np.asarray(night.counts).size
            in_bed = np.arange(n)[slice(night.lights_off_idx, night.lights_on_idx)]
            where.append(start + in_bed)
            code.append(np.full(in_bed.size, row))
            truth.append(np.asarray(night.reference, dtype=np.float64)[in_bed])
        at, owner, reference = np.concatenate(where), np.concatenate(code), np.concatenate(truth)
        for j, kwargs in enumerate(settings):
            sleep = score_with_rule(laid, epoch_seconds, base, **options, **kwargs).sleep
            if suffix:
                sleep = sleep.copy()
                for i, start in zip(rows, starts, strict=True):
                    n = np.asarray(nights[i].counts).size
                    sleep[start:start + n] = webster_rescore(sleep[start:start + n], epoch_seconds)
            scores[rows, j] = _balanced_accuracies(reference, sleep[at], owner, len(rows))
    return scores


def _balanced_accuracies(reference: NDArray[np.float64], sleep: NDArray[np.float64], owner: NDArray[np.intp],
                         n_nights: int) -> NDArray[np.float64]:
    """:func:`_balanced_accuracy` of each night at once (``owner`` = night of each epoch)."""
    keep = np.isfinite(reference) & np.isfinite(sleep)

    def count(mask: NDArray[np.bool_]) -> NDArray[np.float64]:
        return np.bincount(owner[mask], minlength=n_nights).astype(np.float64)

    is_sleep, is_wake = keep & (reference == 1), keep & (reference == 0)
    n_sleep, n_wake = count(is_sleep), count(is_wake)
    with np.errstate(invalid="ignore", divide="ignore"):
        value = 0.5 * (count(is_sleep & (sleep == 1)) / n_sleep + count(is_wake & (sleep == 0)) / n_wake)
    return np.where((n_sleep > 0) & (n_wake > 0), value, np.nan)


def _column_means(scores: NDArray[np.float64]) -> NDArray[np.float64]:
    """NaN-skipping mean of each column (NaN for a column without a finite value)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.asarray(np.nanmean(scores, axis=0), dtype=np.float64)


def _best(scores: NDArray[np.float64], distance: NDArray[np.float64]) -> int:
    """Best finite score; ties go to the smallest distance from the published value."""
    finite = np.where(np.isfinite(scores), scores, -np.inf)
    top = np.flatnonzero(finite == finite.max())
    return int(top[np.argmin(distance[top])])


def calibrate_rule(nights: Sequence[Any], method: str, *, groups: Mapping[str, int] | None = None,
                   count_scale: float = 1.0, rule_options: Mapping[str, Any] | None = None,
                   grid: Sequence[float] | None = None) -> RuleCalibration:
    """Calibrate one rule's count scale or threshold, leave-participants-out.

    Parameters
    ----------
    nights : sequence of NightRecord
        Labelled nights (:class:`~models.agreement.rule_comparison.NightRecord`: ``participant_id``,
        ``reference``, ``counts``, ``epoch_seconds``, ``lights_off_idx``, ``lights_on_idx``).
    method : str
        A method id of :func:`~models.scoring.rules.score_with_rule` (``+webster`` allowed).
    groups : mapping of str to int, default=None
        Participant -> group; a group's participants are left out together. None = each
        participant their own group.
    count_scale : float, default=1.0
        The published count scale; the count-scale grid multiplies it, and the threshold grid is
        tried at it.
    rule_options : mapping, default=None
        Other options of the rule (kept as given; a ``threshold`` given for count-threshold is
        its published value).
    grid : sequence of float, default=None
        Values tried; None = :data:`COUNT_SCALE_GRID` (times ``count_scale``) or :data:`THRESHOLD_GRID`.

    Returns
    -------
    RuleCalibration
        A participant whose group holds every night gets the published value (nothing else to
        calibrate on).
    """
    base = method.partition("+")[0]
    parameter = CALIBRATED_PARAMETER[base]
    options = dict(rule_options or {})
    if parameter == "threshold":
        published = float(options.pop("threshold", 40.0))
        values = np.asarray(sorted(grid if grid is not None else THRESHOLD_GRID), dtype=np.float64)
    else:
        published = float(count_scale)
        values = np.asarray(sorted(grid if grid is not None else np.multiply(COUNT_SCALE_GRID, count_scale)),
                            dtype=np.float64)
    scores = _grid_scores(nights, method, options, [{"threshold": v, "count_scale": count_scale} if parameter ==
                                                    "threshold" else {"count_scale": v} for v in values])
    owners = [n.participant_id for n in nights]
    group_of = {pid: (groups or {}).get(pid, -1 - k) for k, pid in enumerate(dict.fromkeys(owners))}
    distance = np.abs(np.log(values / published))

    def chosen(rows: NDArray[np.bool_]) -> float:
        if not rows.any() or not np.isfinite(scores[rows]).any():
            return published
        return float(values[_best(_column_means(scores[rows]), distance)])

    row_groups = np.array([group_of[p] for p in owners])
    per_participant = {pid: chosen(row_groups != group_of[pid]) for pid in group_of}
    means = _column_means(scores) if len(nights) else np.full(values.size, np.nan)
    return RuleCalibration(method=method, parameter=parameter, published=published,
                           grid=tuple(float(v) for v in values), per_participant=per_participant,
                           overall=chosen(np.ones(len(nights), dtype=bool)),
                           mean_balanced_accuracy=tuple(float(v) for v in means))


def calibrate_rules(nights: Sequence[Any], methods: Sequence[str], *, groups: Mapping[str, int] | None = None,
                    count_scale: float = 1.0,
                    rule_options: Mapping[str, Mapping[str, Any]] | None = None) -> dict[str, RuleCalibration]:
    """:func:`calibrate_rule` for each of ``methods``; empty with fewer than two participant groups.

    Parameters
    ----------
    nights : sequence of NightRecord
    methods : sequence of str
        Method ids (``+webster`` allowed).
    groups : mapping of str to int, default=None
        As :func:`calibrate_rule`.
    count_scale : float, default=1.0
    rule_options : mapping, default=None
        Options per base method id, e.g. ``{"count-threshold": {"threshold": 20}}``.

    Returns
    -------
    dict of str to RuleCalibration
        By method id. Leave-participants-out needs another group to calibrate on, so with one
        group (or none) nothing is calibrated.
    """
    pids = list(dict.fromkeys(n.participant_id for n in nights))
    if len({(groups or {}).get(pid, -1 - k) for k, pid in enumerate(pids)}) < 2:
        return {}
    options = rule_options or {}
    return {m: calibrate_rule(nights, m, groups=groups, count_scale=count_scale,
                              rule_options=options.get(m.partition("+")[0])) for m in methods}
