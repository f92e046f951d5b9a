"""Night-level sleep parameters from a sleep/wake sequence.

One function, :func:`sleep_parameters`, serves reference (PSG) labels and every prediction, so
both sides of a comparison are computed the same way. Definitions follow the AASM conventions
for PSG (Iber et al. 2007; from memory) with the actigraphy options of Fekedulegn et al. 2020
made explicit (onset run length, minimum awakening length, WASO end point).

All durations are in minutes and all latencies are measured from lights-off. Epoch indices
(``*_idx``) count from the start of the recording, not from lights-off.

Unscored epochs
---------------
Epochs with NaN inside the in-bed interval are *unscored*: an unscored reference epoch
(artefact, "?"), an epoch a method could not score because its counts are missing (gap
filling), or one masked so that both sides of a comparison cover the same epochs. They are
counted in ``unscored_epochs`` and are neither sleep nor wake:

- TST and WASO count scored epochs only, and the sleep-efficiency denominator is the *scored*
  time in bed (``100 * TST / (time in bed - unscored time)``), so a night with a block of
  unscored epochs has the TST, WASO and efficiency of the same night with that block cut out;
- wake bouts and sleep runs are formed from the scored epochs in order: an unscored epoch
  neither ends, splits nor creates a bout (wake, unscored, wake is one bout of two epochs), so
  the awakening count, mean and longest awakening and the persistent-sleep run also equal those
  of the night with the unscored epochs cut out;
- latencies and SPT are clock intervals: SOL is the clock time from lights-off to the first
  *scored* sleep epoch and SPT runs from it to the end of the last scored sleep epoch; unscored
  epochs inside them count as time (they are not removed from the clock).

That is the default (``StudyProtocol.unscored_breaks_bouts=False``). With
``unscored_breaks_bouts=True`` an unscored epoch ends the bout it interrupts instead: wake,
unscored, wake are two bouts of one epoch each, and a persistent-sleep run must be scored sleep
throughout; TST, WASO and efficiency are unchanged (they count epochs, not bouts).

Outside the in-bed interval
---------------------------
Sleep scored before lights-off or after lights-on is not part of TST, WASO or any latency
(every parameter describes the in-bed interval); it is reported in
``sleep_before_lights_off_min`` and ``sleep_after_lights_on_min`` so that it is visible rather
than dropped.

The definitions (onset, WASO end, awakening length, bouts) come from a
:class:`models.scoring.protocol.StudyProtocol`; :data:`~models.scoring.protocol.DEFAULT_PROTOCOL`
gives the values of the options' defaults.
"""

from __future__ import annotations

from dataclasses import dataclass, fields, replace
from typing import Any, Literal

import numpy as np
from numpy.typing import ArrayLike

from ..errors import NightbankError
from .protocol import DEFAULT_PROTOCOL, WASO_ENDS, StudyProtocol
from .rescoring import as_sleep_vector, check_epoch_seconds, run_lengths

__all__ = ["InvalidInBedIntervalError", "PARAMETER_NAMES", "SleepParameters", "WasoEnd", "sleep_parameters"]

WasoEnd = Literal["lights_on", "final_awakening"]

#: Stable order of the parameter columns in tables.
PARAMETER_NAMES: tuple[str, ...] = (
    "time_in_bed_min", "sol_min", "lps_min", "spt_min", "tst_min", "waso_min", "sleep_efficiency_pct",
    "awakenings", "mean_awakening_min", "longest_awakening_min", "unscored_epochs",
)


class InvalidInBedIntervalError(NightbankError):
    """Lights-off / lights-on indices are not ``0 <= lights_off_idx <= lights_on_idx <= n_epochs``."""

    code = "invalid_in_bed_interval"


