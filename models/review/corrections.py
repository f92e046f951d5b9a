"""A reviewer's correction of one night: per-epoch labels, their sleep parameters and two reviews compared.

A review starts from the calls shown to the reviewer (``base_calls``) and marks intervals of epochs:

- ``wake_intervals`` and ``sleep_intervals``: ``{"start_epoch": int, "end_epoch": int}`` with the end
  **exclusive** (``0 <= start_epoch < end_epoch <= n_epochs``; epoch indices count from the start of
  the recording). Wake intervals are applied first, then sleep intervals, so **where a wake and a
  sleep interval overlap, the sleep interval wins**: a reviewer marks a short sleep bout inside a
  long wake stretch by drawing it over the wake one. Intervals of the same kind may overlap (their
  union is set).
- ``rest_interval``: the epochs the reviewer judged to be the rest (in-bed) period; epochs outside it
  become NaN (not in bed, not judged). None keeps every epoch of ``base_calls``.

Instead of intervals a review may give ``labels``: one value per epoch, 1 (sleep), 0 (wake) or
None/NaN (not judged).

The parameters of a review are those of the study
(:func:`models.scoring.parameters.sleep_parameters` under its
:class:`~models.scoring.protocol.StudyProtocol`); nothing is redefined here. Their in-bed interval
is the span of the judged epochs unless the caller gives it: a review with a rest interval is judged
over it; a review without one keeps every epoch of ``base_calls``, so the caller passes the night's
in-bed interval (``lights_off_idx`` / ``lights_on_idx``) to get the parameters over lights-off to
lights-on.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ..errors import NightbankError, Problem
from ..scoring.parameters import sleep_parameters
from ..scoring.protocol import DEFAULT_PROTOCOL, StudyProtocol

__all__ = ["InvalidReviewError", "judged_span", "labels_from_review", "review_discrepancy", "review_parameters",
           "runs_of"]


class InvalidReviewError(NightbankError):
    """A review (intervals or labels) is malformed; ``problems`` lists every defect, each naming its field."""

    code = "invalid_review"
    status = 422

    def __init__(self, problems: list[Problem]) -> None:
        self.problems = list(problems)
        head = "; ".join(p.message for p in self.problems[:3])
        more = f" (+{len(self.problems) - 3} more)" if len(self.problems) > 3 else ""
        super().__init__(f"invalid review: {head}{more}")


def _problem(field: str, message: str) -> Problem:
    return Problem("invalid_review", f"{field}: {message}", {"field": field})


def _is_index(value: object) -> bool:
    return isinstance(value, (int, np.integer)) and not isinstance(value, (bool, np.bool_))


def _interval(item: object, field: str, n_epochs: int, problems: list[Problem]) -> tuple[int, int] | None:
    """``(start, end)`` of one interval, or None after appending its problems."""
    if not isinstance(item, Mapping):
        problems.append(_problem(field, f"must be an object with start_epoch and end_epoch, got {item!r}"))
        return None
    bad = False
    for key in ("start_epoch", "end_epoch"):
        if key not in item:
            problems.append(_problem(f"{field}.{key}", "is missing"))
            bad = True
        elif not _is_index(item[key]):
            problems.append(_problem(f"{field}.{key}", f"must be an integer epoch index, got {item[key]!r}"))
            bad = True
    if bad:
        return None
    start, end = int(item["start_epoch"]), int(item["end_epoch"])
    if start < 0:
        problems.append(_problem(f"{field}.start_epoch", f"{start} is before the first epoch (0)"))
    elif end > n_epochs:
        problems.append(_problem(f"{field}.end_epoch", f"{end} is past the night's {n_epochs} epochs "
                                 "(the end is exclusive, at most n_epochs)"))
    elif start >= end:
        problems.append(_problem(field, f"start_epoch {start} must be before end_epoch {end} (the end is exclusive)"))
    else:
        return start, end
    return None


def _intervals(items: object, field: str, n_epochs: int, problems: list[Problem]) -> list[tuple[int, int]]:
    if items is None:
        return []
    if isinstance(items, (str, bytes, Mapping)) or not isinstance(items, Sequence):
        problems.append(_problem(field, "must be a list of intervals"))
        return []
    found = [_interval(item, f"{field}[{k}]", n_epochs, problems) for k, item in enumerate(items)]
    return [iv for iv in found if iv is not None]


def _per_epoch(values: object, field: str, n_epochs: int, problems: list[Problem], *,
               allowed: str) -> NDArray[np.float64] | None:
    """A per-epoch vector of 1/0/NaN (None read as NaN), or None after appending its problems."""
    if isinstance(values, (str, bytes, Mapping)):
        problems.append(_problem(field, "must be a list of per-epoch values"))
        return None
    raw = list(values) if isinstance(values, Sequence) else np.asarray(values, dtype=object).ravel().tolist()
    if len(raw) != n_epochs:
        problems.append(_problem(field, f"has {len(raw)} values for a night of {n_epochs} epochs"))
        return None
    out = np.full(n_epochs, np.nan)
    for k, v in enumerate(raw):
        if v is None or isinstance(v, (float, np.floating)) and np.isnan(v):
            continue
        number = isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, (bool, np.bool_))
        if not number or v not in (0, 1):
            problems.append(_problem(f"{field}[{k}]", f"must be {allowed}, got {v!r}"))
            if len(problems) >= 20:
                return None
            continue
        out[k] = float(v)
    return out


def labels_from_review(n_epochs: int, *, base_calls: ArrayLike, wake_intervals: Sequence[Mapping[str, Any]] = (),
                       sleep_intervals: Sequence[Mapping[str, Any]] = (),
                       rest_interval: Mapping[str, Any] | None = None,
                       labels: ArrayLike | None = None) -> NDArray[np.float64]:
    """The reviewer's per-epoch labels of one night.

    Parameters
    ----------
    n_epochs : int
        Epochs of the night.
    base_calls : array-like of shape (n_epochs,)
        The calls shown to the reviewer: 1 sleep, 0 wake, NaN (or None) unscored.
    wake_intervals, sleep_intervals : sequence of mapping, default=()
        ``{"start_epoch", "end_epoch"}``, end exclusive; sleep wins where both overlap (module docstring).
    rest_interval : mapping or None, default=None
        ``{"start_epoch", "end_epoch"}``: epochs outside it become NaN. None keeps every epoch.
    labels : array-like of shape (n_epochs,) or None, default=None
        Per-epoch 1/0/None given instead of intervals (then ``wake_intervals``,
        ``sleep_intervals`` and ``rest_interval`` must be empty); ``base_calls`` is not used.

    Returns
    -------
    ndarray of float64, shape (n_epochs,)
        1.0 sleep, 0.0 wake, NaN not judged.

    Raises
    ------
    InvalidReviewError
        Listing every defect with its field and index, e.g. ``wake_intervals[2].end_epoch``.

    Examples
    --------
    >>> labels_from_review(6, base_calls=[1, 1, 1, 1, 1, 1], wake_intervals=[{"start_epoch": 1, "end_epoch": 3}],
    ...                    rest_interval={"start_epoch": 0, "end_epoch": 5}).tolist()
    [1.0, 0.0, 0.0, 1.0, 1.0, nan]
    """
    problems: list[Problem] = []
    if not _is_index(n_epochs) or n_epochs < 1:
        raise InvalidReviewError([_problem("n_epochs", f"must be a positive integer, got {n_epochs!r}")])
    n = int(n_epochs)
    if labels is not None:
        if wake_intervals or sleep_intervals or rest_interval is not None:
            problems.append(_problem("labels", "give either labels or intervals, not both"))
        out = _per_epoch(labels, "labels", n, problems, allowed="1 (sleep), 0 (wake) or null (not judged)")
        if problems or out is None:
            raise InvalidReviewError(problems)
        return out
    base = _per_epoch(base_calls, "base_calls", n, problems, allowed="1, 0 or null")
    wake = _intervals(wake_intervals, "wake_intervals", n, problems)
    sleep = _intervals(sleep_intervals, "sleep_intervals", n, problems)
    rest = None if rest_interval is None else _interval(rest_interval, "rest_interval", n, problems)
    if problems or base is None:
        raise InvalidReviewError(problems)
    out = base.copy()
    for start, end in wake:
        out[start:end] = 0.0
    for start, end in sleep:
        out[start:end] = 1.0
    if rest is not None:
        out[: rest[0]] = np.nan
        out[rest[1]:] = np.nan
    return out


def _labels(values: ArrayLike, field: str) -> NDArray[np.float64]:
    raw = np.asarray(values, dtype=object).ravel()
    problems: list[Problem] = []
    out = _per_epoch(raw.tolist(), field, raw.size, problems, allowed="1 (sleep), 0 (wake) or NaN")
    if problems or out is None:
        raise InvalidReviewError(problems)
    return out


def judged_span(labels: ArrayLike) -> tuple[int, int]:
    """``(first, stop)`` of the judged (non-NaN) epochs, stop exclusive; ``(0, 0)`` when none is judged.

    Parameters
    ----------
    labels : array-like of shape (n_epochs,)
    """
    x = _labels(labels, "labels")
    judged = np.flatnonzero(~np.isnan(x))
    return (int(judged[0]), int(judged[-1]) + 1) if judged.size else (0, 0)


def review_parameters(labels: ArrayLike, *, epoch_seconds: int, protocol: StudyProtocol = DEFAULT_PROTOCOL,
                      lights_off_idx: int | None = None, lights_on_idx: int | None = None) -> dict[str, Any]:
    """Sleep parameters of reviewed labels, by the study's definitions.

    Parameters
    ----------
    labels : array-like of shape (n_epochs,)
        1 sleep, 0 wake, NaN not judged (e.g. from :func:`labels_from_review`).
    epoch_seconds : {15, 30, 60}
    protocol : StudyProtocol, default=DEFAULT_PROTOCOL
    lights_off_idx, lights_on_idx : int or None, default=None
        In-bed interval (stop exclusive); None = the span of the judged epochs
        (:func:`judged_span`), i.e. the reviewer's rest interval.

    Returns
    -------
    dict
        :meth:`models.scoring.parameters.SleepParameters.as_dict` of
        :func:`~models.scoring.parameters.sleep_parameters` (minutes; NaN where undefined).
    """
    x = _labels(labels, "labels")
    first, stop = judged_span(x)
    off = first if lights_off_idx is None else lights_off_idx
    on = stop if lights_on_idx is None else lights_on_idx
    return sleep_parameters(x, epoch_seconds, lights_off_idx=off, lights_on_idx=on, protocol=protocol).as_dict()


def runs_of(mask: ArrayLike) -> list[dict[str, int]]:
    """Runs of True as ``[{"start_epoch", "end_epoch"}, ...]`` (end exclusive)."""
    m = np.concatenate(([False], np.asarray(mask, dtype=bool), [False]))
    edges = np.flatnonzero(m[1:] != m[:-1]).reshape(-1, 2)
    return [{"start_epoch": int(a), "end_epoch": int(b)} for a, b in edges]


def _cohen_kappa(a: NDArray[np.float64], b: NDArray[np.float64]) -> float:
    """Cohen's kappa of two 0/1 vectors (Cohen 1960): (p_o - p_e) / (1 - p_e); NaN when p_e = 1 or empty."""
    if a.size == 0:
        return float("nan")
    p_o = float(np.mean(a == b))
    pa, pb = float(np.mean(a)), float(np.mean(b))
    p_e = pa * pb + (1.0 - pa) * (1.0 - pb)
    return float("nan") if p_e >= 1.0 else (p_o - p_e) / (1.0 - p_e)


