"""The review page in Chromium (Playwright) against the real service in a uvicorn subprocess.

Nights without PSG of the simulated demo study are marked with the mouse and the keyboard; the
parameters shown must be the service's for exactly the marks made, the review must be stored as
marked, and a second reviewer must see nothing of the first review until both are in. Every tab is
checked for console errors (the ``tab`` fixture).
"""

from __future__ import annotations

import re

import numpy as np
import pytest
from harness import bearer
from ui_support import STUDY, browser, site, tab  # noqa: F401

pytestmark = pytest.mark.slow

#: Geometry of the figure's drawing (static/review_figure.js): viewBox width and the plot's left edge.
VIEW_WIDTH, PLOT_LEFT, PLOT_RIGHT = 1200, 118, 14
PARAMETERS = ("sol_min", "tst_min", "waso_min", "awakenings", "sleep_efficiency_pct")
_UNLABELLED_FIELDS = """() => Array.from(document.querySelectorAll("input, select, textarea"))
  .filter(c => c.type !== "hidden" && c.labels.length === 0).map(c => c.id || c.name)"""


@pytest.fixture(scope="module")
def queued(site):  # noqa: F811
    """Three more nights without PSG (participant GW-04) and two reviewer tokens; returns the nights' ids."""
    import httpx

    from models import demo_nights, night_to_json
    from service.store.db import make_engine, make_session_factory, session_scope
    from service.store.tokens import create_token

    engine = make_engine(site.settings)
    with session_scope(make_session_factory(engine), write=True) as session:
        for name in ("reader1", "reader2"):
            site.tokens[name] = create_token(session, role="reviewer", study_id=STUDY, label=f"{name} of the lab",
                                             actor="test")[1]
    engine.dispose()
    admin = bearer(site.tokens["admin"])
    ids = []
    with httpx.Client(base_url=site.url, timeout=120) as http:
        for sim in demo_nights():
            if sim.night.participant_id == "GW-04" and sim.night.reference is None and len(ids) < 3:
                r = http.post(f"/v1/studies/{STUDY}/participants/GW-04/nights", json=night_to_json(sim.night),
                              headers=admin)
                assert r.status_code == 201, r.text
                ids.append(r.json()["night_id"])
    return ids


def _api(site, token: str, method: str, path: str, **kwargs):  # noqa: F811
    import httpx

    r = httpx.request(method, site.url + path, headers=bearer(site.tokens[token]), timeout=120, **kwargs)
    assert r.status_code < 300, r.text
    return r.json()


def _night_api(night_id: str) -> str:
    return f"/v1/studies/{STUDY}/participants/GW-04/nights/{night_id}"


def _open(tab, who: str, night_id: str):  # noqa: F811
    t = tab(who)
    t.page.set_default_timeout(120_000)
    t.goto(f"/ui/studies/{STUDY}/participants/GW-04/nights/{night_id}/review")
    t.page.wait_for_selector("svg.review-svg")
    t.page.wait_for_selector("#preview-status[data-state=done]")
    return t


def _drag(t, first_epoch: int, last_epoch: int, n_epochs: int, key: str | None = None) -> None:
    """Press ``key`` (the mode), then drag from the middle of ``first_epoch`` to the middle of ``last_epoch``."""
    if key:
        t.page.keyboard.press(key)
    box = t.page.locator("svg.review-svg").bounding_box()
    scale = box["width"] / VIEW_WIDTH
    epoch_w = (VIEW_WIDTH - PLOT_LEFT - PLOT_RIGHT) / n_epochs

    def x(epoch: int) -> float:
        return box["x"] + (PLOT_LEFT + (epoch + 0.5) * epoch_w) * scale

    y = box["y"] + 60 * scale
    # the status of the previous preview still reads "done": mark it stale so that the wait below
    # waits for the preview this drag starts
    t.page.evaluate("document.getElementById('preview-status').setAttribute('data-state', 'stale')")
    t.page.mouse.move(x(first_epoch), y)
    t.page.mouse.down()
    t.page.mouse.move(x(last_epoch), y, steps=8)
    t.page.mouse.up()
    t.page.wait_for_selector("#preview-status[data-state=done]")


