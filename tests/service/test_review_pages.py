"""Review pages without a browser: the queue page's HTML, the review page's data, and the checks on
the pages' JSON posts (sign-in, form token, same site), over real HTTP against a real SQLite file.

No model is trained here: the nights are shown with the service's default classical scoring.
"""

from __future__ import annotations

import json
import re
from html import unescape

import httpx
import pytest
from harness import bearer, cohort_bodies

ROW = re.compile(r'<tr data-night-id="([0-9a-f]+)" data-status="([a-z_]+)">(.*?)</tr>', re.S)
VALUE = re.compile(r'<td data-value="([^"]*)">')
FORM_TOKEN = re.compile(r'name="csrf_token" value="([^"]*)"')
DATA = re.compile(r'<script type="application/json" id="review-data">(.*?)</script>', re.S)


@pytest.fixture
def nights(http, study, admin) -> dict[str, object]:
    """Two participants with two nights without PSG each, and one night with PSG (never queued)."""
    posted: dict[str, object] = {"unlabelled": {}, "labelled": [], "bodies": {}}
    for pid, bodies in cohort_bodies(n_participants=2, nights=2, seed=5).items():
        for full in bodies[:2]:
            body = {k: v for k, v in full.items() if k != "reference"}
            r = http.post(f"/v1/studies/{study}/participants/{pid}/nights", json=body, headers=admin)
            assert r.status_code == 201, r.text
            posted["unlabelled"][r.json()["night_id"]] = pid
            posted["bodies"][r.json()["night_id"]] = body
    for pid, bodies in cohort_bodies(n_participants=1, nights=1, seed=6).items():
        r = http.post(f"/v1/studies/{study}/participants/{pid}/nights", json=bodies[0], headers=admin)
        assert r.status_code == 201, r.text
        posted["labelled"].append(r.json()["night_id"])
        posted["labelled_pid"] = pid
    return posted


@pytest.fixture
def browser_like(server, study, make_token):
    """``browser_like(role)`` -> an httpx client carrying a signed-in page session of that role in the study."""
    opened: list[httpx.Client] = []

    def open_client(role: str = "reviewer", study_id: str | None = "s1") -> httpx.Client:
        token = make_token(role, study_id=study_id)
        client = httpx.Client(base_url=server.url, cookies={"nightbank_ui": token}, timeout=60)
        client.token = token  # type: ignore[attr-defined]
        opened.append(client)
        return client

    yield open_client
    for client in opened:
        client.close()


def _rows(html: str) -> list[tuple[str, str, float, str]]:
    """(night id, status, priority, row HTML) of each queue row, in page order."""
    out = []
    for night_id, status, cells in ROW.findall(html):
        values = VALUE.findall(cells)
        out.append((night_id, status, float(values[1]), cells))
    return out


def _review_path(study: str, pid: str, night_id: str) -> str:
    return f"/ui/studies/{study}/participants/{pid}/nights/{night_id}/review"


def test_queue_page_lists_every_night_without_psg_by_priority(browser_like, nights, http, study, admin) -> None:
    page = browser_like("reviewer").get(f"/ui/studies/{study}/review")
    assert page.status_code == 200, page.text
    rows = _rows(page.text)
    # the nights posted without PSG, each once; the night with PSG never
    assert sorted(r[0] for r in rows) == sorted(nights["unlabelled"])
    assert not set(nights["labelled"]) & {r[0] for r in rows}
    priorities = [r[2] for r in rows]
    assert priorities == sorted(priorities, reverse=True)
    api = http.get(f"/v1/studies/{study}/review-queue", headers=admin).json()
    assert [r[0] for r in rows] == [item["night_id"] for item in api["data"]]
    for (night_id, status, _, cells), item in zip(rows, api["data"], strict=True):
        assert status == item["status"] == "open"
        assert all(reason in unescape(cells) for reason in item["reasons"])
        assert f'href="{_review_path(study, nights["unlabelled"][night_id], night_id)}"' in cells
    text = unescape(page.text)
    assert "not a medical device" in text and "Not for diagnosis" in text
    assert f"{len(rows)} nights" in text