def review_discrepancy(labels_a: ArrayLike, labels_b: ArrayLike, *, epoch_seconds: int,
                       protocol: StudyProtocol = DEFAULT_PROTOCOL, lights_off_idx: int | None = None,
                       lights_on_idx: int | None = None) -> dict[str, Any]:
    """Where and by how much two reviews of one night differ.

    Parameters
    ----------
    labels_a, labels_b : array-like of shape (n_epochs,)
        1 sleep, 0 wake, NaN not judged.
    epoch_seconds : {15, 30, 60}
    protocol : StudyProtocol, default=DEFAULT_PROTOCOL
    lights_off_idx, lights_on_idx : int or None, default=None
        In-bed interval of both parameter sets (as :func:`review_parameters`); None = each review's
        own judged span (its rest interval).

    Returns
    -------
    dict
        ``epochs_compared`` (judged by both), ``epochs_differing`` (of those, labelled differently),
        ``epochs_judged_by_one`` (judged by one review only), ``kappa`` (Cohen's kappa over the
        compared epochs; NaN when there are none or both reviews use one same label throughout),
        ``differing_intervals`` (runs of differing epochs, end exclusive), ``parameters_a``,
        ``parameters_b`` (:func:`review_parameters`) and
        ``parameter_differences`` (b - a per parameter).

    Raises
    ------
    InvalidReviewError
        If a vector holds other values or the two lengths differ.
    """
    a, b = _labels(labels_a, "labels_a"), _labels(labels_b, "labels_b")
    if a.size != b.size:
        raise InvalidReviewError([_problem("labels_b", f"has {b.size} epochs, labels_a {a.size}")])
    both = ~np.isnan(a) & ~np.isnan(b)
    differing = both & (a != b)
    in_bed = {"lights_off_idx": lights_off_idx, "lights_on_idx": lights_on_idx}
    pa = review_parameters(a, epoch_seconds=epoch_seconds, protocol=protocol, **in_bed)
    pb = review_parameters(b, epoch_seconds=epoch_seconds, protocol=protocol, **in_bed)
    diffs = {k: float(pb[k]) - float(pa[k]) for k in pa
             if isinstance(pa[k], (int, float)) and isinstance(pb[k], (int, float)) and not k.endswith("_idx")}
    return {"epochs_compared": int(both.sum()), "epochs_differing": int(differing.sum()),
            "epochs_judged_by_one": int((np.isnan(a) != np.isnan(b)).sum()),
            "kappa": _cohen_kappa(a[both], b[both]), "differing_intervals": runs_of(differing),
            "parameters_a": pa, "parameters_b": pb, "parameter_differences": diffs}
