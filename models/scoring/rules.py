"""Classical count rules for sleep/wake scoring, behind one interface and one registry.

Every rule maps activity counts (one value per epoch) to a per-epoch call (1.0 = sleep, 0.0 =
wake, NaN = unscored, float64) and a continuous score oriented so that **higher = more likely
sleep** (usable for ROC AUC and as a model input; NaN where the call is unscored). Method ids:
``cole-kripke``, ``sadeh``, ``count-threshold``, each also with a ``+webster`` suffix (Webster
rescoring of the calls, :func:`models.scoring.rescoring.webster_rescore`; the score is left
unchanged).

Shared input handling
---------------------
- Missing epochs (NaN counts, as gap filling leaves them; +/-inf is treated the same way) are
  **unscored**: their call and score are NaN, and Webster rescoring leaves them unscored.
  Negative counts count as 0. The rules never fail on such values (the night checks report them).
- ``count_scale`` multiplies the counts before any rule (a per-study factor to bring a device's
  counts to the scale the coefficients were fitted on; default 1).
- Windows that run past either end of the recording see zero counts (zero-padding: common
  practice, from memory; the published descriptions leave edges unspecified).
- Cole-Kripke and Sadeh are 1-minute rules: 15-s and 30-s counts are summed into minutes
  (minute k = epochs ``k*m .. k*m+m-1`` with ``m = 60 / epoch_seconds``, aligned on the first
  epoch), scored, and each minute's call and score are copied back to its present epochs. A
  trailing partial minute is completed with zero counts (as past the end of the recording).
- The weighted count-threshold rule works on the native epochs with an explicit weight table.

Windows over missing epochs
---------------------------
A present epoch is always scored, however many of its neighbours are missing; missing data
are left out of its window, never read as zero counts (which would call them still, hence
sleep). Our convention (common practice for weighted windows, no published source):

- a minute with some missing epochs is estimated from its present epochs, their sum scaled to
  the whole minute (``sum * m / n_present``); a minute with none is *missing*;
- the weights of a window are renormalised over its present minutes (epochs, for the count
  threshold): ``D = P * sum_present W_k A[t+k] * sum_all W / sum_present W`` for Cole-Kripke,
  the same for the count threshold's ``TA``; Sadeh's MEAN and NAT are taken over the present
  minutes and scaled to the 11-minute window (``MEAN = sum / n_present``,
  ``NAT = 11 * n_nat / n_present``) and SD is the sample SD of the present minutes among
  t-5 .. t (0 with fewer than two).

The epoch itself is present, so its own minute always is and every window keeps at least one
present value. On a recording without missing epochs every value is exactly as before.

Add a rule by writing one :class:`CountRule` subclass and adding it to :data:`RULES`.
"""

from __future__ import annotations

import abc
from dataclasses import dataclass
from typing import ClassVar

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ..errors import NightbankError
from ._windows import calls_of, clean_counts, minute_counts, present_weight, to_epochs, window_sum
from .rescoring import check_epoch_seconds, webster_rescore

__all__ = [
    "COLE_KRIPKE_COEFFICIENTS",
    "COUNT_THRESHOLD_WEIGHTS",
    "ColeKripke",
    "CountRule",
    "CountThreshold",
    "InvalidRuleOptionError",
    "METHOD_IDS",
    "RULES",
    "RuleScoring",
    "Sadeh",
    "UnknownMethodError",
    "continuous_scores",
    "score_with_rule",
]

WEBSTER_SUFFIX = "+webster"

#: Cole et al. 1992 1-minute coefficient sets: name -> (P, weights for t-4 .. t+2).
#: Both rows are from memory (published-methods 1a, [M]).
COLE_KRIPKE_COEFFICIENTS: dict[str, tuple[float, tuple[float, ...]]] = {
    "max-10s": (0.00001, (404, 598, 326, 441, 1408, 508, 350)),  # max of overlapping 10-s counts
    "mean-1min": (0.001, (106, 54, 58, 76, 230, 74, 67)),  # mean activity per minute
}

