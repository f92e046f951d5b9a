"""Exports of many nights are streamed and computed in bulk (real HTTP server, real SQLite file).

The evidence of streaming is the order of events: the first bytes of the export reach the client
before the last scoring row of the export is stored (each row's ``created_at`` is set when its
night is computed). An export made whole before sending would store every row first.
"""

from __future__ import annotations

import io
import json
from datetime import UTC, datetime

import pandas as pd
import pytest
from factories import make_night
from harness import bearer

N_NIGHTS = 60  # more than two chunks of the bulk scoring
RULES = ("cole-kripke", "cole-kripke+webster", "sadeh", "sadeh+webster", "count-threshold",
         "count-threshold+webster")


def _post_nights(http, admin, study: str, n: int = N_NIGHTS) -> list[tuple[str, str]]:
    from models import night_to_json

    ids = []
    for k in range(n):
        pid = f"P-{k % 3}"
        night = make_night(240, seed=k, stages=False, participant_id=pid,
                           start=(pd.Timestamp("2031-03-02T22:41:00+01:00") + pd.Timedelta(days=k)).isoformat())
        r = http.post(f"/v1/studies/{study}/participants/{pid}/nights", json=night_to_json(night), headers=admin)
        assert r.status_code == 201, r.text
        ids.append((pid, r.json()["night_id"]))
    return ids


def _stored_times(factory) -> list[datetime]:
    from sqlalchemy import select

    from service.store import db

    with db.session_scope(factory) as session:
        return [t if t.tzinfo else t.replace(tzinfo=UTC) for t in session.scalars(select(db.Scoring.created_at))]


@pytest.mark.slow
def test_export_streams_before_the_last_night_is_computed_and_a_second_export_is_the_same(
        http, server, study, admin, factory, make_token) -> None:
    from service.client import NightbankClient
    from service.results.scoring import score_night

    ids = _post_nights(http, admin, study)
    assert _stored_times(factory) == []  # nothing scored yet: the export computes every night
    with http.stream("GET", f"/v1/studies/{study}/exports/parameters", headers=admin) as response:
        assert response.status_code == 200 and response.headers["content-type"].startswith("text/csv")
        chunks = response.iter_bytes()
        first = next(chunks)
        first_at = datetime.now(UTC)
        body = first + b"".join(chunks)
    stored = _stored_times(factory)
    assert len(stored) == N_NIGHTS * len(RULES)  # every night and rule computed once and stored
    assert first_at < max(stored)  # the first bytes came before the last night was computed
    assert int(response.headers["X-Export-Rows"]) == len(body.splitlines()) - 1 == N_NIGHTS * len(RULES)
    assert int(response.headers["X-Export-Nights"]) == N_NIGHTS

    # the second export reads what the first stored: the same bytes, nothing computed again
    again = http.get(f"/v1/studies/{study}/exports/parameters", headers=admin)
    assert again.content == body and len(_stored_times(factory)) == len(stored)
    # each row is the night's scoring as the scoring route answers it (the single-night path)
    frame = pd.read_csv(io.BytesIO(body))
    pid, night_id = ids[7]
    for method in ("sadeh", "count-threshold+webster"):
        single = json.loads(score_night(factory, study_id=study, participant_id=pid, night_id=night_id,
                                        method=method))
        row = frame[(frame["night_id"] == night_id) & (frame["method"] == method)].iloc[0]
        assert row["tst_min"] == pytest.approx(single["parameters"]["tst_min"])
        assert row["waso_min"] == pytest.approx(single["parameters"]["waso_min"])

    # the client reads the stream and reports its progress against the announced total
    seen: list[tuple[int, int | None]] = []
    with NightbankClient(server.url, token=make_token("analyst", study), timeout_s=30) as client:
        assert client.export_parameters(study, progress=lambda done, total: seen.append((done, total))) == body
    assert seen[-1] == (N_NIGHTS * len(RULES), N_NIGHTS * len(RULES))


def test_bulk_scorings_are_the_bytes_score_night_computes(http, study, admin, factory) -> None:
    """Computed in bulk or one night at a time, a scoring's stored body is the same (rules; models: same path)."""
    from sqlalchemy import delete

    from service.results.bulk_scoring import bulk_scorings
    from service.results.scoring import score_night
    from service.store import db

    ids = _post_nights(http, admin, study, 5)
    single = {(pid, n): score_night(factory, study_id=study, participant_id=pid, night_id=n, method="sadeh+webster")
              for pid, n in ids}
    with db.session_scope(factory, write=True) as session:
        session.execute(delete(db.Scoring))
    chunks = list(bulk_scorings(factory, study_id=study, method="sadeh+webster", nights=ids + [("P-0", "f" * 20)],
                                chunk=2))
    assert [len(c) for c in chunks] == [2, 2, 2]
    found = {(pid, n): body for chunk in chunks for pid, n, body in chunk}
    assert all(found[k] == single[k] for k in ids)
    assert isinstance(found[("P-0", "f" * 20)], Exception)  # an unknown night gets score_night's error
    assert len(_stored_times(factory)) == len(ids)
    unknown = bearer("x")  # the route still refuses a token it does not know
    assert http.get(f"/v1/studies/{study}/exports/parameters", headers=unknown).status_code == 401


def test_parquet_exports_stream_row_groups_that_read_back_as_the_whole_table(http, study, admin, factory) -> None:
    """A Parquet export is one file of a row group per chunk; pyarrow reads it back as the whole table would be."""
    import pyarrow.parquet as pq

    from service.results.bulk_scoring import CHUNK_NIGHTS
    from service.results.exports import export_parameters

    _post_nights(http, admin, study)
    with http.stream("GET", f"/v1/studies/{study}/exports/parameters", params={"format": "parquet"},
                     headers=admin) as response:
        assert response.status_code == 200
        assert response.headers["content-type"].startswith("application/vnd.apache.parquet")
        parts = [bytes(chunk) for chunk in response.iter_raw() if chunk]
    body = b"".join(parts)
    assert len(parts) > 1 and parts[0][:4] == b"PAR1" and body[-4:] == b"PAR1"
    file = pq.ParquetFile(io.BytesIO(body))
    assert file.metadata.num_row_groups == -(-N_NIGHTS // CHUNK_NIGHTS)  # one per chunk of nights
    streamed = pd.read_parquet(io.BytesIO(body))
    # the export made whole (computed once by the stream above, read back now), written by pandas in one piece
    whole = pd.read_parquet(io.BytesIO(export_parameters(factory, study_id=study, fmt="parquet")))
    assert streamed.shape == whole.shape == (N_NIGHTS * len(RULES), whole.shape[1])

    def cells(frame: pd.DataFrame) -> pd.DataFrame:  # missing as None: an all-missing text column has no type
        return frame.astype(object).where(frame.notna(), None)

    pd.testing.assert_frame_equal(cells(streamed), cells(whole))
    for column in ("awakenings", "epoch_seconds"):  # the nullable integers come back as such
        assert str(streamed[column].dtype) == "Int64"
