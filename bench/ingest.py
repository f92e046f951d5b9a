"""Ingest speed: parse and validate 1,000 nights of 1,000 epochs from CSV, profiled CSV and JSON (one core).

The profiled CSV is a lab export read through an import profile: a device preamble, ``;`` delimiter,
decimal comma, day-first date and time in separate columns (naive local times), R&K stage numbers.

Each case is read ``BENCH_ROUNDS`` times (default 3), the three cases taking turns round by round
so that a neighbour's load falls on all of them alike, and the best round counts: on a shared
machine the slower rounds measure the neighbours. Rates are given per second of wall time and per
second of this process's CPU time (``*_epochs_per_cpu_s``), which other processes disturb less;
the ratios (profiled CSV and JSON against plain CSV, from CPU time) compare the cases within the
run. The load average is printed at the start and at the end.

Last line: one JSON object, e.g. {"csv_epochs_per_s": ..., "profiled_csv_epochs_per_s": ...,
"json_epochs_per_s": ..., "profiled_csv_to_csv_ratio": ..., "load_average_1min": ...}.
Goals: >= 1,000,000 epochs/s for CSV (plain and profiled) and >= 2,000,000 for JSON.
"""

from __future__ import annotations

import json
import os
import time
from collections.abc import Callable

import numpy as np
import pandas as pd

os.environ.setdefault("OMP_NUM_THREADS", "1")

from models import (  # noqa: E402
    ImportProfile,
    Night,
    night_from_csv,
    night_from_json,
    night_to_csv,
    night_to_json,
)

N_NIGHTS = int(os.environ.get("BENCH_NIGHTS", "1000"))
N_ROUNDS = int(os.environ.get("BENCH_ROUNDS", "3"))
N_EPOCHS = 1000
#: R&K numbers as the simulated export writes them (0 wake, 1-4 stages 1-4, 5 REM)
RK_CODES = {"W": "0", "N1": "1", "N2": "2", "N3": "3", "R": "5"}
PROFILE = ImportProfile(name="bench-export", delimiter=";", skip_rows=3, decimal=",",
                        columns={"date": "Datum", "time": "Uhrzeit", "counts": "Aktivität [counts]",
                                 "reference": "Stadium"},
                        datetime_format="%d.%m.%Y %H:%M:%S", tz="Europe/Berlin",
                        stage_codes={"0": "W", "1": "N1", "2": "N2", "3": "N3", "4": "N3", "5": "R"},
                        ignore_columns=("Lux",))


def _nights() -> list[Night]:
    rng = np.random.default_rng(1)
    stages = np.array(["W", "N1", "N2", "N3", "R"])
    start = pd.Timestamp("2031-03-02T22:00:00+01:00")
    return [Night(participant_id="B", start=start + pd.Timedelta(days=i), epoch_seconds=30,
                  counts=rng.poisson(6, N_EPOCHS).astype(float), reference=rng.choice(stages, N_EPOCHS))
            for i in range(N_NIGHTS)]


def _export(night: Night) -> bytes:
    """The night as a simulated lab export (the layout :data:`PROFILE` describes)."""
    local = night.epoch_times().tz_convert("Europe/Berlin")
    frame = pd.DataFrame({"Datum": local.strftime("%d.%m.%Y"), "Uhrzeit": local.strftime("%H:%M:%S"),
                          "Aktivität [counts]": night.counts,
                          "Stadium": [RK_CODES[s] for s in night.reference.tolist()],  # type: ignore[union-attr]
                          "Lux": 0})
    head = "Device;simulated\nExported;2031-04-01\nEpoch;30 s\n"
    text = frame.to_csv(sep=";", decimal=",", float_format="%.1f", index=False, lineterminator="\n")  # "6,0"
    return (head + text).encode()


def _round(blobs: list[bytes], read: Callable[[bytes], Night]) -> tuple[float, float]:
    """(wall seconds, CPU seconds) of reading every blob once."""
    t0, c0 = time.perf_counter(), time.process_time()
    for blob in blobs:
        read(blob)
    return time.perf_counter() - t0, time.process_time() - c0


def _load() -> str:
    one, five, fifteen = os.getloadavg()
    return f"load average {one:.2f} {five:.2f} {fifteen:.2f} on {os.cpu_count()} cores"


def main() -> None:
    print(f"start: {_load()}")
    start_load = os.getloadavg()[0]
    nights = _nights()
    cases = {
        "csv": ([night_to_csv(n).encode() for n in nights], night_from_csv),
        "profiled_csv": ([_export(n) for n in nights], lambda b: night_from_csv(b, profile=PROFILE)),
        "json": ([json.dumps(night_to_json(n)).encode() for n in nights], night_from_json),
    }
    back = night_from_csv(cases["profiled_csv"][0][0], profile=PROFILE)
    assert back.content_hash == nights[0].content_hash, "the profiled export does not read back"
    best = {name: (float("inf"), float("inf")) for name in cases}
    for _ in range(N_ROUNDS):  # the cases take turns, round by round
        for name, (blobs, read) in cases.items():
            wall, cpu = _round(blobs, read)
            best[name] = (min(best[name][0], wall), min(best[name][1], cpu))
    total = N_NIGHTS * N_EPOCHS
    figures: dict[str, float] = {}
    for name, (blobs, _) in cases.items():
        wall, cpu = best[name]
        figures[f"{name}_epochs_per_s"] = round(total / wall)
        figures[f"{name}_epochs_per_cpu_s"] = round(total / cpu)
        print(f"{name:13s}: {wall:.2f} s wall, {cpu:.2f} s CPU for {N_NIGHTS} nights "
              f"({sum(map(len, blobs)) / 1e6:.1f} MB), best of {N_ROUNDS}")
    ratios = {f"{name}_to_csv_ratio": round(figures[f"{name}_epochs_per_cpu_s"] / figures["csv_epochs_per_cpu_s"], 3)
              for name in ("profiled_csv", "json")}
    print("ratios (CPU rates): " + ", ".join(f"{k} {v:.2f}" for k, v in ratios.items()))
    print(f"end: {_load()}")
    load = os.getloadavg()
    print(json.dumps({**figures, **ratios, "nights": N_NIGHTS, "epochs_per_night": N_EPOCHS, "rounds": N_ROUNDS,
                      "load_average_1min": round(load[0], 2), "load_average_1min_at_start": round(start_load, 2),
                      "load_average_5min": round(load[1], 2), "cores": os.cpu_count()}))


if __name__ == "__main__":
    main()