def test_queue_page_filters_by_review_state(browser_like, server, nights, study) -> None:
    client = browser_like("reviewer")
    night_id, pid = next(iter(nights["unlabelled"].items()))
    review = {"reviewer": "first reader", "wake_intervals": [], "sleep_intervals": [], "rest_interval": None}
    posted = client.post(f"{_review_path(study, pid, night_id)}/reviews.json", json=review,
                         headers={"X-Form-Token": FORM_TOKEN.findall(client.get(f"/ui/studies/{study}/review").text)[0],
                                  "Origin": server.url})
    assert posted.status_code == 201, posted.text
    in_review = _rows(client.get(f"/ui/studies/{study}/review", params={"status": "in_review"}).text)
    assert [(r[0], r[1]) for r in in_review] == [(night_id, "in_review")]
    still_open = _rows(client.get(f"/ui/studies/{study}/review", params={"status": "open"}).text)
    assert sorted(r[0] for r in still_open) == sorted(set(nights["unlabelled"]) - {night_id})
    assert client.get(f"/ui/studies/{study}/review", params={"status": "finished"}).status_code == 404


def test_queue_page_needs_sign_in_the_reviewer_role_and_the_study(browser_like, server, nights, study) -> None:
    with httpx.Client(base_url=server.url, timeout=30) as anonymous:
        r = anonymous.get(f"/ui/studies/{study}/review")
    assert r.status_code == 303 and r.headers["location"].startswith("/ui/signin?next=")
    ingest_client = browser_like("ingest")
    ingest = ingest_client.get(f"/ui/studies/{study}/review")
    assert ingest.status_code == 403 and "reviewer" in unescape(ingest.text)
    night_id, pid = next(iter(nights["unlabelled"].items()))
    assert ingest_client.get(_review_path(study, pid, night_id)).status_code == 403
    assert browser_like("admin", study_id="other").get(f"/ui/studies/{study}/review").status_code == 404


def test_review_page_carries_the_night_the_form_token_and_the_notice(browser_like, nights, study) -> None:
    client = browser_like("reviewer")
    night_id, pid = next(iter(nights["unlabelled"].items()))
    page = client.get(_review_path(study, pid, night_id))
    assert page.status_code == 200, page.text
    assert "script-src 'self'" in page.headers["content-security-policy"]
    data = json.loads(unescape(DATA.search(page.text).group(1)))
    posted = nights["bodies"][night_id]
    assert len(data["context"]["counts"]) == len(data["context"]["calls"]) == len(posted["counts"])
    assert data["form_token"] == FORM_TOKEN.findall(page.text)[0] and len(data["form_token"]) >= 32
    assert data["analyse"] is False
    assert 'id="compare"' not in page.text  # the comparison of two reviews is for analysts only
    text = unescape(page.text)
    assert "not a clinical sleep scoring" in text and "not a medical device" in text


def _page_token(client: httpx.Client, path: str) -> str:
    return json.loads(unescape(DATA.search(client.get(path).text).group(1)))["form_token"]


def test_review_posts_need_the_sessions_form_token_and_the_same_site(browser_like, server, nights, study, http,
                                                                      admin) -> None:
    client, other = browser_like("reviewer"), browser_like("reviewer")
    night_id, pid = next(iter(nights["unlabelled"].items()))
    path = _review_path(study, pid, night_id)
    own, foreign = _page_token(client, path), _page_token(other, path)
    assert own != foreign
    body = {"reviewer": "reader one", "wake_intervals": [{"start_epoch": 100, "end_epoch": 140}],
            "sleep_intervals": [], "rest_interval": None}
    same_site = {"Origin": server.url}
    for headers in ({}, {"X-Form-Token": foreign}, {"X-Form-Token": own, "Origin": "https://elsewhere.example"},
                    {"X-Form-Token": own, "Sec-Fetch-Site": "cross-site"}):
        for action in ("preview.json", "reviews.json", "adjudication.json"):
            r = client.post(f"{path}/{action}", json=body, headers={**same_site, **headers})
            assert r.status_code == 403, (action, headers, r.text)
            assert r.headers["content-type"].startswith("application/json")
    stored = http.get(f"/v1/studies/{study}/participants/{pid}/nights/{night_id}/reviews", headers=admin).json()
    assert stored["data"] == [] and stored["reviews_needed"] == 2
    preview = client.post(f"{path}/preview.json", json=body, headers={**same_site, "X-Form-Token": own})
    assert preview.status_code == 200, preview.text
    assert set(preview.json()["parameters"]) >= {"sol_min", "tst_min", "waso_min", "awakenings",
                                                 "sleep_efficiency_pct"}
    r = client.post(f"{path}/reviews.json", content=json.dumps(body), headers={
        **same_site, "X-Form-Token": own, "Content-Type": "text/plain"})
    assert r.status_code == 415 and "application/json" in r.json()["detail"]


