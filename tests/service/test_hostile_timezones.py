"""``tz`` takes IANA zone names only, over real HTTP: paths and the zone database's own files are unknown names.

A probe such as ``../../etc/passwd``, ``/etc/localtime`` or ``posixrules`` (a file of the zone
database that is not a zone) gets exactly the answer an unknown name gets, so the answer cannot
tell which files exist. Zone names: the IANA time zone database (``zoneinfo.available_timezones``).
"""

from __future__ import annotations

from typing import Any

import pandas as pd
from factories import make_night

NIGHTS = "/v1/studies/s1/participants/P01/nights"
PROBES = ["../../../../etc/passwd", "/etc/localtime", "/usr/share/zoneinfo/Europe/Oslo", "posixrules", "localtime",
          "zone.tab", "zone1970.tab", "tzdata.zi", "leapseconds", "Europe/../Europe/Oslo", "Europe//Oslo",
          "./UTC", "UTC/", "Europe\\Oslo", "Nowhere/Zone"]
#: with a NUL character: refused as such (nul_character), the same for a zone that exists and one that does not
NUL_PROBES = ["Europe/Oslo\x00", "Nowhere/Zone\x00", "/etc/localtime\x00"]


def _naive_csv() -> bytes:
    night = make_night(240)
    times = [t.tz_localize(None).isoformat() for t in pd.date_range(night.start, periods=240, freq="30s")]
    return pd.DataFrame({"time": times, "counts": night.counts}).to_csv(index=False).encode()


def _comparable(response: Any) -> tuple[int, Any]:
    body = response.json()
    return response.status_code, {k: v for k, v in body.items() if k not in ("instance", "request_id")}


def test_night_tz_probes_answer_like_an_unknown_name(http: Any, admin: dict[str, str], study: str) -> None:
    csv = {**admin, "content-type": "text/csv"}
    unknown = _comparable(http.post(NIGHTS, content=_naive_csv(), params={"tz": "Nowhere/Zone"}, headers=csv))
    assert unknown[0] == 422 and unknown[1]["problems"][0]["code"] == "unknown_time_zone"
    for probe in PROBES:
        assert _comparable(http.post(NIGHTS, content=_naive_csv(), params={"tz": probe}, headers=csv)) == unknown, \
            probe
    nul = [_comparable(http.post(NIGHTS, content=_naive_csv(), params={"tz": p}, headers=csv)) for p in NUL_PROBES]
    assert nul[0][0] == 422 and nul[0][1]["code"] == "nul_character" and all(a == nul[0] for a in nul)
    assert http.post(NIGHTS, content=_naive_csv(), params={"tz": "Europe/Oslo"}, headers=csv).status_code == 201


def test_profile_tz_probes_answer_like_an_unknown_name(http: Any, admin: dict[str, str], study: str) -> None:
    url = "/v1/studies/s1/import-profiles"
    unknown = _comparable(http.post(url, json={"name": "p", "tz": "Nowhere/Zone"}, headers=admin))
    assert unknown[0] == 422
    for probe in PROBES:
        assert _comparable(http.post(url, json={"name": "p", "tz": probe}, headers=admin)) == unknown, probe
    assert http.post(url, json={"name": "p", "tz": "America/Argentina/Buenos_Aires"}, headers=admin).status_code \
        == 201


def test_recording_tz_is_checked_before_it_is_stored(http: Any, admin: dict[str, str], study: str) -> None:
    from models import RecordingSpec, simulate_recordings

    sim = simulate_recordings(RecordingSpec(n_participants=1, n_days=3, psg_nights=0, id_prefix="P"), seed=3)[0]
    times = sim.recording.timestamps()
    body = pd.DataFrame({"time": [t.isoformat() for t in times],  # times with offsets: tz is not needed to read
                         "counts": sim.recording.counts}).to_csv(index=False, na_rep="").encode()
    url = "/v1/studies/s1/participants/P01/recordings"
    csv = {**admin, "content-type": "text/csv"}
    unknown = _comparable(http.post(url, content=body, params={"tz": "Nowhere/Zone"}, headers=csv))
    assert unknown[0] == 422
    for probe in ("posixrules", "../../etc/passwd", "/etc/localtime"):
        assert _comparable(http.post(url, content=body, params={"tz": probe}, headers=csv)) == unknown, probe
    assert http.get("/v1/studies/s1/participants", headers=admin).json()["count"] == 0
