"""The client's recording methods against a live server, with the server's errors raised as typed errors."""

from __future__ import annotations

import io

import pandas as pd
import pytest
from test_api_recordings import hypnogram_csv, recording_csv, simulated, sqlite_world  # noqa: F401


def test_client_recording_methods_round_trip(sqlite_world, tmp_path) -> None:  # noqa: F811
    from service.client import NightbankClient
    from service.errors import NotFound, Unprocessable

    sim = simulated(5, seed=37, psg_nights=1)[0]
    token = sqlite_world.http.headers["Authorization"].split()[1]
    path = tmp_path / "recording.csv"
    path.write_bytes(recording_csv(sim.recording))
    with NightbankClient(sqlite_world.url, token=token) as nb:
        made = nb.push_recording("s1", "P-01", path)
        assert made["created"] and made["n_epochs"] == sim.recording.n_epochs
        rid = made["recording_id"]
        assert [r["recording_id"] for r in nb.list_recordings("s1", "P-01")] == [rid]
        assert nb.get_recording("s1", "P-01", rid)["source_name"] == "recording.csv"
        diary = nb.post_diary("s1", "P-01", rid, sim.diary_csv.encode())
        assert diary["diary_days"] == len(sim.diary)
        periods = nb.recording_periods("s1", "P-01", rid)
        assert {p["kind"] for p in periods} <= {"main", "nap"} and any(p["kind"] == "main" for p in periods)
        assert all(item["minutes"] > 0 for item in nb.recording_nonwear("s1", "P-01", rid))
        psg = sim.psg[0]
        placed = nb.post_reference("s1", "P-01", rid, hypnogram_csv(psg))
        assert abs(placed["clock_offset_s"] - psg.clock_offset_s) <= 30  # the simulator's offset, one epoch
        with pytest.raises(Unprocessable) as refused:
            nb.post_reference("s1", "P-01", rid, b"time,stage\n", clock_offset_s=0.0)
        assert refused.value.problems
        days = nb.recording_days("s1", "P-01", rid, method="sadeh")
        assert len(days["rows"]) == len(sim.days) and days["methods_used"] == ["sadeh"]
        exported = pd.read_csv(io.BytesIO(nb.export_days("s1", method="sadeh", participant="P-01")))
        assert list(exported["date"]) == [r["date"] for r in days["rows"]]
        assert nb.delete_recording("s1", "P-01", rid)["recording_id"] == rid
        with pytest.raises(NotFound):
            nb.get_recording("s1", "P-01", rid)
