"""Cold and warm parameter exports and study pages of a study of many short nights.

A SQLite file gets a simulated study (invented data): ``--nights`` (default 500) one-hour nights
(120 epochs of 30 s cut from ``models.simulate_cohort`` nights), 20 per participant, half of them
labelled; the pooled model and two personal models are trained in this process with
``--trials`` (default 2) trials each. The file is then copied once per code tree measured, and a
fresh process per copy (``nightbank`` imported from that tree, served by uvicorn on a loopback
port) times, over HTTP:

- ``export_cold_s``: the first CSV parameter export (nothing of it computed or stored yet), with
  ``export_first_byte_s`` (the first chunk of the body) and ``export_ms_per_night``;
- ``export_warm_s``: the same export again;
- ``page_cold_s`` and ``page_warm_s``: the study page (``/ui/studies/{study}``) after a server
  restart on a fresh copy (so the page computes its comparison cold), then again.

``--before ROOT`` measures another tree too (e.g. the main branch), on its own copy of the same
file, first; ``ratio_*`` are before / after. Both exports are checked to be the same bytes. The
machine is shared: the 1-minute load average is printed before and after each run. The last
printed line is one JSON object.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]
EPOCHS = 120
NIGHTS_EACH = 20
STUDY = "bulk"


def _load() -> float:
    return round(os.getloadavg()[0], 2)


def _one_hour(body: dict[str, Any]) -> dict[str, Any]:
    """The night's hour from 10 epochs before lights off, in bed for the 100 epochs after."""
    import pandas as pd

    start = pd.Timestamp(body["start"])
    first = int((pd.Timestamp(body["lights_off"]) - start) / pd.Timedelta(seconds=30))
    begin = max(0, first - 10)
    begin = min(begin, len(body["counts"]) - EPOCHS)
    new_start = start + pd.Timedelta(seconds=30 * begin)
    out = dict(body, start=new_start.isoformat(), counts=body["counts"][begin:begin + EPOCHS],
               lights_off=(new_start + pd.Timedelta(seconds=300)).isoformat(),
               lights_on=(new_start + pd.Timedelta(seconds=30 * (EPOCHS - 10))).isoformat())
    if body.get("reference") is not None:
        out["reference"] = body["reference"][begin:begin + EPOCHS]
    return out