@dataclass(frozen=True)
class SleepParameters:
    """Sleep parameters of one night (see :func:`sleep_parameters` for definitions).

    Attributes
    ----------
    time_in_bed_min, sol_min, lps_min, spt_min, tst_min, waso_min : float
        Minutes. ``sol_min`` and ``lps_min`` are NaN when there is no (persistent) sleep.
    sleep_efficiency_pct : float
        Percent, 100 x TST / scored time in bed.
    awakenings : float
        Number of wake bouts counted (a float so that "undefined" can be NaN).
    mean_awakening_min, longest_awakening_min : float
        Mean and longest counted wake bout, minutes.
    unscored_epochs : int
        Unscored (NaN) epochs inside the in-bed interval.
    sleep_onset_idx, final_awakening_idx : int or None
        Index of the sleep-onset epoch (as the protocol's ``sol`` defines onset), and of the epoch
        just after the last sleep epoch (equals ``lights_on_idx`` when sleep lasts until
        lights-on); None without sleep (or without persistent sleep when onset needs it).
    sleep_before_lights_off_min, sleep_after_lights_on_min : float
        Scored sleep outside the in-bed interval, minutes: reported, never added to TST.
    """

    time_in_bed_min: float
    sol_min: float
    lps_min: float
    spt_min: float
    tst_min: float
    waso_min: float
    sleep_efficiency_pct: float
    awakenings: float
    mean_awakening_min: float
    longest_awakening_min: float
    unscored_epochs: int
    sleep_onset_idx: int | None
    final_awakening_idx: int | None
    sleep_before_lights_off_min: float = 0.0
    sleep_after_lights_on_min: float = 0.0

    def as_dict(self) -> dict[str, float | int | None]:
        """All fields as a dict, the :data:`PARAMETER_NAMES` first, in table order."""
        return {f.name: getattr(self, f.name) for f in fields(self)}  # every field is a scalar: nothing to copy


def _no_sleep(tib: float, unscored: int, nothing_scored: bool, outside: tuple[float, float]) -> SleepParameters:
    nan = float("nan")
    zero = nan if nothing_scored else 0.0  # with no scored epoch, even "no sleep" is unknown
    return SleepParameters(time_in_bed_min=tib, sol_min=nan, lps_min=nan, spt_min=zero, tst_min=zero,
                           waso_min=zero, sleep_efficiency_pct=zero, awakenings=zero, mean_awakening_min=nan,
                           longest_awakening_min=zero, unscored_epochs=unscored, sleep_onset_idx=None,
                           final_awakening_idx=None, sleep_before_lights_off_min=outside[0],
                           sleep_after_lights_on_min=outside[1])


def _check_index(value: object, name: str) -> int:
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)):
        raise InvalidInBedIntervalError(f"{name} must be an integer epoch index, got {value!r}")
    return int(value)


def _resolve_protocol(protocol: StudyProtocol, persistent_sleep_min: float | None, min_awakening_epochs: int | None,
                      waso_end: str | None) -> StudyProtocol:
    """The protocol with the legacy keyword options applied on top (same errors as before)."""
    if not isinstance(protocol, StudyProtocol):
        raise NightbankError(f"protocol must be a StudyProtocol, got {type(protocol).__name__}",
                             code="invalid_parameter_option")
    if waso_end is not None and waso_end not in WASO_ENDS:
        raise NightbankError(f"waso_end must be 'lights_on' or 'final_awakening', got {waso_end!r}",
                             code="invalid_parameter_option")
    if min_awakening_epochs is not None and (
            isinstance(min_awakening_epochs, bool) or int(min_awakening_epochs) != min_awakening_epochs
            or min_awakening_epochs < 1) or persistent_sleep_min is not None and not persistent_sleep_min > 0:
        raise NightbankError("min_awakening_epochs must be an integer >= 1 and persistent_sleep_min > 0",
                             code="invalid_parameter_option")
    overrides: dict[str, Any] = {}
    if waso_end is not None:
        overrides["waso_end"] = waso_end
    if min_awakening_epochs is not None:
        overrides["min_awakening_epochs"] = int(min_awakening_epochs)
    if persistent_sleep_min is not None:
        overrides["persistent_sleep_min"] = float(persistent_sleep_min)
    return replace(protocol, **overrides) if overrides else protocol