_TAPER = (1 / 25, 1 / 5, 1.0, 1 / 5, 1 / 25)
#: Weighted count-threshold rule (Oakley 1997 report, all from memory, published-methods 1d):
#: (convention, epoch_seconds) -> centred weights. "fixed-span": the window always covers
#: t-2 min .. t+2 min and the centre weight is the number of epochs per minute, so the weighted
#: sum stays in counts per minute. "fixed-taps": the 5 weights on 5 consecutive epochs.
COUNT_THRESHOLD_WEIGHTS: dict[tuple[str, int], tuple[float, ...]] = {
    ("fixed-span", 60): _TAPER,
    ("fixed-span", 30): (1 / 25,) * 2 + (1 / 5,) * 2 + (2.0,) + (1 / 5,) * 2 + (1 / 25,) * 2,
    ("fixed-span", 15): (1 / 25,) * 4 + (1 / 5,) * 4 + (4.0,) + (1 / 5,) * 4 + (1 / 25,) * 4,
    ("fixed-taps", 60): _TAPER,
    ("fixed-taps", 30): _TAPER,
    ("fixed-taps", 15): _TAPER,
}


class UnknownMethodError(NightbankError):
    """The method id is not a registered rule (optionally with ``+webster``)."""

    code = "unknown_method"


class InvalidRuleOptionError(NightbankError):
    """A rule option is unknown or has an invalid value."""

    code = "invalid_rule_option"


@dataclass(frozen=True, eq=False)
class RuleScoring:
    """Result of scoring one recording with one method.

    Attributes
    ----------
    sleep : ndarray of float64, shape (n_epochs,)
        1.0 = sleep, 0.0 = wake, NaN = unscored (a missing epoch).
    score : ndarray of float64, shape (n_epochs,), or None
        The rule's continuous score, higher = more likely sleep (before any Webster rescoring),
        NaN where ``sleep`` is unscored; None for a rule without one.
    method : str
        The method id used, e.g. ``"cole-kripke+webster"``.
    """

    sleep: NDArray[np.float64]
    score: NDArray[np.float64] | None
    method: str

    @property
    def unscored(self) -> NDArray[np.bool_]:
        """Boolean mask, shape (n_epochs,): epochs left unscored (missing counts)."""
        return np.isnan(self.sleep)


class CountRule(abc.ABC):
    """A classical count rule.

    Subclasses set ``method_id`` (the registry key), ``score_name`` (the feature name of the
    continuous score) and implement :meth:`apply`. Options are keyword-only ``__init__``
    arguments with documented defaults; ``__init__`` raises :class:`InvalidRuleOptionError`
    for invalid values.
    """

    method_id: ClassVar[str]
    score_name: ClassVar[str]

    @abc.abstractmethod
    def apply(self, counts: NDArray[np.float64], epoch_seconds: int, *,
              missing: NDArray[np.bool_] | None = None) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """Score clean counts.

        Parameters
        ----------
        counts : ndarray of float64, shape (n_epochs,)
            Finite, non-negative counts per epoch, already multiplied by the count scale (0 at
            missing epochs).
        epoch_seconds : {15, 30, 60}
        missing : ndarray of bool, shape (n_epochs,), default=None
            Epochs without counts (see "Windows over missing epochs" in the module docstring);
            None = every epoch present.

        Returns
        -------
        sleep : ndarray of float64, shape (n_epochs,)
            1.0 = sleep, 0.0 = wake, NaN at missing epochs.
        score : ndarray of float64, shape (n_epochs,)
            Higher = more likely sleep; NaN at missing epochs.
        """


