"""Simulated cohorts: invented participants, nights, PSG-style stages and activity counts.

Everything produced here is SIMULATED. The generator is used for the demo study and for the
quality benchmark, and reproduces the situations that make count-based scoring hard:

* a long sleep-onset latency spent lying still (quiet wake with sparse small movements);
* quiet wake after sleep onset, often opened by an arousal movement;
* postural shifts during sleep that are not awakenings;
* person-to-person differences in movement level and device gain;
* day-time sleep after night shifts (shifted clock times);
* optional artefacts: a stretch with the device off the wrist, a spike.

The model is deliberately simple: stages follow ~90-min cycles with inserted wake bouts; each
stage emits counts from a zero-inflated gamma-Poisson distribution whose rate depends on the
stage, the participant's movement level and the device gain.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from ..nights.night import Night

__all__ = ["CohortSpec", "PersonTraits", "SimulatedNight", "simulate_cohort", "simulate_night"]

EPOCH_SECONDS = 30
_PER_MIN = 60 // EPOCH_SECONDS

#: per state: (probability an epoch moves, mean counts of a moving epoch) before gain, 30-s epochs
_EMISSION = {
    "active": (0.95, 260.0),
    "quiet": (0.30, 16.0),
    "arousal": (1.0, 170.0),
    "N1": (0.14, 9.0),
    "N2": (0.045, 6.0),
    "N3": (0.02, 4.0),
    "R": (0.08, 5.0),
    "shift": (1.0, 110.0),
}


@dataclass(frozen=True)
class PersonTraits:
    """Latent traits of one simulated participant (multipliers are 1 for a typical person)."""

    gain: float                 # device gain on all counts
    sleep_movement: float       # multiplies movement probability during sleep
    quiet_wake_movement: float  # multiplies movement probability during quiet wake
    sol_mean_min: float         # mean sleep-onset latency, minutes
    awakenings_mean: float      # mean number of awakenings per night
    shift_every_min: float      # mean minutes between postural shifts in sleep


@dataclass(frozen=True)
class CohortSpec:
    """Shape of a simulated cohort (documented defaults: the demo study).

    Parameters
    ----------
    n_participants : int, default=14
    nights_min, nights_max : int, default=1, 9
        Nights per participant (uniform).
    labelled_share : float, default=0.85
        Share of nights with a PSG reference.
    few_labels_participants : int, default=3
        Participants forced to have only 1 or 2 labelled nights.
    spread : float, default=1.0
        Scales the person-to-person spread of all traits (0 = identical people).
    artefacts : bool, default=True
        Put one off-wrist stretch and one spike into the cohort.
    id_prefix : str, default="GW"
    first_date : str, default="2031-03-02"
    """

    n_participants: int = 14
    nights_min: int = 1
    nights_max: int = 9
    labelled_share: float = 0.85
    few_labels_participants: int = 3
    spread: float = 1.0
    artefacts: bool = True
    id_prefix: str = "GW"
    first_date: str = "2031-03-02"


@dataclass(frozen=True)
class SimulatedNight:
    """A simulated night; ``night.reference`` is None when the night is not labelled."""

    night: Night
    stages: NDArray[np.str_] = field(repr=False)  # true stages, kept even for unlabelled nights
    traits: PersonTraits = field(repr=False)
    day_sleep: bool = False


def _traits(rng: np.random.Generator, spread: float) -> PersonTraits:
    s = spread
    return PersonTraits(
        gain=float(np.exp(rng.normal(0, 0.35 * s))),
        sleep_movement=float(np.exp(rng.normal(0, 0.35 * s))),
        quiet_wake_movement=float(np.exp(rng.normal(0, 0.30 * s))),
        sol_mean_min=float(np.clip(np.exp(rng.normal(np.log(22), 0.45 * s)), 5, 80)),
        awakenings_mean=float(np.clip(rng.normal(7, 2.0 * s), 2, 14)),
        shift_every_min=float(np.clip(rng.normal(35, 8 * s), 12, 70)),
    )


def _sleep_stages(rng: np.random.Generator, n: int) -> NDArray[np.str_]:
    """Cyclic N1/N2/N3/R architecture over ``n`` epochs (no wake)."""
    out: list[str] = []
    cycle = 0
    while len(out) < n:
        deep = max(0.0, 35 - 12 * cycle)
        rem = min(35.0, 8 + 7 * cycle)
        for stage, mean_min in (("N1", 3), ("N2", 22), ("N3", deep), ("N2", 12), ("R", rem)):
            if mean_min <= 0:
                continue
            k = max(1, int(rng.gamma(4.0, mean_min / 4.0) * _PER_MIN))
            out.extend([stage] * k)
        cycle += 1
    return np.array(out[:n], dtype="<U7")


def simulate_night(rng: np.random.Generator, traits: PersonTraits, *, participant_id: str,
                   start: pd.Timestamp, labelled: bool, label: str | None = None) -> SimulatedNight:
    """One simulated night: active wake, lights-off, quiet latency, sleep with awakenings, rise."""
    pre = int(rng.integers(10, 40)) * _PER_MIN
    in_bed = int(rng.integers(420, 540)) * _PER_MIN
    post = int(rng.integers(5, 25)) * _PER_MIN
    sol = max(1, int(rng.gamma(2.5, traits.sol_mean_min / 2.5) * _PER_MIN))
    final_wake = int(rng.gamma(2.0, 6.0) * _PER_MIN)
    body = max(in_bed - sol - final_wake, 60 * _PER_MIN)
    states = np.array(["active"] * pre + ["quiet"] * sol, dtype="<U7")
    stages = np.array(["W"] * (pre + sol), dtype="<U3")
    sleep = _sleep_stages(rng, body)
    sleep_state = sleep.copy()
    # awakenings: arousal movement, then quiet wake for the rest of the bout
    for _ in range(rng.poisson(traits.awakenings_mean)):
        kind = rng.random()
        length = int(rng.integers(1, 4) if kind < 0.55 else
                     rng.integers(4, 20) if kind < 0.88 else rng.integers(20, 70))
        at = int(rng.integers(10 * _PER_MIN, max(10 * _PER_MIN + 1, body - length)))
        sleep[at: at + length] = "W"
        sleep_state[at: at + length] = "quiet"
        sleep_state[at: at + min(length, int(rng.integers(1, 3)))] = "arousal"
    # postural shifts inside sleep, not awakenings
    n_shifts = rng.poisson(body / _PER_MIN / traits.shift_every_min)
    for at in rng.integers(0, body, n_shifts):
        if sleep[at] != "W":
            sleep_state[at] = "shift"
    stages = np.concatenate([stages, sleep, np.array(["W"] * (final_wake + post), dtype="<U3")])
    states = np.concatenate([states, sleep_state, np.array(["quiet"] * final_wake + ["active"] * post, dtype="<U7")])
    n = stages.size
    prob = np.empty(n)
    mean = np.empty(n)
    for state, (p, m) in _EMISSION.items():
        sel = states == state
        scale = (traits.sleep_movement if state in ("N1", "N2", "N3", "R") else
                 traits.quiet_wake_movement if state == "quiet" else 1.0)
        prob[sel] = min(1.0, p * scale)
        mean[sel] = m
    moving = rng.random(n) < prob
    rate = rng.gamma(1.5, mean / 1.5) * traits.gain
    counts = np.where(moving, rng.poisson(rate), 0).astype(np.float64)
    lights_off = start + pd.Timedelta(seconds=pre * EPOCH_SECONDS)
    lights_on = lights_off + pd.Timedelta(seconds=(sol + body + final_wake) * EPOCH_SECONDS)
    night = Night(participant_id=participant_id, start=start, epoch_seconds=EPOCH_SECONDS, counts=counts,
                  reference=stages if labelled else None, lights_off=lights_off, lights_on=lights_on, label=label)
    return SimulatedNight(night=night, stages=stages, traits=traits)


def simulate_cohort(spec: CohortSpec = CohortSpec(), *, seed: int = 20310302) -> list[SimulatedNight]:
    """Simulate a cohort; the same ``spec`` and ``seed`` give the same nights bit for bit."""
    rng = np.random.default_rng(seed)
    first = pd.Timestamp(spec.first_date, tz="Europe/Oslo")
    few = set(rng.choice(spec.n_participants, size=min(spec.few_labels_participants, spec.n_participants),
                         replace=False).tolist())
    out: list[SimulatedNight] = []
    for p in range(spec.n_participants):
        pid = f"{spec.id_prefix}-{p + 1:02d}"
        traits = _traits(rng, spec.spread)
        n_nights = int(rng.integers(spec.nights_min, spec.nights_max + 1))
        if p in few:
            n_nights = max(n_nights, 2)
            labelled = np.zeros(n_nights, dtype=bool)
            labelled[: int(rng.integers(1, 3))] = True
        else:
            n_nights = max(n_nights, 3)
            labelled = rng.random(n_nights) < spec.labelled_share
            labelled[: 3] = True
        day = pd.Timedelta(days=int(rng.integers(0, 20)))
        for k in range(n_nights):
            day_sleep = bool(rng.random() < 0.2)
            clock = pd.Timedelta(hours=8.0 if day_sleep else 22.0) + pd.Timedelta(minutes=int(rng.integers(-60, 60)))
            start = (first + day + clock).round("30s")
            if out and out[-1].night.participant_id == pid:  # a recording starts after the previous one ended
                start = max(start, out[-1].night.end)
            day += pd.Timedelta(days=int(rng.integers(1, 4)))
            sim = simulate_night(rng, traits, participant_id=pid, start=start,
                                 labelled=bool(labelled[k]), label=f"{pid}-n{k + 1}")
            out.append(replace(sim, day_sleep=day_sleep))
    if spec.artefacts and out:
        out = _add_artefacts(rng, out)
    return out


def _add_artefacts(rng: np.random.Generator, nights: list[SimulatedNight]) -> list[SimulatedNight]:
    """One off-wrist stretch (75 min of zeros before lights-off) and one spike epoch."""
    unlabelled = [i for i, s in enumerate(nights) if s.night.reference is None]
    labelled = [i for i, s in enumerate(nights) if s.night.reference is not None]
    for idx, kind in ((unlabelled[0] if unlabelled else 0, "off_wrist"), (labelled[-1], "spike")):
        n = nights[idx].night
        counts = n.counts.copy()
        if kind == "off_wrist":
            counts[: 150] = 0.0
        else:
            counts[n.n_epochs // 2] = 32767.0
        night = Night(participant_id=n.participant_id, start=n.start, epoch_seconds=n.epoch_seconds, counts=counts,
                      reference=n.reference, lights_off=n.lights_off, lights_on=n.lights_on, label=n.label)
        nights[idx] = replace(nights[idx], night=night)
    return nights