def test_review_preview_equals_the_api_and_moves_tst_by_the_epochs_marked(browser_like, server, nights, study) -> None:
    client = browser_like("reviewer")
    night_id, pid = next(iter(nights["unlabelled"].items()))
    path = _review_path(study, pid, night_id)
    page = client.get(path)
    data = json.loads(unescape(DATA.search(page.text).group(1)))
    calls, (first, stop) = data["context"]["calls"], data["context"]["in_bed"]
    minutes = data["context"]["epoch_seconds"] / 60
    start = first + (stop - first) // 3
    wake = {"start_epoch": start, "end_epoch": start + 60}
    headers = {"Origin": server.url, "X-Form-Token": data["form_token"]}
    unmarked = client.post(f"{path}/preview.json", json={}, headers=headers).json()["parameters"]
    marked = client.post(f"{path}/preview.json", json={"wake_intervals": [wake]}, headers=headers).json()["parameters"]
    assert marked["tst_min"] < unmarked["tst_min"]
    api = httpx.post(f"{server.url}/v1/studies/{study}/participants/{pid}/nights/{night_id}/reviews/preview",
                     json={"wake_intervals": [wake]}, headers=bearer(client.token), timeout=60).json()["parameters"]
    assert marked == api
    # TST is the sleep epochs' time in bed (common practice): marking wake removes the sleep epochs marked
    turned = sum(1 for c in calls[wake["start_epoch"]:wake["end_epoch"]] if c == 1)
    assert turned > 0
    assert marked["tst_min"] == pytest.approx(unmarked["tst_min"] - turned * minutes)
    # no marks: the parameters of the scoring shown, over the in-bed period the page outlines
    in_bed = {"start_epoch": first, "end_epoch": stop}
    as_shown = client.post(f"{path}/preview.json", json={"rest_interval": in_bed}, headers=headers).json()
    assert as_shown["parameters"] == pytest.approx(
        {k: data["context"]["parameters"][k] for k in as_shown["parameters"]}, nan_ok=True)


def test_review_post_passes_on_the_services_refusal_naming_the_interval(browser_like, server, nights, study,
                                                                        http, admin) -> None:
    client = browser_like("reviewer")
    night_id, pid = next(iter(nights["unlabelled"].items()))
    path = _review_path(study, pid, night_id)
    n_epochs = len(nights["bodies"][night_id]["counts"])
    body = {"reviewer": "reader one", "wake_intervals": [{"start_epoch": 10, "end_epoch": 20},
                                                         {"start_epoch": 30, "end_epoch": n_epochs + 5}]}
    r = client.post(f"{path}/reviews.json", json=body, headers={"Origin": server.url,
                                                               "X-Form-Token": _page_token(client, path)})
    assert r.status_code == 422, r.text
    assert "wake_intervals[1]" in r.text and "wake_intervals[0]" not in r.text
    stored = http.get(f"/v1/studies/{study}/participants/{pid}/nights/{night_id}/reviews", headers=admin).json()
    assert stored["data"] == []


def test_review_page_of_a_night_with_psg_says_why_it_is_not_reviewed(browser_like, nights, study) -> None:
    client = browser_like("reviewer")
    night_id = nights["labelled"][0]
    page = client.get(_review_path(study, nights["labelled_pid"], night_id))
    assert page.status_code == 409, page.text
    assert "has a PSG reference" in unescape(page.text) and "not a medical device" in unescape(page.text)


def test_study_and_night_pages_link_to_the_review_pages(browser_like, nights, study) -> None:
    client = browser_like("analyst")
    assert f'href="/ui/studies/{study}/review"' in client.get(f"/ui/studies/{study}").text
    night_id, pid = next(iter(nights["unlabelled"].items()))
    night_page = client.get(f"/ui/studies/{study}/participants/{pid}/nights/{night_id}").text
    assert f'href="{_review_path(study, pid, night_id)}"' in night_page
    labelled = client.get(f"/ui/studies/{study}/participants/{nights['labelled_pid']}/nights/"
                          f"{nights['labelled'][0]}").text
    assert 'id="review-link"' not in labelled
    ingest = browser_like("ingest").get(f"/ui/studies/{study}").text
    assert 'id="review-queue-link"' not in ingest