class ColeKripke(CountRule):
    """Cole-Kripke weighted 7-minute window (Cole et al. 1992, Sleep 15(5):461-469).

    ``D[t] = P * sum_k W_k * A[t+k]`` for k = -4 .. +2 (minutes); wake if ``D >= 1``, sleep if
    ``D < 1``. The score is ``1 - D`` (sleep exactly when the score is > 0).

    Parameters
    ----------
    coefficients : {"max-10s", "mean-1min"}, default="max-10s"
        Which 1-minute coefficient set of :data:`COLE_KRIPKE_COEFFICIENTS` (both from memory).
        The default is the set most often quoted in full (scale factor plus 7 weights); its wake
        threshold for steady activity, ``1 / (P * sum W)`` = 24.8 counts per minute, lies in
        the range of per-minute count totals, whereas ``"mean-1min"`` (threshold 1.5 counts per
        minute) expects counts first brought to its scale with ``count_scale``.
    """

    method_id = "cole-kripke"
    score_name = "cole_kripke_score"

    def __init__(self, *, coefficients: str = "max-10s") -> None:
        if coefficients not in COLE_KRIPKE_COEFFICIENTS:
            raise InvalidRuleOptionError(
                f"unknown Cole-Kripke coefficient set {coefficients!r}; use one of {sorted(COLE_KRIPKE_COEFFICIENTS)}")
        self.coefficients = coefficients

    def apply(self, counts: NDArray[np.float64], epoch_seconds: int, *,
              missing: NDArray[np.bool_] | None = None) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        scale, weights = COLE_KRIPKE_COEFFICIENTS[self.coefficients]
        missing = np.zeros(counts.size, dtype=bool) if missing is None else missing
        minutes, minute_missing = minute_counts(counts, missing, epoch_seconds)
        w = np.asarray(weights, dtype=np.float64)
        padded = np.concatenate((np.zeros(4), minutes, np.zeros(2)))
        d = scale * np.correlate(padded, w, mode="valid")
        if minute_missing.any():  # weights renormalised over the present minutes
            present = present_weight(minute_missing, w, before=4)
            d = np.divide(d * w.sum(), present, out=np.full_like(d, np.nan), where=present > 0)
        score = to_epochs(1.0 - d, epoch_seconds, counts.size)
        return calls_of(score > 0, score, missing)


class Sadeh(CountRule):
    """Sadeh probability-of-sleep score (Sadeh et al. 1994, Sleep 17(3):201-207).

    ``PS = 7.601 - 0.065*MEAN - 1.08*NAT - 0.056*SD - 0.703*LG`` on 1-minute counts, where MEAN
    is the mean over minutes t-5 .. t+5 (always divided by 11), NAT the number of those minutes
    with ``50 <= A < 100``, SD the sample standard deviation (ddof=1) of minutes t-5 .. t and LG
    ``ln(A[t] + 1)``. Sleep if ``PS >= 0``. The score is PS itself. Coefficients are the ones
    reproduced in later papers; ddof=1 for SD is our reading (both from memory).
    Minutes outside the recording count as zero (common practice).
    """

    method_id = "sadeh"
    score_name = "sadeh_score"

    def apply(self, counts: NDArray[np.float64], epoch_seconds: int, *,
              missing: NDArray[np.bool_] | None = None) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        missing = np.zeros(counts.size, dtype=bool) if missing is None else missing
        a, minute_missing = minute_counts(counts, missing, epoch_seconds)
        lost = minute_missing.astype(np.float64)
        n_centred = 11.0 - window_sum(lost, 5, 5)  # present minutes of t-5 .. t+5 (11 without missing ones)
        n_trailing = 6.0 - window_sum(lost, 5, 0)  # present minutes of t-5 .. t (6 without missing ones)
        nat_minutes = (a >= 50) & (a < 100) & ~minute_missing
        with np.errstate(divide="ignore", invalid="ignore"):  # a minute without present neighbours is missing
            mean = window_sum(a, 5, 5) / n_centred
            nat = window_sum(nat_minutes.astype(np.float64), 5, 5)
            nat = np.where(n_centred == 11.0, nat, nat * 11.0 / n_centred)
            s1, s2 = window_sum(a, 5, 0), window_sum(a * a, 5, 0)  # trailing sums of the present minutes
            sd = np.where(n_trailing >= 2.0,
                          np.sqrt(np.maximum(s2 - s1 * s1 / n_trailing, 0.0) / (n_trailing - 1.0)), 0.0)
        ps = 7.601 - 0.065 * mean - 1.08 * nat - 0.056 * sd - 0.703 * np.log1p(a)
        score = to_epochs(ps, epoch_seconds, counts.size)
        return calls_of(score >= 0, score, missing)


