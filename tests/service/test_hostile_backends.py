"""One contract on SQLite and PostgreSQL: text fields checked before storage, NUL refused, same answers.

Every input below goes to a live server over each backend; the (status, code) of each answer must
be the one expected, so both backends answer alike, and none is a 5xx. PostgreSQL refuses NUL in
text and enforces column lengths that SQLite does not (PostgreSQL documentation, "Character
Types"; SQLite documentation, "Datatypes": a declared length is not enforced), which is why the
checks must run before storage.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest
from backends import BACKENDS, live_world
from factories import night_json

NIGHTS = "/v1/studies/s1/participants/P01/nights"
OVERLAP = {"allow_overlap": "true"}  # every night here starts at the same time
PROFILES = "/v1/studies/s1/import-profiles"
NUL = "\x00"


def _csv_with_label(label: str, *, extra: str | None = None) -> bytes:
    """A CSV night with a ``# label:`` line (and an ``extra`` column of ones, unused by the reader)."""
    night = night_json(240, seed=5)
    import pandas as pd

    times = pd.date_range(pd.Timestamp(night["start"]), periods=240, freq="30s")
    tail = "" if extra is None else ",1"
    rows = "\n".join(f"{t.isoformat()},{c}{tail}" for t, c in zip(times, night["counts"], strict=True))
    header = "time,counts" + ("" if extra is None else f",{extra}")
    return f"# label: {label}\n{header}\n{rows}\n".encode()


def _answers(http: Any) -> list[tuple[str, int, str | None]]:
    """(case, status, code) of every hostile input, after a valid night exists to patch."""
    night_id = http.post(NIGHTS, json=night_json(240, seed=1)).json()["night_id"]
    csv = {"content-type": "text/csv"}
    cases: list[tuple[str, Any]] = [
        ("label 201 chars", lambda: http.post(NIGHTS, json=night_json(240, seed=2, label="ж" * 201), params=OVERLAP)),
        ("label 200 chars", lambda: http.post(NIGHTS, json=night_json(240, seed=3, label="ж" * 200), params=OVERLAP)),
        ("label NUL", lambda: http.post(NIGHTS, json=night_json(240, seed=4, label=f"a{NUL}b"), params=OVERLAP)),
        ("csv label NUL", lambda: http.post(NIGHTS, content=_csv_with_label(f"x{NUL}y"), headers=csv,
                                                params=OVERLAP)),
        ("csv label 300 chars", lambda: http.post(NIGHTS, content=_csv_with_label("q" * 300), headers=csv,
                                                      params=OVERLAP)),
        ("source_name NUL", lambda: http.post(NIGHTS, json=night_json(240, seed=6),
                                              params={"source_name": f"f{NUL}.csv", **OVERLAP})),
        ("csv unused header NUL", lambda: http.post(NIGHTS, content=_csv_with_label("ok", extra=f"no{NUL}te"),
                                                    headers=csv, params=OVERLAP)),
        ("patch label NUL", lambda: http.patch(f"{NIGHTS}/{night_id}", json={"label": f"n{NUL}"})),
        ("patch label 201", lambda: http.patch(f"{NIGHTS}/{night_id}", json={"label": "x" * 201})),
        ("profile header NUL", lambda: http.post(PROFILES, json={"name": "p1", "columns": {"counts": f"a{NUL}"}})),
        ("profile code NUL", lambda: http.post(PROFILES, json={"name": "p2", "stage_codes": {f"1{NUL}": "W"}})),
        ("profile name NUL", lambda: http.post(PROFILES, json={"name": f"p{NUL}"})),
        ("study name NUL", lambda: http.post("/v1/studies", json={"study_id": "s2", "name": f"S{NUL}"})),
        ("token label NUL", lambda: http.post("/v1/tokens", json={"role": "ingest", "study_id": "s1",
                                                                  "label": f"t{NUL}"})),
        ("recording source_name NUL", lambda: http.post("/v1/studies/s1/participants/P02/recordings",
                                                        content=b"time,counts\n", headers=csv,
                                                        params={"source_name": f"r{NUL}"})),
    ]
    out = []
    for name, call in cases:
        response = call()
        code = response.json().get("code") if response.headers["content-type"].endswith("json") else None
        out.append((name, response.status_code, code))
    stored = http.get(NIGHTS).json()
    assert stored["count"] == 2  # the first night and the 200-character label
    assert {n["label"] for n in stored["data"]} == {None, "ж" * 200}
    return out


EXPECTED = [("label 201 chars", 422, "invalid_night"), ("label 200 chars", 201, None),
            ("label NUL", 422, "invalid_night"), ("csv label NUL", 422, "invalid_night"),
            ("csv label 300 chars", 422, "invalid_night"), ("source_name NUL", 422, "nul_character"),
            ("csv unused header NUL", 422, "invalid_night"),
            ("patch label NUL", 422, "invalid_request"), ("patch label 201", 422, "invalid_request"),
            ("profile header NUL", 422, "nul_character"), ("profile code NUL", 422, "nul_character"),
            ("profile name NUL", 422, "nul_character"), ("study name NUL", 422, "invalid_request"),
            ("token label NUL", 422, "invalid_request"), ("recording source_name NUL", 422, "nul_character")]


@pytest.mark.parametrize("backend", BACKENDS)
def test_text_fields_are_checked_before_storage_alike_on_every_backend(backend: str, tmp_path: Path) -> None:
    with live_world(backend, tmp_path) as world:
        assert _answers(world.http) == EXPECTED


@pytest.mark.postgres
def test_sqlite_and_postgresql_answer_the_same(tmp_path: Path) -> None:
    answers = []
    for backend in ("sqlite", "postgres"):
        (tmp_path / backend).mkdir()
        with live_world(backend, tmp_path / backend) as world:
            answers.append(_answers(world.http))
    assert answers[0] == answers[1]
