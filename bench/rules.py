"""Benchmark: classical rules (with and without Webster rescoring) and sleep parameters.

Simulates 1,000 nights of 1,000 epochs of 30-s counts (seeded) and times, on one core:

- ``nights_per_s`` (headline): each night scored with ``cole-kripke+webster``,
  ``sadeh+webster`` and ``count-threshold+webster``, and the sleep parameters of each result;
- ``plain_rules_nights_per_s``: the same without Webster rescoring;
- ``six_sequences_nights_per_s``: the three rules once each, every result also Webster-rescored,
  and the parameters of all six sequences (what a rule comparison computes per night);
- ``continuous_scores_nights_per_s``: :func:`models.scoring.rules.continuous_scores` (feature input);
- ``parameters_per_s``: one :func:`models.scoring.parameters.sleep_parameters` call.

Rates use the CPU time of this process (``time.process_time``), so other work on a shared
machine does not count against them; ``wall_nights_per_s`` gives the headline in wall time too.
Run with ``make bench`` or ``.venv/bin/python bench/rules.py`` (or ``python -m bench.rules`` from the
project root when the package is not installed). The last printed line is one JSON object.
Goal: ``nights_per_s`` >= 2,000.
"""

from __future__ import annotations

import json
import time

import numpy as np

from models.scoring.parameters import sleep_parameters
from models.scoring.rescoring import webster_rescore
from models.scoring.rules import METHOD_IDS, RULES, continuous_scores, score_with_rule

N_NIGHTS = 1_000
N_EPOCHS = 1_000
EPOCH_SECONDS = 30
SEED = 20261201


def simulate_counts(rng: np.random.Generator) -> np.ndarray:
    """One night of counts: a wake block, sleep with brief arousals, a final wake block."""
    state = np.ones(N_EPOCHS)
    state[: rng.integers(10, 60)] = 0
    state[N_EPOCHS - rng.integers(5, 40):] = 0
    state[rng.random(N_EPOCHS) < 0.05] = 0
    counts = np.where(state == 1, rng.poisson(2.0, N_EPOCHS), rng.poisson(120.0, N_EPOCHS)).astype(float)
    counts[rng.random(N_EPOCHS) < 0.002] = np.nan  # a few missing epochs
    return counts


def _time(fn, nights: list[np.ndarray]) -> tuple[float, float]:
    """(CPU seconds of this process, wall seconds) to run ``fn`` on every night."""
    cpu, wall = time.process_time(), time.perf_counter()
    for counts in nights:
        fn(counts)
    return time.process_time() - cpu, time.perf_counter() - wall


def main() -> None:
    rng = np.random.default_rng(SEED)
    nights = [simulate_counts(rng) for _ in range(N_NIGHTS)]

    def with_webster(counts: np.ndarray) -> None:
        for base in RULES:
            sleep_parameters(score_with_rule(counts, EPOCH_SECONDS, base + "+webster").sleep, EPOCH_SECONDS)

    def plain(counts: np.ndarray) -> None:
        for base in RULES:
            sleep_parameters(score_with_rule(counts, EPOCH_SECONDS, base).sleep, EPOCH_SECONDS)

    def six_sequences(counts: np.ndarray) -> None:
        for base in RULES:
            sleep = score_with_rule(counts, EPOCH_SECONDS, base).sleep
            sleep_parameters(sleep, EPOCH_SECONDS)
            sleep_parameters(webster_rescore(sleep, EPOCH_SECONDS), EPOCH_SECONDS)

    def parameters_only(counts: np.ndarray) -> None:
        sleep_parameters(counts < 20, EPOCH_SECONDS)

    _time(six_sequences, nights[:50])  # warm-up
    timed = {"nights_per_s": with_webster, "plain_rules_nights_per_s": plain,
             "six_sequences_nights_per_s": six_sequences,
             "continuous_scores_nights_per_s": lambda c: continuous_scores(c, EPOCH_SECONDS),
             "parameters_per_s": parameters_only}
    best = {name: min(_time(fn, nights) for _ in range(3)) for name, fn in timed.items()}
    figures = {name: round(N_NIGHTS / cpu, 1) for name, (cpu, _) in best.items()}
    figures["wall_nights_per_s"] = round(N_NIGHTS / best["nights_per_s"][1], 1)
    print(f"{N_NIGHTS} nights x {N_EPOCHS} epochs of {EPOCH_SECONDS} s; methods {', '.join(METHOD_IDS)}")
    for name, per_s in figures.items():
        print(f"  {name:32s} {per_s:10,.0f}")
    print(json.dumps(figures | {"n_nights": N_NIGHTS, "n_epochs": N_EPOCHS, "epoch_seconds": EPOCH_SECONDS,
                                "goal_nights_per_s": 2000}))


if __name__ == "__main__":
    main()