def _shown(t, column: str = "marked") -> dict[str, float]:
    out = {}
    for name in PARAMETERS:
        text = t.page.locator(f'#review-parameters tr[data-parameter="{name}"] td.{column}').inner_text()
        out[name] = float(text)
    return out


def _expected(preview: dict[str, float]) -> dict[str, float]:
    """The preview's parameters as the page prints them (one decimal)."""
    return {name: round(float(preview[name]), 1) for name in PARAMETERS}


def test_review_drag_marks_intervals_and_the_parameters_follow_the_service(tab, site, queued) -> None:  # noqa: F811
    night_id = queued[0]
    t = _open(tab, "reader1", night_id)
    context = _api(site, "reader1", "GET", _night_api(night_id) + "/review-context")
    n, (first, stop) = len(context["counts"]), context["in_bed"]
    assert t.page.evaluate(_UNLABELLED_FIELDS) == []  # WCAG 2.1 SC 1.3.1: every field has a label
    assert _shown(t) == _expected(context["parameters"])

    start = first + (stop - first) // 3
    wake = {"start_epoch": start, "end_epoch": start + 40}
    _drag(t, start, start + 39, n)
    items = t.page.locator("#mark-list li")
    assert items.count() == 1 and f"epochs {start}–{start + 39}" in items.first.inner_text()
    assert items.first.inner_text().startswith("wake:")
    # without a rest-interval mark the page judges the recorded in-bed period it outlines
    in_bed = {"start_epoch": first, "end_epoch": stop}
    preview = _api(site, "reader1", "POST", _night_api(night_id) + "/reviews/preview",
                   json={"wake_intervals": [wake], "rest_interval": in_bed})
    assert _shown(t) == _expected(preview["parameters"])
    # TST counts the in-bed sleep epochs (common practice): wake marks take away the sleep epochs they cover
    turned = sum(1 for c in context["calls"][wake["start_epoch"]:wake["end_epoch"]] if c == 1)
    assert turned > 0
    assert preview["parameters"]["tst_min"] == pytest.approx(
        context["parameters"]["tst_min"] - turned * context["epoch_seconds"] / 60)

    sleep = {"start_epoch": start + 100, "end_epoch": start + 130}
    _drag(t, sleep["end_epoch"] - 1, sleep["start_epoch"], n, key="s")  # dragged right to left
    assert t.page.locator('input[name="mark-mode"][value="sleep"]').is_checked()
    assert items.count() == 2 and items.nth(1).inner_text().startswith("sleep:")
    both = _api(site, "reader1", "POST", _night_api(night_id) + "/reviews/preview",
                json={"wake_intervals": [wake], "sleep_intervals": [sleep], "rest_interval": in_bed})
    assert _shown(t) == _expected(both["parameters"])

    t.page.keyboard.press("u")
    t.page.wait_for_selector("#preview-status[data-state=done]")
    assert items.count() == 1 and _shown(t) == _expected(preview["parameters"])

    rest = {"start_epoch": first + 30, "end_epoch": stop - 30}
    _drag(t, rest["start_epoch"], rest["end_epoch"] - 1, n, key="r")
    assert items.nth(1).inner_text().startswith("rest interval:")
    with_rest = _api(site, "reader1", "POST", _night_api(night_id) + "/reviews/preview",
                     json={"wake_intervals": [wake], "rest_interval": rest})
    assert _shown(t) == _expected(with_rest["parameters"])
    t.shot("review-marked")

    t.page.locator("#review-note").fill("a long wake stretch after the first third")
    assert t.page.locator("#reviewer-name").input_value() == "reader1 of the lab"
    t.page.get_by_role("button", name="Submit review").click()
    t.page.wait_for_selector("#submit-status[data-state=submitted]", state="attached")
    assert t.page.locator("svg.review-svg.locked").count() == 1
    stored = _api(site, "reader1", "GET", _night_api(night_id) + "/reviews")
    (own,) = stored["data"]
    assert own["own"] and own["reviewer"] == "reader1 of the lab" and own["note"].startswith("a long wake")
    labels = np.array([np.nan if v is None else v for v in own["labels"]], dtype=float)
    assert np.all(labels[wake["start_epoch"]:wake["end_epoch"]] == 0)
    assert np.isnan(labels[:rest["start_epoch"]]).all() and np.isnan(labels[rest["end_epoch"]:]).all()
    assert own["parameters"]["tst_min"] == pytest.approx(with_rest["parameters"]["tst_min"])