def build(path: Path, *, n_nights: int, n_trials: int) -> str:
    """The study in a fresh SQLite file at ``path``; returns an admin token."""
    from models import CohortSpec, night_to_json, simulate_cohort
    from service.config import Settings
    from service.jobs.training import queue_training
    from service.jobs.workers import Worker
    from service.store.db import make_engine, make_session_factory, session_scope
    from service.store.schema import upgrade
    from service.store.tokens import create_token

    # the queue is not prepared after training: the export measured next must find nothing of it stored
    settings = Settings(db=f"sqlite:///{path}", n_trials=n_trials, port=_free_port(), prepare_review_queue=False)
    upgrade(settings)
    engine = make_engine(settings)
    factory = make_session_factory(engine)
    with session_scope(factory, write=True) as session:
        token = create_token(session, role="admin")[1]
    n_participants = max(1, -(-n_nights // NIGHTS_EACH))
    spec = CohortSpec(n_participants=n_participants, nights_min=NIGHTS_EACH, nights_max=NIGHTS_EACH,
                      labelled_share=0.5, few_labels_participants=0, artefacts=False, id_prefix="B")
    bodies = [(s.night.participant_id, _one_hour(night_to_json(s.night))) for s in simulate_cohort(spec, seed=5)]
    _ingest(settings, token, bodies[:n_nights])
    pids = sorted({pid for pid, _ in bodies[:n_nights]})
    for pid in (None, *pids[:2]):
        queue_training(factory, study_id=STUDY, participant_id=pid, params={"n_trials": n_trials}, actor="bench")
        job = Worker(settings, factory=factory).run_once()
        assert job is not None
    engine.dispose()
    return token


def _ingest(settings: Any, token: str, bodies: list[tuple[str, dict[str, Any]]]) -> None:
    import httpx

    with _serving(settings) as base, httpx.Client(base_url=base, headers={"Authorization": f"Bearer {token}"},
                                                  timeout=120) as http:
        http.post("/v1/studies", json={"study_id": STUDY, "name": "bulk (simulated)"}).raise_for_status()
        for pid, body in bodies:
            http.post(f"/v1/studies/{STUDY}/participants/{pid}/nights", json=body).raise_for_status()


class _serving:  # noqa: N801  (a context manager used like a function)
    def __init__(self, settings: Any) -> None:
        import threading

        import uvicorn

        from service.app import create_app

        self.server = uvicorn.Server(uvicorn.Config(create_app(settings), host="127.0.0.1", port=settings.port,
                                                    access_log=False, log_level="warning", lifespan="on"))
        self.thread = threading.Thread(target=self.server.run, daemon=True)
        self.base = f"http://127.0.0.1:{settings.port}"

    def __enter__(self) -> str:
        self.thread.start()
        while not self.server.started:
            time.sleep(0.02)
        return self.base

    def __exit__(self, *exc: object) -> None:
        self.server.should_exit = True
        self.thread.join(30)


def _free_port() -> int:
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _timed_export(http: Any) -> tuple[float, float, bytes]:
    t0 = time.perf_counter()
    first = None
    chunks = []
    with http.stream("GET", f"/v1/studies/{STUDY}/exports/parameters", params={"format": "csv"}) as r:
        r.raise_for_status()
        for chunk in r.iter_raw():
            if first is None and chunk:
                first = time.perf_counter() - t0
            chunks.append(chunk)
    return time.perf_counter() - t0, first or 0.0, b"".join(chunks)


def measure(db_path: Path, token: str, out: Path) -> None:
    """One tree's figures on the file at ``db_path`` (run in a fresh process with that tree first on the path)."""
    import httpx

    from service.config import Settings

    figures: dict[str, Any] = {"load_before": _load()}
    page_copy = db_path.with_name(db_path.stem + "-page.db")
    shutil.copy(db_path, page_copy)
    headers = {"Authorization": f"Bearer {token}"}
    settings = Settings(db=f"sqlite:///{db_path}", port=_free_port())
    with _serving(settings) as base, httpx.Client(base_url=base, headers=headers, timeout=900) as http:
        cold, first, body = _timed_export(http)
        warm, _, again = _timed_export(http)
    n_nights = len({line.split(b",")[2] for line in body.splitlines()[1:]})
    figures |= {"export_cold_s": round(cold, 2), "export_first_byte_s": round(first, 2),
                "export_warm_s": round(warm, 2), "export_ms_per_night": round(1000 * cold / max(n_nights, 1), 1),
                "export_bytes": len(body), "export_same_bytes_warm": body == again, "nights": n_nights}
    settings = Settings(db=f"sqlite:///{page_copy}", port=_free_port())
    with _serving(settings) as base, httpx.Client(base_url=base, cookies={"nightbank_ui": token},
                                                  timeout=900) as http:
        times = []
        for _ in range(2):
            t0 = time.perf_counter()
            http.get(f"/ui/studies/{STUDY}").raise_for_status()
            times.append(time.perf_counter() - t0)
    figures |= {"page_cold_s": round(times[0], 2), "page_warm_s": round(times[1], 3), "load_after": _load()}
    (out / "export.csv").write_bytes(body)
    (out / "figures.json").write_text(json.dumps(figures))


def _run_tree(tree: Path, source: Path, token: str, work: Path) -> dict[str, Any]:
    own = work / tree.name
    own.mkdir()
    db_path = own / "study.db"
    shutil.copy(source, db_path)
    env = {**os.environ, "PYTHONPATH": str(tree), "NIGHTBANK_LOG_LEVEL": "WARNING"}
    subprocess.run([sys.executable, __file__, "--measure", str(db_path), "--token", token, "--out", str(own)],
                   check=True, env=env, cwd=tree)
    figures = json.loads((own / "figures.json").read_text())
    print(f"{tree}: {figures}", flush=True)
    return figures


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--nights", type=int, default=500)
    parser.add_argument("--trials", type=int, default=2)
    parser.add_argument("--before", type=Path, help="another code tree to measure first (e.g. /work/main)")
    parser.add_argument("--measure", type=Path, help=argparse.SUPPRESS)
    parser.add_argument("--token", help=argparse.SUPPRESS)
    parser.add_argument("--out", type=Path, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.measure is not None:
        sys.path.insert(0, os.getcwd())
        measure(args.measure, args.token, args.out)
        return
    sys.path.insert(0, str(ROOT))
    work = Path(tempfile.mkdtemp(prefix="nightbank-exports-"))
    try:
        t0 = time.perf_counter()
        source = work / "source.db"
        token = build(source, n_nights=args.nights, n_trials=args.trials)
        print(f"built {args.nights} nights in {time.perf_counter() - t0:.0f} s (load {_load()})", flush=True)
        result: dict[str, Any] = {"nights": args.nights, "trials": args.trials, "cpu_count": os.cpu_count()}
        if args.before is not None:
            before = _run_tree(args.before.resolve(), source, token, work)
            result |= {f"before_{k}": v for k, v in before.items()}
        after = _run_tree(ROOT, source, token, work)
        result |= after
        if args.before is not None:
            same = ((work / args.before.resolve().name / "export.csv").read_bytes()
                    == (work / ROOT.name / "export.csv").read_bytes())
            result["same_export_bytes_as_before"] = same
            for k in ("export_cold_s", "export_first_byte_s", "export_warm_s", "page_cold_s", "page_warm_s"):
                if after.get(k):
                    result[f"ratio_{k}"] = round(before[k] / after[k], 1)
    finally:
        shutil.rmtree(work, ignore_errors=True)
    print(json.dumps(result))


if __name__ == "__main__":
    main()