class CountThreshold(CountRule):
    """Weighted count-threshold rule (Oakley 1997 technical report; all from memory).

    ``TA[t] = sum_k w_k * A[t+k]`` over a short centred window of native epochs; sleep if
    ``TA <= threshold``, wake otherwise (decided exactly for whole-number counts, although the
    weights 1/25 and 1/5 have no exact binary form). The score is ``threshold - TA`` (sleep
    exactly when the score is >= 0).

    Parameters
    ----------
    threshold : float, default=40.0
        Wake threshold in counts (common choices: 20 low, 40 medium, 80 high; lower calls more
        wake). In the original device's units; calibrate for other counts.
    convention : {"fixed-span", "fixed-taps"}, default="fixed-span"
        Weight table of :data:`COUNT_THRESHOLD_WEIGHTS` used for 15-s and 30-s epochs (both are
        the same at 60 s). The default keeps the window at +/-2 minutes and ``TA`` in counts
        per minute, so the thresholds keep their meaning at every epoch length.
    """

    method_id = "count-threshold"
    score_name = "count_threshold_score"

    def __init__(self, *, threshold: float = 40.0, convention: str = "fixed-span") -> None:
        if convention not in {c for c, _ in COUNT_THRESHOLD_WEIGHTS}:
            raise InvalidRuleOptionError(f"unknown convention {convention!r}; use 'fixed-span' or 'fixed-taps'")
        if not np.isfinite(threshold):
            raise InvalidRuleOptionError(f"threshold must be a finite number of counts, got {threshold!r}")
        self.threshold = float(threshold)
        self.convention = convention

    def apply(self, counts: NDArray[np.float64], epoch_seconds: int, *,
              missing: NDArray[np.bool_] | None = None) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        # every weight is a multiple of 1/25: the sum with whole-number weights 25 * w is exact for whole
        # counts, so an epoch with TA equal to the threshold is sleep, not left to rounding
        weights_25 = np.round(np.asarray(COUNT_THRESHOLD_WEIGHTS[(self.convention, epoch_seconds)]) * 25.0)
        half = weights_25.size // 2  # weights are symmetric, so convolution = correlation
        ta_25 = np.convolve(counts, weights_25)[half:half + counts.size]
        sleep = ta_25 <= self.threshold * 25.0
        if missing is None or not missing.any():
            return calls_of(sleep, self.threshold - ta_25 / 25.0, missing)
        # weights renormalised over the present epochs: TA = ta * total / present; compared as
        # ta * total <= threshold * present, exact in whole numbers for whole counts
        total_25 = float(weights_25.sum())
        present_25 = present_weight(missing, weights_25, before=half)
        renormalised = present_25 < total_25
        with np.errstate(divide="ignore", invalid="ignore"):
            ta = np.where(renormalised, ta_25 * total_25 / present_25, ta_25) / 25.0
        sleep = np.where(renormalised, ta_25 * total_25 <= self.threshold * 25.0 * present_25, sleep)
        return calls_of(sleep, self.threshold - ta, missing)


#: Registry of count rules keyed by base method id.
RULES: dict[str, type[CountRule]] = {rule.method_id: rule for rule in (ColeKripke, Sadeh, CountThreshold)}
#: Every valid method id: each rule alone and followed by Webster rescoring.
METHOD_IDS: tuple[str, ...] = tuple(m for base in RULES for m in (base, base + WEBSTER_SUFFIX))


