"""What is known about one night before anyone reviews it, and the evidence figures drawn from it.

:class:`NightEvidence` gathers a night's deployed parameters, the parameters of other methods, the
per-night intervals, quality flags, the off-wrist share, diary conflicts and the participant's other
nights. :func:`evidence_figures` turns it into a few figures in minutes (the terms
:mod:`models.review.priority` weighs), each with the sentence that explains it to a reviewer.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike

from ..errors import Problem
from ..scoring.rules import METHOD_IDS
from .corrections import InvalidReviewError

__all__ = ["DIARY_TOLERANCE_MIN", "EVIDENCE_TERMS", "EvidenceFigure", "NightEvidence", "REVIEW_PARAMETERS",
           "evidence_figures", "expected_relabel"]

#: Parameters whose change a review is expected to make (minutes); their sum is the queue's figure.
REVIEW_PARAMETERS: tuple[str, ...] = ("tst_min", "waso_min", "sol_min")
_SHORT = {"tst_min": "TST", "waso_min": "WASO", "sol_min": "SOL", "awakenings": "awakenings",
          "sleep_efficiency_pct": "sleep efficiency"}
#: Diary times within this many minutes of the detected rest are taken as agreeing (diaries are
#: usually written to the nearest quarter hour; common practice, own choice of value).
DIARY_TOLERANCE_MIN = 15.0
#: A night is unusual for a parameter beyond this many robust SDs from the participant's median (own choice).
_UNUSUAL_Z = 2.0
#: Smallest robust SD of a parameter over a participant's nights, minutes (own choice: keeps a
#: participant with near-identical nights from flagging every small difference).
_MIN_SPREAD_MIN = 10.0
#: Other nights needed before "unusual for this participant" is judged.
_MIN_HISTORY = 3
#: A normal variable's E|X - median| per unit of its 90 % interval width: sqrt(2/pi) / (2 * 1.6449).
_ABS_ERROR_PER_WIDTH = float(np.sqrt(2.0 / np.pi) / (2.0 * 1.6448536))

#: The evidence terms, each in minutes (qc_flags: a count), in the order reasons are built.
EVIDENCE_TERMS: tuple[str, ...] = ("relabel", "uncertainty", "sol_interval", "model_disagreement", "rule_disagreement",
                                   "wake_in_bed", "nonwear", "diary", "unusual", "qc_flags")


@dataclass(frozen=True)
class NightEvidence:
    """Everything the review queue knows about one night.

    Parameters
    ----------
    night_id, participant_id : str
    epoch_seconds : int
    parameters : mapping of str to mapping of str to float
        Method -> ``{sol_min, tst_min, waso_min, awakenings, sleep_efficiency_pct}``; must hold
        ``"auto"`` (the deployed scoring). Other keys: model methods (``"pooled"``, ``"personal"``,
        ...) or classical rules (:data:`models.scoring.rules.METHOD_IDS`). NaN = undefined.
    intervals : mapping of str to [low, high] or None, default=None
        The deployed scoring's per-night intervals (``"tst_min"``, ``"waso_min"``, ``"sol_min"``, ...).
    uncertainty_min : float or None, default=None
        The deployed model's review score (E|TST - median| + E|WASO - median|, minutes); None = unknown.
    qc_flags : sequence of str, default=()
        Quality-flag codes of the night.
    nonwear_share : float, default=0.0
        Share of the rest period flagged off-wrist, 0..1.
    diary_offsets_min : mapping of str to float, default={}
        Diary minus detected, minutes, e.g. ``{"bed_time": 70.0, "wake_time": -15.0}``.
    history : sequence of mapping of str to float, default=()
        Deployed parameters of the participant's other nights.
    relabel_min : mapping of str to float or None, default=None
        The deployed model's expected relabelled in-bed minutes (:func:`expected_relabel`):
        ``{"to_wake": ..., "to_sleep": ...}``; None = unknown (a classical rule has no P(sleep)).

    Raises
    ------
    InvalidReviewError
        If ``parameters`` has no ``"auto"`` entry, ``nonwear_share`` is outside 0..1 or a figure is
        not a number (each problem names its field).
    """

    night_id: str
    participant_id: str
    epoch_seconds: int
    parameters: Mapping[str, Mapping[str, float]]
    intervals: Mapping[str, Sequence[float]] | None = None
    uncertainty_min: float | None = None
    qc_flags: Sequence[str] = ()
    nonwear_share: float = 0.0
    diary_offsets_min: Mapping[str, float] = field(default_factory=dict)
    history: Sequence[Mapping[str, float]] = ()
    relabel_min: Mapping[str, float] | None = None

    def __post_init__(self) -> None:
        where = f"night {self.night_id}"
        problems: list[Problem] = []

        def bad(name: str, message: str) -> None:
            problems.append(Problem("invalid_review", f"{where}: {name} {message}", {"field": name}))

        if not isinstance(self.parameters, Mapping) or "auto" not in self.parameters:
            bad("parameters", "must hold the deployed scoring under 'auto'")
        else:
            for method, values in self.parameters.items():
                if not isinstance(values, Mapping):
                    bad(f"parameters.{method}", f"must map parameter names to minutes, got {values!r}")
        for k, item in enumerate(self.history):
            if not isinstance(item, Mapping):
                bad(f"history[{k}]", f"must map parameter names to minutes, got {item!r}")
        for k, code in enumerate(self.qc_flags):
            if not isinstance(code, str):
                bad(f"qc_flags[{k}]", f"must be a quality-flag code, got {code!r}")
        if not _is_number(self.nonwear_share) or not 0.0 <= float(self.nonwear_share) <= 1.0:
            bad("nonwear_share", f"must be a share between 0 and 1, got {self.nonwear_share!r}")
        if self.uncertainty_min is not None and (not _is_number(self.uncertainty_min) or self.uncertainty_min < 0):
            bad("uncertainty_min", f"must be minutes >= 0 or null, got {self.uncertainty_min!r}")
        for key, value in (self.relabel_min or {}).items():
            if key not in ("to_wake", "to_sleep") or not _is_number(value) or not value >= 0:
                bad(f"relabel_min.{key}", f"must be 'to_wake' or 'to_sleep' minutes >= 0, got {value!r}")
        for key, value in self.diary_offsets_min.items():
            if not _is_number(value):
                bad(f"diary_offsets_min.{key}", f"must be minutes, got {value!r}")
        for name, bounds in (self.intervals or {}).items():
            if isinstance(bounds, (str, bytes)) or not isinstance(bounds, Sequence) or len(bounds) != 2 \
                    or not all(_is_number(b) for b in bounds):
                bad(f"intervals.{name}", f"must be [low, high], got {bounds!r}")
        if problems:
            raise InvalidReviewError(problems)


@dataclass(frozen=True)
class EvidenceFigure:
    """One evidence term of a night: its value (minutes, or a count) and the sentence saying why."""

    term: str
    value: float
    reason: str


def _is_number(value: object) -> bool:
    return isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, (bool, np.bool_))


def _value(params: Mapping[str, float], name: str) -> float:
    v = params.get(name, float("nan"))
    return float(v) if _is_number(v) else float("nan")


def _width(e: NightEvidence, name: str) -> float:
    if e.intervals is None or name not in e.intervals:
        return float("nan")
    low, high = (float(b) for b in e.intervals[name])
    return high - low if np.isfinite(low) and np.isfinite(high) else float("nan")


def expected_relabel(p_sleep: ArrayLike, sleep: ArrayLike, in_bed: tuple[int, int],
                     epoch_seconds: int) -> dict[str, float]:
    """Expected in-bed minutes whose call a review changes, under the model's own P(sleep).

    Each in-bed epoch called sleep is wake with probability ``1 - p``, one called wake is sleep with
    probability ``p``; the sums times the epoch length are the expected minutes a reviewer who
    agrees with the calibrated probabilities relabels. Epochs without a call or a probability
    (unscored) count 0.

    Parameters
    ----------
    p_sleep : array-like of shape (n_epochs,)
        Calibrated P(sleep) of each epoch (NaN or None = unscored).
    sleep : array-like of shape (n_epochs,)
        The scoring's calls, 1 sleep, 0 wake (NaN or None = unscored).
    in_bed : (int, int)
        First and stop epoch of the rest interval.
    epoch_seconds : int

    Returns
    -------
    dict of str to float
        ``to_wake`` (expected minutes called sleep that are wake) and ``to_sleep`` (called wake that are sleep).

    Examples
    --------
    Two 30-s epochs called sleep at P(sleep) 0.9 and 0.6 and one called wake at 0.2:
    ``to_wake`` = (0.1 + 0.4) x 0.5 = 0.25 min, ``to_sleep`` = 0.2 x 0.5 = 0.1 min.
    """
    first, stop = int(in_bed[0]), int(in_bed[1])
    p = np.array(p_sleep, dtype=np.float64)[first:stop]
    calls = np.array(sleep, dtype=np.float64)[first:stop]
    if p.shape != calls.shape:
        raise InvalidReviewError([Problem("invalid_review", f"p_sleep has {p.size} in-bed epochs, sleep {calls.size}",
                                          {"field": "p_sleep"})])
    known = np.isfinite(p) & np.isfinite(calls)
    minutes = epoch_seconds / 60.0
    return {"to_wake": float(np.sum(np.where(known & (calls == 1), 1.0 - p, 0.0)) * minutes),
            "to_sleep": float(np.sum(np.where(known & (calls == 0), p, 0.0)) * minutes)}


def _relabel(e: NightEvidence) -> EvidenceFigure | None:
    if e.relabel_min is None:
        return None
    to_wake, to_sleep = (float(e.relabel_min.get(k, 0.0)) for k in ("to_wake", "to_sleep"))
    total = to_wake + to_sleep
    return EvidenceFigure("relabel", total, f"the model expects about {total:.0f} min of its in-bed calls to be wrong "
                          f"({to_wake:.0f} min called sleep, {to_sleep:.0f} min called wake)")


def _uncertainty(e: NightEvidence) -> EvidenceFigure | None:
    widths = {n: _width(e, n) for n in ("tst_min", "waso_min")}
    shown = ", ".join(f"{_SHORT[n]} interval {w:.0f} min wide" for n, w in widths.items() if np.isfinite(w))
    if e.uncertainty_min is not None:
        value = float(e.uncertainty_min)
        reason = shown or f"expected TST + WASO error {value:.0f} min"
    elif shown:  # width -> E|X - median| of a normal variable (the intervals' nominal 90 %)
        value = _ABS_ERROR_PER_WIDTH * float(np.nansum(list(widths.values())))
        reason = shown
    else:
        return None
    return EvidenceFigure("uncertainty", value, reason)


def _sol_interval(e: NightEvidence) -> EvidenceFigure | None:
    w = _width(e, "sol_min")
    return EvidenceFigure("sol_interval", w, f"SOL interval {w:.0f} min wide") if np.isfinite(w) else None


def _disagreement(e: NightEvidence, *, rules: bool) -> EvidenceFigure | None:
    """Sum over the review parameters of the median |method - auto| over the methods of one kind."""
    auto = e.parameters["auto"]
    others = {m: p for m, p in e.parameters.items() if m != "auto" and (m in METHOD_IDS) == rules}
    if not others:
        return None
    total, worst = 0.0, (0.0, "", "")
    for name in REVIEW_PARAMETERS:
        a = _value(auto, name)
        diffs = {m: abs(_value(p, name) - a) for m, p in others.items()}
        finite = [d for d in diffs.values() if np.isfinite(d)]
        if not finite:
            continue
        total += float(np.median(finite))
        m, d = max(((m, d) for m, d in diffs.items() if np.isfinite(d)), key=lambda md: (md[1], md[0]))
        if d > worst[0]:
            worst = (d, name, m)
    d, name, method = worst
    kind = "classical rules" if rules else "models"
    reason = (f"{kind} disagree on {_SHORT[name]} by {d:.0f} min ({method} {_value(others[method], name):.0f} "
              f"vs auto {_value(auto, name):.0f})") if name else f"{kind} agree with auto"
    return EvidenceFigure("rule_disagreement" if rules else "model_disagreement", total, reason)


def _wake_in_bed(e: NightEvidence) -> EvidenceFigure | None:
    """Wake the deployed scoring finds in bed (SOL + WASO): count-based scoring errs most on wakeful nights."""
    auto = e.parameters["auto"]
    parts = [_value(auto, n) for n in ("sol_min", "waso_min")]
    if not all(np.isfinite(parts)):
        return None
    total = float(sum(parts))
    return EvidenceFigure("wake_in_bed", total, f"{total:.0f} min awake in bed (SOL {parts[0]:.0f}, WASO "
                          f"{parts[1]:.0f}): scoring errs most on wakeful nights")


def _rest_minutes(auto: Mapping[str, float]) -> float:
    tib = _value(auto, "time_in_bed_min")
    if np.isfinite(tib):
        return tib
    tst, eff = _value(auto, "tst_min"), _value(auto, "sleep_efficiency_pct")
    if np.isfinite(tst) and np.isfinite(eff) and eff > 0:
        return tst * 100.0 / eff
    parts = [_value(auto, n) for n in ("sol_min", "tst_min", "waso_min")]  # in bed = SOL + TST + WASO (to lights-on)
    return float(sum(parts)) if all(np.isfinite(parts)) else float("nan")


def _nonwear(e: NightEvidence) -> EvidenceFigure | None:
    share = float(e.nonwear_share)
    if share <= 0:
        return None
    rest = _rest_minutes(e.parameters["auto"])
    minutes = share * rest if np.isfinite(rest) else float("nan")
    return EvidenceFigure("nonwear", minutes if np.isfinite(minutes) else 0.0,
                          f"{100 * share:.0f} % of the rest period off-wrist"
                          + (f" ({minutes:.0f} min)" if np.isfinite(minutes) else ""))


def _diary(e: NightEvidence) -> EvidenceFigure | None:
    if not e.diary_offsets_min:
        return None
    excess = {k: max(0.0, abs(float(v)) - DIARY_TOLERANCE_MIN) for k, v in e.diary_offsets_min.items()}
    key = max(sorted(e.diary_offsets_min), key=lambda k: abs(float(e.diary_offsets_min[k])))
    off = float(e.diary_offsets_min[key])
    side = "before" if off < 0 else "after"
    what = key.replace("_", " ")
    return EvidenceFigure("diary", float(sum(excess.values())),
                          f"diary {what} {abs(off):.0f} min {side} the detected rest "
                          f"{'start' if 'bed' in key else 'end' if 'wake' in key else 'time'}")


def _unusual(e: NightEvidence) -> EvidenceFigure | None:
    if len(e.history) < _MIN_HISTORY:
        return None
    total, worst = 0.0, (0.0, "", 0.0)
    for name in REVIEW_PARAMETERS:
        x = _value(e.parameters["auto"], name)
        past = np.array([_value(h, name) for h in e.history])
        past = past[np.isfinite(past)]
        if past.size < _MIN_HISTORY or not np.isfinite(x):
            continue
        med = float(np.median(past))
        spread = max(1.4826 * float(np.median(np.abs(past - med))), _MIN_SPREAD_MIN)
        excess = max(0.0, abs(x - med) - _UNUSUAL_Z * spread)
        total += excess
        if excess > worst[0]:
            worst = (excess, name, x - med)
    _, name, delta = worst
    if not name:
        return EvidenceFigure("unusual", 0.0, "parameters within this participant's usual range")
    return EvidenceFigure("unusual", total, f"{_SHORT[name]} {abs(delta):.0f} min "
                          f"{'above' if delta > 0 else 'below'} this participant's usual")


def _qc(e: NightEvidence) -> EvidenceFigure | None:
    if not e.qc_flags:
        return None
    codes = sorted(set(e.qc_flags))
    return EvidenceFigure("qc_flags", float(len(codes)), f"quality flag{'s' if len(codes) > 1 else ''}: "
                          + ", ".join(c.replace("_", " ") for c in codes))


def evidence_figures(evidence: NightEvidence) -> dict[str, EvidenceFigure]:
    """The evidence terms of one night that apply (a term without its evidence is left out).

    Parameters
    ----------
    evidence : NightEvidence

    Returns
    -------
    dict of str to EvidenceFigure
        Keyed by the names of :data:`EVIDENCE_TERMS`, in that order:

        - ``relabel``: ``to_wake + to_sleep`` of ``relabel_min`` (:func:`expected_relabel`), minutes;
        - ``uncertainty``: ``uncertainty_min``, or without it E|X - median| of a normal variable
          from the TST and WASO interval widths (0.243 x width of a 90 % interval), minutes;
        - ``sol_interval``: the SOL interval's width, minutes;
        - ``model_disagreement`` / ``rule_disagreement``: per TST, WASO and SOL the median over
          the other model methods (classical rules) of |method - auto|, summed, minutes;
        - ``wake_in_bed``: SOL + WASO of the deployed scoring, minutes (wear-based scoring is
          least specific to wake, so wakeful nights carry the largest errors; Sadeh 2011, from memory);
        - ``nonwear``: off-wrist share x time in bed, minutes;
        - ``diary``: per diary time, |offset| beyond :data:`DIARY_TOLERANCE_MIN`, summed, minutes;
        - ``unusual``: per TST, WASO and SOL, |value - the participant's median| beyond 2 robust SDs
          (1.4826 MAD, at least 10 min) of their other nights (3 or more), summed, minutes;
        - ``qc_flags``: the number of distinct quality flags.
    """
    found = (_relabel(evidence), _uncertainty(evidence), _sol_interval(evidence), _disagreement(evidence, rules=False),
             _disagreement(evidence, rules=True), _wake_in_bed(evidence), _nonwear(evidence), _diary(evidence),
             _unusual(evidence), _qc(evidence))
    return {f.term: f for f in found if f is not None and np.isfinite(f.value)}
