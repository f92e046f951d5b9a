"""How well the review queue finds the nights whose parameters are most wrong (SIMULATED data).

A simulated cohort (:func:`models.simulation.simulator.simulate_cohort`; every night has known true
stages) is split per participant: the first ``--labelled`` nights keep their PSG labels and train
the pooled model (:func:`models.learning.pooled.train_pooled`, participant offsets included); the
other nights lose their labels and form the queue. Each queue night is scored as the service would:

- ``auto``: the pooled model with the participant's offset, its calibrated P(sleep) decoded into
  calls by the model's own decoding (:class:`models.decoding.fitting.NightDecoding`, fitted in
  training on validation nights only);
- ``pooled`` (no offset) and the classical rules ``cole-kripke`` and ``sadeh``, for disagreement;
- per-night intervals and ``uncertainty_min`` of ``auto``: :meth:`models.learning.classifier.SleepModel.intervals`
  (paths drawn from the decoding's sleep/wake chain), and the minutes of ``auto``'s in-bed calls its
  own calibrated P(sleep) expects to be wrong (:func:`models.review.evidence.expected_relabel`);
- quality flags (:func:`models.nights.quality.quality_flags`), the off-wrist share of the in-bed
  interval (the flagged runs of zeros), a simulated diary, and the ``auto`` parameters of the
  participant's other queue nights (for "unusual for this participant").

Two situations of real studies are simulated on top of the cohort's nights (shares below):

- a mistaken lights-off marker (``MARKER_SHARE`` of queue nights): the recorded lights-off is 30-90 min
  off the true one, so the in-bed interval the scoring uses is wrong; the diary, written from memory,
  keeps the true bed time (plus noise);
- the device taken off in the night (``OFFWRIST_SHARE``): 60-120 min of zero counts while the
  participant is up (true stages wake).

Every diary carries noise (normal, SD 10 min, rounded to 5 min).

Figure: the **total absolute parameter error** of a night is |TST err| + |WASO err| + |SOL err| of
``auto`` against the truth (true stages over the true in-bed interval), minutes; an error undefined on
either side (SOL without sleep) counts 0. The goal figure is the share of the queue's summed total error
held by the top fifth of the queue (``round(n / 5)`` nights), goal >= 40 %; a random order holds ~20 %
(the mean over 2000 seeded random orders is printed as a control), the best possible order (by the
true error) is printed as the ceiling, and ``gain_captured`` = (share - random) / (best - random).
The same shares on the nights without a simulated marker or off-wrist problem are printed too.

The ranking (:func:`models.review.priority.rank_nights`) orders by each night's expected total
absolute error, ``base_min * exp(sum(weight * term))`` over the evidence terms.

``--fit``: fits those weights (:func:`models.review.error_model.fit_priority_weights`: Poisson
quasi-likelihood, log link, weights >= 0) to the true total absolute errors of the unlabelled nights
of the ``FIT_COHORTS`` (18 cohorts of 8-24 participants, each with a seed of its own, pooled), prints
them and measures the figure with them; without ``--fit`` the figure is measured with
:data:`models.review.priority.DEFAULT_PRIORITY_WEIGHTS` (fitted by ``--fit``), or ``--weights``. The
weights are never fitted on the cohort the figure is measured on (``--seed``, default ``EVAL_SEED``,
must not be a fit seed; ``--participants``).

Figures (2 cores, load average 10-12; the seeded cohorts give the same shares on every run), top
fifth's share with the best possible share in brackets: 20 participants 51.2 % (56.7 %),
12 participants 37.5 % (47.4 %; the goal is missed), seed 737373 with 16 participants 44.8 %
(50.8 %), seed 909090 with 12 participants 32.2 % (37.9 %: no order reaches 40 % there).

The last printed line is one JSON object (with the load average before and after).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from models.learning.config import TrainingConfig  # noqa: E402
from models.learning.descriptors import participant_descriptors  # noqa: E402
from models.learning.pooled import train_pooled  # noqa: E402
from models.nights.night import Night, stages_to_sleep  # noqa: E402
from models.nights.quality import quality_flags  # noqa: E402
from models.review.error_model import fit_priority_weights  # noqa: E402
from models.review.evidence import REVIEW_PARAMETERS, NightEvidence, expected_relabel  # noqa: E402
from models.review.priority import DEFAULT_PRIORITY_WEIGHTS, rank_nights  # noqa: E402
from models.scoring.parameters import sleep_parameters  # noqa: E402
from models.scoring.rules import score_with_rule  # noqa: E402
from models.simulation.simulator import CohortSpec, simulate_cohort  # noqa: E402

EVAL_SEED = 515151
#: (seed, participants) of the cohorts ``--fit`` fits the weights on: seeds of their own, sizes 8-24
FIT_COHORTS: tuple[tuple[int, int], ...] = (
    (626262, 24), (444444, 12), (222222, 14), (333333, 18), (555555, 16), (666666, 20), (777777, 12), (888888, 8),
    (999999, 22), (121212, 12), (131313, 16), (141414, 20), (151515, 10), (161616, 14), (171717, 12), (181818, 18),
    (191919, 24), (111111, 10))
MARKER_SHARE = 0.15
OFFWRIST_SHARE = 0.10
RULES = ("cole-kripke", "sadeh")
SHOWN = ("sol_min", "tst_min", "waso_min", "awakenings", "sleep_efficiency_pct", "time_in_bed_min")


@dataclass
class QueueNight:
    night_id: str
    participant_id: str
    night: Night             # as recorded (marker and off-wrist situations applied), no labels
    truth_sleep: np.ndarray  # true sleep/wake per epoch
    true_in_bed: tuple[int, int]
    situation: str           # "none", "marker", "off_wrist"
    diary_offsets_min: dict[str, float]


def _params(sleep: np.ndarray, in_bed: tuple[int, int]) -> dict[str, float]:
    p = sleep_parameters(sleep, 30, lights_off_idx=in_bed[0], lights_on_idx=in_bed[1]).as_dict()
    return {k: float(p[k]) for k in SHOWN}  # type: ignore[arg-type]


def _cohort(seed: int, n_participants: int, labelled: int) -> tuple[dict[str, list[Night]], list[QueueNight]]:
    """Training nights per participant (labelled ones plus the queue nights without labels) and the queue."""
    spec = CohortSpec(n_participants=n_participants, nights_min=labelled + 4, nights_max=labelled + 9,
                      labelled_share=1.0, few_labels_participants=0, artefacts=False, id_prefix="RQ")
    sims = simulate_cohort(spec, seed=seed)
    rng = np.random.default_rng(seed + 1)
    nights: dict[str, list[Night]] = {}
    queue: list[QueueNight] = []
    for sim in sims:
        n = sim.night
        pid = n.participant_id
        nights.setdefault(pid, [])
        if len([x for x in nights[pid] if x.reference is not None]) < labelled:
            nights[pid].append(n)
            continue
        truth = stages_to_sleep(sim.stages)
        off, on = n.in_bed
        counts = n.counts.copy()
        lights_off = n.lights_off
        situation = "none"
        u = rng.random()
        if u < MARKER_SHARE:
            shift = int(rng.integers(30, 91)) * int(rng.choice([-1, 1]))
            shift = max(shift, -(off // 2))  # the marker stays inside the recording
            lights_off = n.lights_off + pd.Timedelta(minutes=shift)
            situation = "marker"
        elif u < MARKER_SHARE + OFFWRIST_SHARE:
            length = int(rng.integers(120, 241))  # epochs: 60-120 min
            at = int(rng.integers(off + 60, max(off + 61, on - length - 60)))
            counts[at: at + length] = 0.0
            truth = truth.copy()
            truth[at: at + length] = 0.0
            situation = "off_wrist"
        recorded = Night(participant_id=pid, start=n.start, epoch_seconds=30, counts=counts, reference=None,
                         lights_off=lights_off, lights_on=n.lights_on, label=n.label)
        noise = lambda: float(5 * round(rng.normal(0, 10) / 5))  # noqa: E731
        used_off, used_on = recorded.in_bed
        diary = {"bed_time": (off - used_off) / 2 + noise(), "wake_time": (on - used_on) / 2 + noise()}
        queue.append(QueueNight(night_id=n.night_id, participant_id=pid, night=recorded, truth_sleep=truth,
                                true_in_bed=(off, on), situation=situation, diary_offsets_min=diary))
        nights[pid].append(recorded)
    return nights, queue


def _evidence(nights: dict[str, list[Night]], queue: list[QueueNight], *, seed: int
              ) -> tuple[list[NightEvidence], dict[str, float], float]:
    """Evidence per queue night and the true total absolute error of auto per night."""
    t0 = time.perf_counter()
    pooled = train_pooled(nights, config=TrainingConfig(seed=seed, n_jobs=2, pooled_folds=3))
    train_s = time.perf_counter() - t0
    model = pooled.model
    auto_params: dict[str, dict[str, float]] = {}
    evidence_parts = []
    errors: dict[str, float] = {}
    for q in queue:
        pid, n = q.participant_id, q.night
        desc = pooled.descriptors.get(pid) or participant_descriptors(nights[pid])
        margin = model.decision_function(n, descriptors=desc)
        p_auto = model.proba_from_margin(margin + pooled.offsets[pid])
        auto = model.calls(p_auto)
        in_bed = n.in_bed
        pooled_calls = model.calls(model.proba_from_margin(margin))
        params = {"auto": _params(auto, in_bed), "pooled": _params(pooled_calls, in_bed)}
        for rule in RULES:
            params[rule] = _params(score_with_rule(n.counts, 30, rule).sleep, in_bed)
        iv = model.intervals(p_auto, n, n_paths=200, seed=seed)
        if iv is None:
            raise SystemExit("the pooled model has no decoding: per-night intervals are unavailable")
        flags = quality_flags(n)
        off_wrist = np.zeros(n.n_epochs, dtype=bool)
        for f in flags:
            if f.code == "off_wrist":
                for a, b in f.ranges:
                    off_wrist[a:b] = True
        share = float(off_wrist[in_bed[0]:in_bed[1]].mean()) if in_bed[1] > in_bed[0] else 0.0
        truth = _params(q.truth_sleep, q.true_in_bed)
        diffs = [params["auto"][k] - truth[k] for k in REVIEW_PARAMETERS]
        errors[q.night_id] = float(sum(abs(d) for d in diffs if np.isfinite(d)))
        auto_params[q.night_id] = params["auto"]
        relabel = expected_relabel(p_auto, auto, in_bed, 30)
        evidence_parts.append((q, params, iv, [f.code for f in flags], share, relabel))
    out = []
    for q, params, iv, flags, share, relabel in evidence_parts:
        history = [auto_params[o.night_id] for o in queue if o.participant_id == q.participant_id
                   and o.night_id != q.night_id]
        out.append(NightEvidence(night_id=q.night_id, participant_id=q.participant_id, epoch_seconds=30,
                                 parameters=params, intervals=iv.intervals, uncertainty_min=iv.uncertainty_min,
                                 qc_flags=flags, nonwear_share=share, diary_offsets_min=q.diary_offsets_min,
                                 history=history, relabel_min=relabel))
    return out, errors, train_s


def _top_share(order: list[str], errors: dict[str, float]) -> float:
    k = max(1, round(len(order) / 5))
    total = sum(errors[n] for n in order)
    return float(sum(errors[n] for n in order[:k]) / total) if total > 0 else float("nan")


def _shares(order: list[str], errors: dict[str, float], rng: np.random.Generator) -> dict[str, float]:
    ids = list(order)
    random = [_top_share(list(rng.permutation(ids)), errors) for _ in range(2000)]
    best = sorted(ids, key=lambda n: (-errors[n], n))
    share, chance, ceiling = _top_share(ids, errors), float(np.mean(random)), _top_share(best, errors)
    return {"top_fifth_share": share, "random_share": chance, "best_share": ceiling,
            "gain_captured": (share - chance) / (ceiling - chance) if ceiling > chance else float("nan"),
            "n_nights": len(ids)}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--participants", type=int, default=20, help="participants of the evaluation cohort")
    parser.add_argument("--seed", type=int, default=EVAL_SEED, help="seed of the evaluation cohort")
    parser.add_argument("--labelled", type=int, default=3, help="labelled (training) nights per participant")
    parser.add_argument("--fit", action="store_true", help="fit the priority weights on the FIT_COHORTS")
    parser.add_argument("--weights", default=None, help="JSON object of weights to measure instead of the defaults")
    args = parser.parse_args()
    load_before = os.getloadavg()
    print(f"load average before: {load_before[0]:.2f} {load_before[1]:.2f} {load_before[2]:.2f}")
    t0 = time.perf_counter()
    result: dict[str, object] = {}
    fitted: dict[str, float] | None = None
    if args.seed in {seed for seed, _ in FIT_COHORTS}:
        raise SystemExit("the evaluation cohort must not be one of the FIT_COHORTS")
    if args.fit:
        evidence, errors = [], {}
        for seed, size in FIT_COHORTS:
            nights, queue = _cohort(seed, size, args.labelled)
            found, found_errors, _ = _evidence(nights, queue, seed=seed)
            evidence += found
            errors |= found_errors
        fitted = fit_priority_weights(evidence, errors)
        print(f"fitted weights ({len(FIT_COHORTS)} fit cohorts, {len(evidence)} nights, SIMULATED):",
              json.dumps({k: round(v, 4) for k, v in fitted.items()}))
        result["fitted_weights"] = fitted
    nights, queue = _cohort(args.seed, args.participants, args.labelled)
    evidence, errors, train_s = _evidence(nights, queue, seed=args.seed)
    weights = (fitted or DEFAULT_PRIORITY_WEIGHTS) if args.weights is None else json.loads(args.weights)
    ranked = rank_nights(evidence, weights=weights)
    order = [it.night_id for it in ranked]
    rng = np.random.default_rng(args.seed)
    shares = _shares(order, errors, rng)
    clean = {q.night_id for q in queue if q.situation == "none"}
    clean_shares = _shares([n for n in order if n in clean], errors, rng)
    situations = {q.night_id: q.situation for q in queue}
    print(f"queue of {len(order)} simulated unlabelled nights ({len(clean)} without a simulated problem); "
          f"pooled model trained in {train_s:.0f} s")
    for it in ranked[: max(1, round(len(order) / 5))]:
        print(f"  {it.night_id}  expected {it.expected_change_min:6.1f} min  true {errors[it.night_id]:6.1f} min  "
              f"[{situations[it.night_id]}]  {'; '.join(it.reasons[:3])}")
    expected = np.array([it.expected_change_min for it in ranked])
    true = np.array([errors[n] for n in order])
    spearman = float(pd.Series(expected).corr(pd.Series(true), method="spearman"))
    print(f"top fifth holds {100 * shares['top_fifth_share']:.1f} % of the total absolute error "
          f"(random order {100 * shares['random_share']:.1f} %, best order {100 * shares['best_share']:.1f} %; "
          f"{100 * shares['gain_captured']:.0f} % of the attainable gain)")
    print(f"nights without a simulated problem: top fifth {100 * clean_shares['top_fifth_share']:.1f} % "
          f"(random {100 * clean_shares['random_share']:.1f} %, best {100 * clean_shares['best_share']:.1f} %)")
    print(f"mean expected change {expected.mean():.1f} min, mean true error {true.mean():.1f} min, "
          f"Spearman {spearman:.2f}")
    load_after = os.getloadavg()
    print(f"load average after: {load_after[0]:.2f} {load_after[1]:.2f} {load_after[2]:.2f}")
    result |= {"simulated": True, "seed": args.seed, "participants": args.participants, **shares,
               "goal_top_fifth_share": 0.40,
               "goal_met": bool(shares["top_fifth_share"] >= 0.40),
               "clean_nights": clean_shares, "spearman": spearman,
               "mean_expected_change_min": float(expected.mean()), "mean_true_error_min": float(true.mean()),
               "train_s": train_s, "elapsed_s": time.perf_counter() - t0,
               "load_average_before": load_before[0], "load_average_after": load_after[0]}
    print(json.dumps(result))


if __name__ == "__main__":
    main()