def _strip(t, row: str) -> list[tuple[str, str, str]]:
    rects = t.page.locator(f'g.strip[data-row="{row}"] rect')
    return [(rects.nth(i).get_attribute("class"), rects.nth(i).get_attribute("data-start"),
             rects.nth(i).get_attribute("data-end")) for i in range(rects.count())]


def _runs(labels: list) -> list[tuple[str, str, str]]:
    """The strip's rectangles for per-epoch labels: runs of sleep, wake and not judged (end exclusive)."""
    out: list[list] = []
    for i, v in enumerate(labels):
        kind = "sleep" if v == 1 else "wake" if v == 0 else "unjudged"
        if out and out[-1][0] == kind:
            out[-1][2] = i + 1
        else:
            out.append([kind, i, i + 1])
    return [(k, str(a), str(b)) for k, a, b in out]


def test_review_second_reader_sees_nothing_of_the_first_until_both_are_in(tab, site, queued) -> None:  # noqa: F811
    night_id = queued[1]
    first_reader = _open(tab, "reader1", night_id)
    context = _api(site, "reader1", "GET", _night_api(night_id) + "/review-context")
    n, (lo, hi) = len(context["counts"]), context["in_bed"]
    a_start = lo + (hi - lo) // 2
    _drag(first_reader, a_start, a_start + 59, n)
    first_reader.page.get_by_role("button", name="Submit review").click()
    first_reader.page.wait_for_selector("#submit-status[data-state=submitted]", state="attached")

    second = _open(tab, "reader2", night_id)
    second.page.wait_for_selector("#reviews-summary[data-count]")
    assert second.page.locator("#reviews-summary").get_attribute("data-needed") == "1"
    assert "reader1" not in second.page.content()
    assert second.page.locator('g.strip[data-row="review-a"]').count() == 0
    assert second.page.locator("#compare").count() == 0
    # nothing of the first review's marks: the model's calls over the in-bed period, as for a fresh night
    unmarked = [c if lo <= i < hi else None for i, c in enumerate(context["calls"])]
    assert _strip(second, "marked") == _runs(unmarked)
    assert _api(site, "reader2", "GET", _night_api(night_id) + "/reviews")["data"] == []

    analyst = _open(tab, "analyst", night_id)
    analyst.page.wait_for_selector("#reviews-summary[data-count]")
    assert analyst.page.locator("#compare").is_hidden()
    assert analyst.page.locator('g.strip[data-row="review-a"]').count() == 0

    b_start = a_start + 30
    _drag(second, b_start, b_start + 59, n)
    second.page.get_by_role("button", name="Submit review").click()
    second.page.wait_for_selector("#submit-status[data-state=submitted]", state="attached")

    analyst.page.reload()
    analyst.page.wait_for_selector("#compare:not([hidden])")
    state = _api(site, "analyst", "GET", _night_api(night_id) + "/reviews")
    a, b = state["data"]
    la = np.array([np.nan if v is None else v for v in a["labels"]], dtype=float)
    lb = np.array([np.nan if v is None else v for v in b["labels"]], dtype=float)
    both = ~np.isnan(la) & ~np.isnan(lb)
    differing = int((la[both] != lb[both]).sum())
    assert differing > 0
    summary = analyst.page.locator("#compare-summary").inner_text()
    assert summary.startswith(f"{differing} of {int(both.sum())} epochs")
    assert analyst.page.locator("svg rect.differ").count() == len(state["discrepancy"]["differing_intervals"])
    for name in PARAMETERS:
        row = analyst.page.locator(f'#compare-parameters tr[data-parameter="{name}"]')
        delta = float(b["parameters"][name]) - float(a["parameters"][name])
        assert float(row.locator("td.diff").inner_text()) == pytest.approx(round(delta, 1), abs=0.051)
    analyst.shot("review-compare")

    analyst.page.get_by_role("button", name=re.compile(f"Accept {a['reviewer']}")).click()
    analyst.page.wait_for_selector("#adjudication-status[data-state=stored]")
    settled = _api(site, "analyst", "GET", _night_api(night_id) + "/reviews")
    assert settled["status"] == "adjudicated" and settled["correction"]["accepted_review_id"] == a["review_id"]
    detail = _api(site, "analyst", "GET", _night_api(night_id), params={"epochs": "true"})
    assert detail["corrected"] == a["labels"]

    # the analyst's own correction: the second review's labels with one more stretch marked sleep
    analyst.page.select_option("#base-choice", "review-b")
    fix = (b_start, b_start + 20)
    analyst.page.locator('input[name="mark-mode"][value="sleep"]').check()  # the keys go to the focused list
    _drag(analyst, fix[0], fix[1] - 1, n)
    expected = [1 if fix[0] <= i < fix[1] else v for i, v in enumerate(b["labels"])]
    preview = _api(site, "analyst", "POST", _night_api(night_id) + "/reviews/preview", json={"labels": expected})
    assert _shown(analyst) == _expected(preview["parameters"])
    analyst.page.get_by_role("button", name="Store my marks as the correction").click()
    analyst.page.wait_for_selector("#adjudication-status[data-state=stored]")
    detail = _api(site, "analyst", "GET", _night_api(night_id), params={"epochs": "true"})
    assert detail["corrected"] == expected and detail["correction"]["adjudicated_by"]