def _clean(counts: ArrayLike, count_scale: float) -> tuple[NDArray[np.float64], NDArray[np.bool_]]:
    if not np.isfinite(count_scale) or count_scale <= 0:
        raise InvalidRuleOptionError(f"count_scale must be a positive number, got {count_scale!r}")
    return clean_counts(counts, count_scale)


def _make_rule(base: str, options: dict[str, float | str]) -> CountRule:
    try:
        return RULES[base](**options)
    except TypeError as exc:
        raise InvalidRuleOptionError(f"invalid option for {base!r}: {exc}") from exc


def score_with_rule(counts: ArrayLike, epoch_seconds: int, method: str, *, count_scale: float = 1.0,
                    **rule_options: float | str) -> RuleScoring:
    """Score a recording with one classical method.

    Parameters
    ----------
    counts : array-like of shape (n_epochs,)
        Activity counts per epoch; NaN (missing) epochs are unscored, negative values count as 0.
    epoch_seconds : {15, 30, 60}
        Epoch length in seconds.
    method : str
        One of :data:`METHOD_IDS`, e.g. ``"sadeh"`` or ``"cole-kripke+webster"``.
    count_scale : float, default=1.0
        Factor applied to the counts before the rule.
    **rule_options
        Keyword options of the rule class (e.g. ``threshold=20`` for ``count-threshold``).

    Returns
    -------
    RuleScoring
        ``sleep`` (float64: 1 = sleep, 0 = wake, NaN = unscored), ``score`` (higher = more likely
        sleep; NaN where unscored) and ``method``.

    Raises
    ------
    UnknownMethodError
        If ``method`` is not in :data:`METHOD_IDS` (the message lists them).
    InvalidRuleOptionError
        If an option or ``count_scale`` is invalid.
    UnsupportedEpochLengthError
        If ``epoch_seconds`` is not 15, 30 or 60.

    Examples
    --------
    >>> score_with_rule([0, 0, 500, 0, 0], 60, "count-threshold").sleep.tolist()
    [1.0, 0.0, 0.0, 0.0, 1.0]
    >>> score_with_rule([0, 0, float("nan"), 0, 0], 60, "count-threshold").sleep.tolist()
    [1.0, 1.0, nan, 1.0, 1.0]
    """
    base, _, suffix = method.partition("+")
    if base not in RULES or suffix not in ("", WEBSTER_SUFFIX[1:]):
        raise UnknownMethodError(f"unknown method {method!r}; valid methods: {', '.join(METHOD_IDS)}")
    epoch_seconds = check_epoch_seconds(epoch_seconds)
    rule = _make_rule(base, rule_options)
    clean, missing = _clean(counts, count_scale)
    if clean.size == 0:
        return RuleScoring(sleep=np.zeros(0), score=np.zeros(0), method=method)
    sleep, score = rule.apply(clean, epoch_seconds, missing=missing)
    if suffix:
        sleep = webster_rescore(sleep, epoch_seconds)
    return RuleScoring(sleep=sleep, score=score, method=method)


def continuous_scores(counts: ArrayLike, epoch_seconds: int, *,
                      count_scale: float = 1.0) -> dict[str, NDArray[np.float64]]:
    """Every registered rule's continuous score, with default options.

    Parameters
    ----------
    counts : array-like of shape (n_epochs,)
        Activity counts per epoch; NaN marks a missing epoch, negative values count as 0.
    epoch_seconds : {15, 30, 60}
    count_scale : float, default=1.0

    Returns
    -------
    scores : dict of str to ndarray of float64, shape (n_epochs,)
        Keyed by each rule's ``score_name`` (``cole_kripke_score``, ``sadeh_score``,
        ``count_threshold_score``); higher = more likely sleep; NaN at missing epochs.
    """
    epoch_seconds = check_epoch_seconds(epoch_seconds)
    clean, missing = _clean(counts, count_scale)
    if clean.size == 0:
        return {rule.score_name: np.zeros(0) for rule in RULES.values()}
    return {rule.score_name: rule().apply(clean, epoch_seconds, missing=missing)[1] for rule in RULES.values()}
