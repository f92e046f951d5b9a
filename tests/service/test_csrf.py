"""Cross-site request forgery on the pages' forms, over real HTTP (the app served by uvicorn).

Every POST form carries a per-session form token; a post without it, with another session's, or
that the browser marks as coming from another site (``Origin``, ``Referer`` when there is no
``Origin``, ``Sec-Fetch-Site``) is refused with 403 and changes nothing. (Double-submit and
synchroniser tokens as described by the OWASP CSRF Prevention Cheat Sheet, from memory.)
"""

from __future__ import annotations

import re

import httpx
import pytest
from harness import cohort_bodies

FIELD = re.compile(r'name="csrf_token" value="([^"]*)"')


@pytest.fixture
def page_client(server, http, study, admin, make_token):
    """A browser-like client signed in with an analyst token of the study, and its participant page."""
    for pid, nights in cohort_bodies(n_participants=1, nights=3).items():
        for body in nights:
            assert http.post(f"/v1/studies/{study}/participants/{pid}/nights", json=body,
                             headers=admin).status_code == 201
    token = make_token("analyst", study_id=study)
    with httpx.Client(base_url=server.url, cookies={"nightbank_ui": token}, timeout=30) as client:
        yield client


def _jobs(http, admin, study: str) -> int:
    return http.get(f"/v1/studies/{study}/jobs", headers=admin).json()["count"]


def _form_token(client: httpx.Client, path: str) -> str:
    page = client.get(path)
    assert page.status_code == 200, page.text
    found = FIELD.findall(page.text)
    assert found and all(f == found[0] and len(f) >= 32 for f in found), found
    return found[0]


def test_training_form_needs_the_session_form_token(page_client, server, http, study, admin, make_token) -> None:
    path = f"/ui/studies/{study}/participants/P-01"
    action = f"{path}/training"
    own = {"Origin": server.url}
    assert page_client.post(action, data={"n_trials": "2"}, headers=own).status_code == 403
    other_session = _form_token(httpx.Client(base_url=server.url, cookies={
        "nightbank_ui": make_token("analyst", study_id=study)}), path)
    assert page_client.post(action, data={"n_trials": "2", "csrf_token": other_session},
                            headers=own).status_code == 403
    assert _jobs(http, admin, study) == 0
    token = _form_token(page_client, path)
    assert token != other_session
    done = page_client.post(action, data={"n_trials": "2", "csrf_token": token}, headers=own)
    assert done.status_code == 303 and "job=" in done.headers["location"]
    assert _jobs(http, admin, study) == 1


@pytest.mark.parametrize("headers", [
    {"Referer": "https://attacker.example/page"},          # no Origin, a cross-site Referer
    {"Sec-Fetch-Site": "cross-site"},                       # the browser says so (Fetch Metadata)
    {"Sec-Fetch-Site": "cross-site", "Origin": "null"},
    {"Origin": "https://attacker.example"},
], ids=["referer", "fetch-site", "fetch-site-null-origin", "origin"])
def test_cross_site_posts_are_refused_even_with_the_token(page_client, http, study, admin, headers) -> None:
    path = f"/ui/studies/{study}/participants/P-01"
    token = _form_token(page_client, path)
    r = page_client.post(f"{path}/training", data={"n_trials": "2", "csrf_token": token}, headers=headers)
    assert r.status_code == 403 and ("another site" in r.text or "own pages" in r.text), r.text
    assert _jobs(http, admin, study) == 0
    # the same post from the page itself (same-origin Referer, no Origin) goes through
    ok = page_client.post(f"{path}/training", data={"n_trials": "2", "csrf_token": token},
                          headers={"Referer": f"{page_client.base_url}{path}", "Sec-Fetch-Site": "same-origin"})
    assert ok.status_code == 303, ok.text


def test_sign_out_needs_the_token_and_sign_in_refuses_other_sites(server, make_token) -> None:
    token = make_token("admin")
    with httpx.Client(base_url=server.url, timeout=30) as browser:
        assert FIELD.findall(browser.get("/ui/signin").text) == []  # no session yet: nothing to bind a token to
        assert browser.post("/ui/signin", data={"token": token, "next": ""},
                            headers={"Sec-Fetch-Site": "cross-site"}).status_code == 403
        assert browser.post("/ui/signin", data={"token": token, "next": ""},
                            headers={"Referer": "http://attacker.example/"}).status_code == 403
        assert "nightbank_ui" not in browser.cookies
        signed = browser.post("/ui/signin", data={"token": token, "next": ""}, headers={"Origin": server.url})
        assert signed.status_code == 303 and browser.cookies.get("nightbank_ui") == token
        session_form = _form_token(browser, "/ui/studies")  # the sign-out form of every page
        assert browser.post("/ui/signout").status_code == 403
        assert browser.post("/ui/signout", data={"csrf_token": session_form[::-1]}).status_code == 403
        out = browser.post("/ui/signout", data={"csrf_token": session_form})
        assert out.status_code == 303 and out.headers["location"] == "/ui/signin"