def test_review_keys_n_and_p_walk_the_queue(tab, site, queued) -> None:  # noqa: F811
    order = [(row["participant_id"], row["night_id"])
             for row in _api(site, "reader2", "GET", f"/v1/studies/{STUDY}/review-queue")["data"]]
    assert len(order) >= 3
    pid, night_id = order[1]
    t = tab("reader2")
    t.goto(f"/ui/studies/{STUDY}/participants/{pid}/nights/{night_id}/review")
    t.page.wait_for_selector("svg.review-svg")
    t.page.keyboard.press("n")
    t.page.wait_for_url(f"**/participants/{order[2][0]}/nights/{order[2][1]}/review")
    t.page.wait_for_selector("svg.review-svg")
    t.page.keyboard.press("p")
    t.page.wait_for_url(f"**/participants/{pid}/nights/{night_id}/review")
    t.page.wait_for_selector("svg.review-svg")
    t.page.keyboard.press("p")
    t.page.wait_for_url(f"**/participants/{order[0][0]}/nights/{order[0][1]}/review")
    t.page.wait_for_selector("svg.review-svg")
    assert t.page.locator("#queue-previous").count() == 0  # the first night has no previous one


def test_review_marks_can_be_typed_as_clock_times(tab, site, queued) -> None:  # noqa: F811
    from datetime import datetime, timedelta

    night_id = queued[2]
    t = _open(tab, "reader2", night_id)
    context = _api(site, "reader2", "GET", _night_api(night_id) + "/review-context")
    start = datetime.fromisoformat(context["start"])
    frm = (start + timedelta(hours=2)).replace(second=0, microsecond=0)
    until = frm + timedelta(minutes=25)

    def epoch(at: datetime) -> int:
        return round((at - start).total_seconds() / context["epoch_seconds"])

    t.page.keyboard.press("s")
    t.page.locator("#mark-from").fill(frm.strftime("%H:%M"))
    t.page.locator("#mark-to").fill(until.strftime("%H:%M"))
    t.page.get_by_role("button", name="Add the mark").click()
    t.page.wait_for_selector("#mark-list li")
    t.page.wait_for_selector("#preview-status[data-state=done]")
    item = t.page.locator("#mark-list li").first.inner_text()
    assert item.startswith("sleep:") and f"epochs {epoch(frm)}–{epoch(until) - 1}" in item
    t.page.locator("#mark-from").fill(until.strftime("%H:%M"))
    t.page.locator("#mark-to").fill(frm.strftime("%H:%M"))
    t.page.get_by_role("button", name="Add the mark").click()
    assert t.page.locator("#mark-by-time-status[data-state=failed]").count() == 1
    assert t.page.locator("#mark-list li").count() == 1