def sleep_parameters(sleep: ArrayLike, epoch_seconds: int, *, lights_off_idx: int = 0,
                     lights_on_idx: int | None = None, protocol: StudyProtocol = DEFAULT_PROTOCOL,
                     persistent_sleep_min: float | None = None, min_awakening_epochs: int | None = None,
                     waso_end: WasoEnd | None = None) -> SleepParameters:
    """Compute the sleep parameters of one night within its in-bed interval.

    Parameters
    ----------
    sleep : array-like of shape (n_epochs,)
        1 = sleep, 0 = wake, NaN = unscored (see "Unscored epochs" in the module docstring);
        integer and bool arrays are accepted.
    epoch_seconds : {15, 30, 60}
        Epoch length in seconds.
    lights_off_idx : int, default=0
        First in-bed epoch (inclusive).
    lights_on_idx : int or None, default=None
        End of the in-bed interval (exclusive); None = end of the recording.
    protocol : StudyProtocol, default=DEFAULT_PROTOCOL
        The study's definitions: ``sol``, ``persistent_sleep_min``, ``min_awakening_epochs``,
        ``waso_end`` and ``unscored_breaks_bouts`` (see :mod:`models.scoring.protocol`).
    persistent_sleep_min : float or None, default=None
        Overrides ``protocol.persistent_sleep_min`` (minutes of uninterrupted sleep that make
        persistent sleep, rounded up to whole epochs: 10 min = 20 epochs of 30 s).
    min_awakening_epochs : int or None, default=None
        Overrides ``protocol.min_awakening_epochs`` (shortest wake bout, in epochs, counted as
        an awakening).
    waso_end : {"lights_on", "final_awakening"} or None, default=None
        Overrides ``protocol.waso_end``. ``"lights_on"`` (AASM PSG convention, from memory)
        includes the wake between the final awakening and lights-on, and the final wake bout is an
        awakening; ``"final_awakening"`` counts only wake inside the sleep period.

    Returns
    -------
    SleepParameters
        - ``time_in_bed_min``: length of the in-bed interval (unscored epochs included).
        - ``sol_min``: lights-off to sleep onset: the first sleep epoch (``sol="first_sleep"``)
          or the first epoch of the first run of ``persistent_sleep_min`` of sleep
          (``sol="persistent_sleep"``, then equal to ``lps_min``).
        - ``lps_min``: lights-off to the first epoch of the first run of ``persistent_sleep_min``
          of sleep (whatever ``sol`` is).
        - ``spt_min``: sleep onset to the end of the last sleep epoch.
        - ``tst_min``: in-bed sleep epochs x epoch length (sleep before onset included, as
          AASM counts every sleep epoch in the recording period).
        - ``waso_min``: wake epochs after sleep onset, up to ``waso_end``; every wake epoch
          counts, whatever its bout length.
        - ``sleep_efficiency_pct``: 100 x TST / scored time in bed.
        - ``awakenings``, ``mean_awakening_min``, ``longest_awakening_min``: wake bouts after
          sleep onset (same end as WASO) of at least ``min_awakening_epochs``; the mean is NaN
          and the longest 0 when there is none.
        - ``unscored_epochs``, ``sleep_onset_idx``, ``final_awakening_idx``.
        - ``sleep_before_lights_off_min``, ``sleep_after_lights_on_min``: scored sleep outside
          the in-bed interval (not part of any other parameter).

    Raises
    ------
    InvalidSleepVectorError
        If ``sleep`` holds values other than 0, 1 or NaN.
    InvalidInBedIntervalError
        If the in-bed indices are out of order or outside the recording.
    UnsupportedEpochLengthError
        If ``epoch_seconds`` is not 15, 30 or 60.
    NightbankError
        ``invalid_parameter_option`` for a bad override or a ``protocol`` that is not a
        :class:`StudyProtocol`.

    Notes
    -----
    Defined edge cases: without any sleep epoch, ``sol_min`` and ``lps_min`` are NaN (no onset
    happened; a latency of "time in bed" would be a censored value posing as a measurement),
    TST, SPT, WASO, efficiency, awakenings and the longest awakening are 0, and the indices
    None. When no epoch of the in-bed interval is scored (or the interval is empty), every
    parameter except ``time_in_bed_min``, ``unscored_epochs`` and the sleep outside the interval
    is NaN. With ``sol="persistent_sleep"`` and sleep but no persistent run, there is no onset:
    ``sol_min``, ``spt_min``, ``waso_min`` and the awakening figures are NaN, the indices None,
    TST and efficiency as usual.

    Examples
    --------
    >>> p = sleep_parameters([0, 0, 1, 1, 0, 1, 0], 60)
    >>> p.sol_min, p.tst_min, p.waso_min, p.awakenings
    (2.0, 3.0, 2.0, 2.0)
    """
    x = as_sleep_vector(sleep, allow_unscored=True)
    epoch_min = check_epoch_seconds(epoch_seconds) / 60.0
    off = _check_index(lights_off_idx, "lights_off_idx")
    on = x.size if lights_on_idx is None else _check_index(lights_on_idx, "lights_on_idx")
    if not 0 <= off <= on <= x.size:
        raise InvalidInBedIntervalError(
            f"in-bed interval [{off}, {on}) is not inside the recording of {x.size} epochs")
    proto = _resolve_protocol(protocol, persistent_sleep_min, min_awakening_epochs, waso_end)
    outside = (float(np.count_nonzero(x[:off] == 1.0)) * epoch_min, float(np.count_nonzero(x[on:] == 1.0)) * epoch_min)
    seg = x[off:on]
    tib = seg.size * epoch_min
    missing = np.isnan(seg)
    unscored = int(np.count_nonzero(missing))
    if proto.unscored_breaks_bouts:
        scored_idx = None  # bouts on the in-bed clock, an unscored epoch (-1) a run of its own
        v = np.where(missing, -1.0, seg)
    else:
        scored_idx = (~missing).nonzero()[0] if unscored else None  # in-bed positions of scored epochs
        v = seg[scored_idx] if unscored else seg
    sleep_pos = (v == 1.0).nonzero()[0]  # positions in v
    if sleep_pos.size == 0:
        return _no_sleep(tib, unscored, nothing_scored=unscored == seg.size, outside=outside)

    def in_bed(pos: int) -> int:
        return pos if scored_idx is None else int(scored_idx[pos])

    first_c, last_c = int(sleep_pos[0]), int(sleep_pos[-1])
    starts, lengths, vals = run_lengths(v[first_c:])
    persistent_epochs = int(np.ceil(proto.persistent_sleep_min / epoch_min - 1e-9))
    persistent = ((vals == 1.0) & (lengths >= persistent_epochs)).nonzero()[0]
    lps_c = first_c + int(starts[persistent[0]]) if persistent.size else None
    lps = float("nan") if lps_c is None else in_bed(lps_c) * epoch_min
    tst = sleep_pos.size * epoch_min
    efficiency = 100.0 * tst / ((seg.size - unscored) * epoch_min)
    onset_c = first_c if proto.sol == "first_sleep" else lps_c
    if onset_c is None:  # persistent-sleep onset and no persistent run
        nan = float("nan")
        return SleepParameters(
            time_in_bed_min=tib, sol_min=nan, lps_min=nan, spt_min=nan, tst_min=tst, waso_min=nan,
            sleep_efficiency_pct=efficiency, awakenings=nan, mean_awakening_min=nan, longest_awakening_min=nan,
            unscored_epochs=unscored, sleep_onset_idx=None, final_awakening_idx=None,
            sleep_before_lights_off_min=outside[0], sleep_after_lights_on_min=outside[1])
    if onset_c != first_c:
        starts, lengths, vals = run_lengths(v[onset_c:])
    is_wake = vals == 0.0
    wake_bouts = lengths[is_wake]
    if proto.waso_end == "final_awakening":  # wake after the last sleep epoch is neither WASO nor an awakening
        wake_bouts = wake_bouts[starts[is_wake] < last_c - onset_c]
    bouts = wake_bouts[wake_bouts >= proto.min_awakening_epochs]
    onset, last = in_bed(onset_c), in_bed(last_c)
    return SleepParameters(
        time_in_bed_min=tib,
        sol_min=onset * epoch_min,
        lps_min=float(lps),
        spt_min=(last + 1 - onset) * epoch_min,
        tst_min=tst,
        waso_min=float(wake_bouts.sum()) * epoch_min,
        sleep_efficiency_pct=efficiency,
        awakenings=float(bouts.size),
        mean_awakening_min=float(bouts.sum()) / bouts.size * epoch_min if bouts.size else float("nan"),
        longest_awakening_min=float(bouts.max()) * epoch_min if bouts.size else 0.0,
        unscored_epochs=int(unscored),
        sleep_onset_idx=off + onset,
        final_awakening_idx=off + last + 1,
        sleep_before_lights_off_min=outside[0],
        sleep_after_lights_on_min=outside[1],
    )
