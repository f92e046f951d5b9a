"""The recording page in Chromium (Playwright) against the real service in a uvicorn subprocess.

One SIMULATED participant with a 10-day recording, its diary and one PSG night; no model is trained
(the day table then uses the stated rule). Screenshots go to test-artifacts/ui/.
"""

from __future__ import annotations

import io
import re
import xml.etree.ElementTree as ET
from collections.abc import Iterator
from typing import Any

import pandas as pd
import pytest
from harness import bearer, free_port, wait_for
from test_api_recordings import hypnogram_csv, recording_csv, simulated
from ui_support import Site, _serve, _stop, browser, tab  # noqa: F401

pytestmark = pytest.mark.slow
STUDY = "s1"
PID = "P-01"
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), section 5.2


@pytest.fixture(scope="module")
def site(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Site]:
    """The service with one simulated participant's recording, diary and PSG night."""
    import httpx

    from service.config import Settings
    from service.store.db import make_engine, make_session_factory, session_scope
    from service.store.schema import upgrade
    from service.store.tokens import create_token

    folder = tmp_path_factory.mktemp("ui-recordings")
    settings = Settings(db=f"sqlite:///{folder / 'nightbank.db'}", port=free_port(), job_workers=0,
                        log_level="WARNING")
    upgrade(settings)
    engine = make_engine(settings)
    tokens: dict[str, str] = {}
    with session_scope(make_session_factory(engine), write=True) as session:
        for name, role in (("admin", "admin"), ("analyst", "analyst"), ("ingest", "ingest")):
            tokens[name] = create_token(session, role=role, study_id=None if role == "admin" else STUDY,
                                        actor="test")[1]
    engine.dispose()
    server = _serve(settings, folder / "server.log")
    url = f"http://127.0.0.1:{settings.port}"
    try:
        with httpx.Client(base_url=url, timeout=120, headers=bearer(tokens["admin"])) as http:
            wait_for(lambda: _healthy(http), timeout_s=30, poll_s=0.1)
            assert http.post("/v1/studies", json={"study_id": STUDY, "name": "Recordings (SIMULATED)"}).status_code \
                == 201
            sim = simulated(10, seed=21, psg_nights=1)[0]
            base = f"/v1/studies/{STUDY}/participants/{PID}/recordings"
            rid = http.post(base, content=recording_csv(sim.recording),
                            headers={"Content-Type": "text/csv"}).raise_for_status().json()["recording_id"]
            http.post(f"{base}/{rid}/diary", content=sim.diary_csv.encode(),
                      headers={"Content-Type": "text/csv"}).raise_for_status()
            labelled = http.post(f"{base}/{rid}/reference", content=hypnogram_csv(sim.psg[0]),
                                 headers={"Content-Type": "text/csv"}).raise_for_status().json()["night_id"]
        yield Site(url=url, settings=settings, tokens=tokens, night_ids={"recording": [rid], "labelled": [labelled]})
    finally:
        _stop(server)


def _healthy(http: Any) -> bool:
    import httpx

    try:
        return http.get("/healthz").status_code == 200
    except httpx.TransportError:
        return False


def _download(t: Any, link: Any) -> bytes:
    with t.page.expect_download() as info:
        link.click()
    return open(info.value.path(), "rb").read()


def test_ui_recording_page_shows_days_periods_and_links_each_night(tab, site) -> None:  # noqa: F811
    rid = site.night_ids["recording"][0]
    t = tab("analyst")
    t.goto(f"/ui/studies/{STUDY}/participants/{PID}")
    t.page.locator("#recordings-list a").first.click()
    t.page.wait_for_load_state("networkidle")
    assert t.page.url.endswith(f"/recordings/{rid}")
    assert t.page.eval_on_selector("#recording-figure img", "i => i.complete && i.naturalWidth > 0")
    alt = t.page.get_attribute("#recording-figure img", "alt")
    assert re.search(r"over 1[01] days, one row per day", alt) and "1 PSG-labelled" in alt
    assert "Research software, not a medical device." in t.page.locator("footer").inner_text()
    assert "SIMULATED" in t.page.locator(".simulated").inner_text()
    rows = t.page.locator("#days-table tbody tr")
    assert rows.count() == 10
    assert t.page.locator("#days-table .flag", has_text="PSG").count() == 1
    t.shot("recording")

    csv = _download(t, t.page.get_by_role("link", name=re.compile("day table")))
    frame = pd.read_csv(io.BytesIO(csv))
    assert len(frame) == 10 and {"tst_min", "sleep_efficiency_pct", "nonwear_min"} <= set(frame.columns)
    svg = _download(t, t.page.locator("#recording-figure .downloads a", has_text="SVG"))
    root = ET.fromstring(svg)
    links = [el.get("{http://www.w3.org/1999/xlink}href") or el.get("href")
             for el in root.iter() if el.tag.endswith("}a")]
    assert site.night_ids["labelled"][0] in " ".join(filter(None, links))  # each main period links to its night
    png = _download(t, t.page.locator("#recording-figure .downloads a", has_text="PNG"))
    assert png[:8] == PNG_SIGNATURE

    t.page.get_by_label("Each row starts at").select_option("midnight")
    t.page.get_by_role("button", name="Show").click()
    t.page.wait_for_url(re.compile(r".*day_start=midnight"))
    t.page.wait_for_load_state("networkidle")
    assert t.page.eval_on_selector("#recording-figure img", "i => i.complete && i.naturalWidth > 0")
    src = site.url + t.page.get_attribute("#recording-figure img", "src")
    assert "from midnight" in ET.tostring(ET.fromstring(t.page.request.get(src).body()), encoding="unicode")

    t.page.locator("#days-table tbody a").first.click()
    t.page.wait_for_load_state("networkidle")
    assert "/nights/" in t.page.url and t.page.locator("h1").inner_text().startswith("Night")
    t.page.locator("#recording-link").click()  # and back to the recording
    t.page.wait_for_load_state("networkidle")
    assert t.page.url.endswith(f"/recordings/{rid}")


def test_ui_recording_page_for_the_ingest_role_shows_the_recording_without_scores(tab, site) -> None:  # noqa: F811
    rid = site.night_ids["recording"][0]
    t = tab("ingest")
    t.goto(f"/ui/studies/{STUDY}/participants/{PID}/recordings/{rid}")
    t.page.wait_for_load_state("networkidle")
    assert t.page.eval_on_selector("#recording-figure img", "i => i.complete && i.naturalWidth > 0")
    assert "analyst role" in t.page.locator(".unavailable").inner_text()
    assert t.page.locator("#days-table").count() == 0
