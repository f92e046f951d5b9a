"""Web pages end to end: Chromium (Playwright) against the real service in a uvicorn subprocess.

The service holds three participants of the simulated demo study; the pooled model and one
personal model are trained before the tests (few Optuna trials), a second personal model is
trained through the page's button. Screenshots go to test-artifacts/ui/.
"""

from __future__ import annotations

import io
import json
import re
import xml.etree.ElementTree as ET

import numpy as np
import pytest
from agreement_formulas import ba2007_limits
from harness import bearer
from ui_support import FEW_LABELS, STUDY, TRAINED, UNTRAINED, browser, site, tab  # noqa: F401

pytestmark = pytest.mark.slow

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), section 5.2


def _analyst(tab):  # noqa: F811
    """A tab of the analyst token that waits long enough for a first comparison (computed on first view: the
    repeated-measures statistics fit one mixed model per method and parameter)."""
    t = tab("analyst")
    t.page.set_default_timeout(120_000)
    t.page.set_default_navigation_timeout(120_000)
    return t


def _night_path(site, pid: str, k: int = 0) -> str:  # noqa: F811
    return f"/ui/studies/{STUDY}/participants/{pid}/nights/{site.night_ids[pid][k]}"


def _download(t, link):
    with t.page.expect_download() as info:
        link.click()
    return info.value


def _check_svg(data: bytes) -> ET.Element:
    root = ET.fromstring(data)
    assert root.tag == "{http://www.w3.org/2000/svg}svg"
    return root


def _check_png(data: bytes) -> np.ndarray:
    import matplotlib.image as mpimg

    assert data[:8] == PNG_SIGNATURE
    pixels = mpimg.imread(io.BytesIO(data), format="png")
    assert pixels.ndim == 3 and pixels.shape[0] > 300 and pixels.shape[1] > 300
    return pixels


def _image_loaded(t, selector: str) -> bool:
    return bool(t.page.eval_on_selector(selector, "img => img.complete && img.naturalWidth > 0"))


_UNLABELLED = """() => {
  const bad = [];
  document.querySelectorAll("img").forEach(i => { if (!i.alt.trim()) bad.push("image " + i.src); });
  document.querySelectorAll("figure").forEach(f => { if (!f.querySelector("figcaption")) bad.push("figure " + f.id); });
  document.querySelectorAll("input:not([type=hidden]), select, textarea").forEach(c => {
    if (c.labels.length === 0) bad.push("field " + (c.name || c.id));
  });
  return bad;
}"""


def _check_accessible(t) -> None:
    """Every image has a text alternative, every figure a caption, every form field a label (WCAG 2.1
    success criteria 1.1.1 and 1.3.1)."""
    t.page.wait_for_load_state("networkidle")
    assert t.page.evaluate(_UNLABELLED) == []
    broken = t.page.evaluate("() => Array.from(document.images).filter(i => !i.complete || !i.naturalWidth)"
                             ".map(i => i.src)")
    assert broken == []


def test_ui_sign_in_keeps_the_token_in_a_strict_http_only_cookie(tab, site) -> None:  # noqa: F811
    t = tab(None)
    t.goto(f"/ui/studies/{STUDY}")
    assert t.page.url.startswith(f"{site.url}/ui/signin")
    t.page.get_by_label("Access token").fill("nb_000000000000_wrong")
    t.page.get_by_role("button", name="Sign in").click()
    assert t.page.get_by_role("alert").inner_text().startswith("That token is not valid")
    assert t.errors == ["Failed to load resource: the server responded with a status of 401 (Unauthorized)"]
    t.errors.clear()
    t.page.get_by_label("Access token").fill(site.tokens["analyst"])
    t.page.get_by_role("button", name="Sign in").click()
    t.page.wait_for_url(f"{site.url}/ui/studies/{STUDY}")
    (cookie,) = t.context.cookies()
    assert cookie["httpOnly"] is True and cookie["sameSite"] == "Strict" and cookie["path"] == "/ui"
    assert t.page.evaluate("document.cookie") == ""  # invisible to page scripts
    footer = t.page.locator("footer").inner_text()
    assert "not a medical device" in footer and "Not for diagnosis" in footer
    assert "SIMULATED" in t.page.locator(".simulated").inner_text()
    t.shot("study-analyst")
    t.page.get_by_role("button", name="Sign out").click()
    t.page.wait_for_url(f"{site.url}/ui/signin")
    assert t.context.cookies() == []


def test_ui_night_page_draws_the_night_and_compares_methods(tab, site) -> None:  # noqa: F811
    import pandas as pd

    from models import demo_nights

    t = _analyst(tab)
    t.goto(_night_path(site, TRAINED))
    select = t.page.get_by_label("Method shown")
    options = select.locator("option").all_inner_texts()
    assert len(options) == 7 and not any("not trained" in o for o in options)
    select.select_option("sadeh")
    t.page.get_by_role("button", name="Show").click()
    t.page.wait_for_url(re.compile(r".*method=sadeh"))
    assert _image_loaded(t, "#night-figure img")
    alt = t.page.get_attribute("#night-figure img", "alt")
    assert "hypnogram" in alt and "Sadeh" in alt and re.search(r"\d+ of \d+ scored in-bed epochs", alt)
    table = t.page.locator("#parameter-table")
    headers = table.locator("thead th").all_inner_texts()
    assert headers[:2] == ["Parameter", "PSG reference"] and {"Sadeh", "personal", "pooled"} <= set(headers)
    assert "trained on this night" in t.page.locator("#agreement-table").inner_text()  # personal: not held out
    _check_accessible(t)
    t.shot("night-sadeh")

    svg = _download(t, t.page.locator("#night-figure .downloads a", has_text="SVG"))
    assert svg.suggested_filename.endswith(".svg")
    root = _check_svg(open(svg.path(), "rb").read())
    assert any("clock time" in (el.text or "") for el in root.iter())  # axis labels are text, not paths
    png = _download(t, t.page.locator("#night-figure .downloads a", has_text="PNG"))
    _check_png(open(png.path(), "rb").read())

    csv = _download(t, t.page.get_by_role("link", name=re.compile("parameter table")))
    frame = pd.read_csv(csv.path(), index_col="parameter")
    # TST of the reference is its count of sleep epochs in bed times the epoch length (AASM
    # definition of total sleep time; computed here from the raw stage labels, common practice).
    night = next(s.night for s in demo_nights() if s.night.participant_id == TRAINED)
    first, stop = night.in_bed
    asleep = np.isin(night.reference[first:stop], ["N1", "N2", "N3", "R"]).sum()
    assert frame.loc["tst_min", "reference"] == pytest.approx(asleep * night.epoch_seconds / 60)
    assert {"reference", "cole-kripke", "sadeh", "count-threshold", "personal", "pooled"} <= set(frame.columns)


def test_ui_participant_page_lists_nights_versions_and_cards(tab, site) -> None:  # noqa: F811
    import httpx

    t = _analyst(tab)
    t.goto(f"/ui/studies/{STUDY}/participants/{TRAINED}")
    rows = t.page.locator("#nights-table tbody tr")
    assert rows.count() == len(site.night_ids[TRAINED])
    assert t.page.locator("#versions-table tbody tr.active").count() == 1
    assert "Chosen method" in t.page.locator("#choice").inner_text()
    _check_accessible(t)
    t.shot("participant-trained")
    card = _download(t, t.page.locator("#versions-table a", has_text="JSON").first)
    body = json.loads(open(card.path(), encoding="utf-8").read())
    with httpx.Client(base_url=site.url) as http:
        stored = http.get(f"/v1/studies/{STUDY}/participants/{TRAINED}/models",
                          headers=bearer(site.tokens["analyst"])).json()[0]
    assert body["threshold"]["p_sleep"] == pytest.approx(stored["threshold"])
    assert body["data"]["training_nights"] == stored["n_training_nights"]
    assert any("Not for diagnosis" in c for c in body["cautions"])
    markdown = open(_download(t, t.page.locator("#versions-table a", has_text="Markdown").first).path(),
                    encoding="utf-8").read()
    assert markdown.startswith("# Model card") and "## Validation" in markdown and "## Intended use" in markdown


def test_ui_participant_page_compares_methods_on_held_out_nights(tab, site) -> None:  # noqa: F811
    import pandas as pd
    from scipy.stats import mannwhitneyu

    from models import demo_nights, score_with_rule

    t = _analyst(tab)
    t.goto(f"/ui/studies/{STUDY}/participants/{TRAINED}")
    methods = t.page.locator("#method-summary tbody td:first-child").all_inner_texts()
    assert methods[:7] == ["personal", "pooled", "pooled + offset", "auto (as deployed)", "Cole-Kripke", "Sadeh",
                           "count threshold"]
    assert _image_loaded(t, "#held-out-figure img") and _image_loaded(t, "#roc-figure img")
    csv = _download(t, t.page.get_by_role("link", name=re.compile("per-night comparison")))
    frame = pd.read_csv(csv.path())
    assert frame.groupby("method").size().min() == len(site.night_ids[TRAINED])
    # ROC AUC equals the Mann-Whitney U statistic over (sleep, wake) epoch pairs divided by their number
    # (Hanley & McNeil 1982, Radiology 143:29-36), computed with scipy on the rule's pooled in-bed epochs.
    scores, labels = [], []
    for sim in demo_nights():
        night = sim.night
        if night.participant_id == TRAINED and night.reference is not None:
            first, stop = night.in_bed
            ref = night.reference_sleep()[first:stop]
            score = score_with_rule(night.counts, night.epoch_seconds, "sadeh").score[first:stop]
            keep = np.isfinite(ref)
            scores.append(score[keep])
            labels.append(ref[keep])
    score, label = np.concatenate(scores), np.concatenate(labels)
    u = mannwhitneyu(score[label == 1], score[label == 0]).statistic
    auc = u / ((label == 1).sum() * (label == 0).sum())
    assert f"Sadeh AUC {auc:.3f}" in t.page.get_attribute("#roc-figure img", "alt")
    png = t.context.request.get(site.url + t.page.get_attribute("#roc-figure img", "src").replace(".svg", ".png"))
    _check_png(png.body())


def test_ui_train_button_follows_the_job_to_completion(tab, site) -> None:  # noqa: F811
    t = _analyst(tab)
    t.goto(f"/ui/studies/{STUDY}/participants/{UNTRAINED}")
    assert "No personal model yet" in t.page.locator("#versions-h + *").inner_text()
    t.page.get_by_label("Hyper-parameter trials per search").fill("2")
    t.page.get_by_role("button", name="Train a personal model").click()
    t.page.wait_for_url(re.compile(r".*\?job=[0-9a-f]{32}"))
    assert t.page.locator("#job-progress").is_visible()
    t.page.wait_for_url(re.compile(r".*done=[0-9a-f]{32}"), timeout=240_000)
    assert "succeeded" in t.page.locator("#training").inner_text()
    assert t.page.locator("#versions-table tbody tr.active").count() == 1
    t.shot("participant-after-training")


def test_ui_study_page_sorts_participants(tab, site) -> None:  # noqa: F811
    import pandas as pd

    t = _analyst(tab)
    t.goto(f"/ui/studies/{STUDY}")
    table = t.page.locator("#participants-table")
    assert table.locator("tbody tr").count() == 3
    button = table.get_by_role("button", name="Labelled nights")
    button.click()
    values = [int(v) for v in table.locator("tbody td:nth-child(3)").all_inner_texts()]
    assert values == sorted(values)
    button.click()
    values = [int(v) for v in table.locator("tbody td:nth-child(3)").all_inner_texts()]
    assert values == sorted(values, reverse=True)
    assert table.locator("th[aria-sort=descending]").count() == 1
    csv = _download(t, t.page.get_by_role("link", name=re.compile("participant table")))
    frame = pd.read_csv(csv.path()).set_index("participant_id")
    assert sorted(frame.index) == sorted([TRAINED, UNTRAINED, FEW_LABELS])
    assert 0.5 < frame.loc[TRAINED, "personal_balanced_accuracy"] <= 1
    assert frame.loc[TRAINED, "gain_over_pooled"] == pytest.approx(
        frame.loc[TRAINED, "personal_balanced_accuracy"] - frame.loc[TRAINED, "pooled_balanced_accuracy"])
    _check_accessible(t)
    t.shot("study")


def test_ui_study_page_draws_bland_altman_with_bias_and_limits(tab, site) -> None:  # noqa: F811
    import pandas as pd

    t = _analyst(tab)
    t.goto(f"/ui/studies/{STUDY}")
    for method in ("personal", "pooled", "pooled+offset", "auto", "cole-kripke", "sadeh", "count-threshold"):
        assert _image_loaded(t, f"[id='bland-altman-{method}'] img"), method
    pairs = pd.read_csv(_download(t, t.page.get_by_role("link", name=re.compile("night parameters"))).path())
    stats = pd.read_csv(_download(t, t.page.get_by_role("link", name=re.compile("Bland-Altman table"))).path())
    # Bland & Altman 1986 (Lancet i:307-310): bias = mean of method - reference, limits = bias -/+ 1.96 SD
    # (SD with n - 1), here recomputed with numpy from the per-night values behind the plot.
    keys = ["participant_id", "night_id"]
    ref = pairs[pairs["method"] == "reference"].set_index(keys)["tst_min"]
    own = pairs[pairs["method"] == "sadeh"].set_index(keys)["tst_min"].reindex(ref.index)
    d = (own - ref).dropna().to_numpy()
    bias, sd = d.mean(), d.std(ddof=1)
    row = stats[(stats["method"] == "sadeh") & (stats["parameter"] == "tst_min")].iloc[0]
    assert row["n"] == d.size and row["bias"] == pytest.approx(bias)
    assert row["loa_lower"] == pytest.approx(bias - 1.96 * sd) and row["loa_upper"] == pytest.approx(bias + 1.96 * sd)
    caption = t.page.locator("[id='bland-altman-sadeh'] figcaption").inner_text()
    # the figures draw the limits over nights nested in participants (Bland & Altman 2007) with their CIs
    pids = ref.index.get_level_values(0).to_numpy()
    both = np.isfinite((own - ref).to_numpy())
    _, low, high = ba2007_limits((own - ref).to_numpy()[both], pids[both])
    k = len(set(pids[both]))
    assert f"TST (min): bias {bias:.1f} [{low:.1f}, {high:.1f}], n = {d.size} nights of k = {k}; CIs: bias (CI" \
        in caption
    svg = _download(t, t.page.locator("[id='bland-altman-sadeh'] .downloads a", has_text="SVG"))
    texts = " ".join(el.text or "" for el in _check_svg(open(svg.path(), "rb").read()).iter())
    assert f"bias {bias:.1f}" in texts  # the numbers are printed in the figure itself
    t.shot("study-bland-altman")


def test_ui_token_of_another_study_sees_nothing(tab, site) -> None:  # noqa: F811
    import httpx

    t = tab("other")
    t.goto("/ui/studies")
    assert "No study is visible" in t.page.locator("main").inner_text()
    paths = [f"/ui/studies/{STUDY}", f"/ui/studies/{STUDY}/participants/{TRAINED}", _night_path(site, TRAINED),
             _night_path(site, TRAINED) + "/figure.svg", f"/ui/studies/{STUDY}/participants.csv"]
    for path in paths:
        assert t.goto(path).status == 404, path
    t.errors.clear()  # the browser logs each 404 it was sent to
    cookies = {"nightbank_ui": site.tokens["other"]}
    with httpx.Client(base_url=site.url, cookies=cookies) as http:
        assert http.post(f"/ui/studies/{STUDY}/participants/{UNTRAINED}/training").status_code == 404


def test_ui_ingest_role_sees_recordings_but_not_models(tab, site) -> None:  # noqa: F811
    import httpx

    t = tab("ingest")
    t.goto(f"/ui/studies/{STUDY}/participants/{TRAINED}")
    assert "need the analyst role" in t.page.locator("main").inner_text()
    assert t.page.get_by_role("button", name=re.compile("Train")).count() == 0
    t.goto(_night_path(site, TRAINED))
    assert _image_loaded(t, "#night-figure img")
    with httpx.Client(base_url=site.url, cookies={"nightbank_ui": site.tokens["ingest"]}) as http:
        r = http.post(f"/ui/studies/{STUDY}/participants/{TRAINED}/training")
        assert r.status_code == 403
        page = http.get(f"/ui/studies/{STUDY}")
        assert "script-src 'self'" in page.headers["content-security-policy"]
        assert "<script>" not in page.text and " style=" not in page.text  # no inline script or style


def test_ui_participants_table_fits_a_1400_px_window(browser, site) -> None:  # noqa: F811
    context = browser.new_context(viewport={"width": 1400, "height": 900})
    try:
        page = context.new_page()
        errors: list[str] = []
        page.on("console", lambda msg: errors.append(msg.text) if msg.type == "error" else None)
        page.goto(f"{site.url}/ui/signin")
        page.get_by_label("Access token").fill(site.tokens["analyst"])
        page.get_by_role("button", name="Sign in").click()
        page.goto(f"{site.url}/ui/studies/{STUDY}")
        page.wait_for_load_state("networkidle")
        # nothing sticks out of the window sideways (CSSOM View: scrollWidth of the document <= its width)
        assert page.evaluate("() => document.documentElement.scrollWidth <= window.innerWidth")
        box = page.evaluate("""() => { const t = document.querySelector('#participants-table');
            const r = t.getBoundingClientRect(); const s = t.closest('.scroll').getBoundingClientRect();
            return {right: r.right, scrollRight: s.right, width: window.innerWidth}; }""")
        assert box["scrollRight"] <= box["width"]  # the table's scroll area stays inside the window
        assert box["right"] <= box["scrollRight"] + 1  # every column shows without scrolling sideways
        page.screenshot(path=str(_artifact("study-1400.png")), full_page=True)
        assert errors == []
    finally:
        context.close()


def _artifact(name: str):
    from ui_support import ARTIFACTS

    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    return ARTIFACTS / name


def test_ui_downloaded_png_keeps_legends_and_labels_inside(tab, site) -> None:  # noqa: F811
    t = _analyst(tab)
    for path in (f"/ui/studies/{STUDY}/figures/bland-altman-sadeh.png",
                 f"/ui/studies/{STUDY}/participants/{TRAINED}/figures/held-out.png"):
        pixels = _check_png(t.context.request.get(site.url + path).body())
        rgb = pixels[..., :3]
        # the saved area is the drawn area plus a margin: the outermost rows and columns are blank paper
        # (white), so no legend, tick label or text was cut at the border
        for edge in (rgb[:4], rgb[-4:], rgb[:, :4], rgb[:, -4:]):
            assert edge.min() > 0.95, path


def test_ui_pages_show_parameter_agreement_with_cis_the_choice_and_the_report(tab, site, tmp_path) -> None:  # noqa: F811
    t = _analyst(tab)
    t.goto(f"/ui/studies/{STUDY}/participants/{TRAINED}")
    table = t.page.locator("#parameter-agreement")
    methods = set(table.locator("tbody td:first-child").all_inner_texts())
    assert {"personal", "pooled + offset", "auto (as deployed)", "Sadeh"} <= methods
    assert re.search(r"-?\d+\.\d \[", table.locator("tbody td:nth-child(4)").first.inner_text())
    choice = t.page.locator("#choice").inner_text()
    assert "Evidence:" in choice and "auto" in choice
    _check_accessible(t)
    t.shot("participant-parameters")
    t.goto(f"/ui/studies/{STUDY}")
    repeated = t.page.locator("#repeated-bland-altman-table tbody tr")
    assert repeated.count() >= 5
    sadeh = repeated.filter(has_text="Sadeh").first  # a rule: every participant's nights, so the CI exists
    assert re.search(r"\[-?\d+\.\d, -?\d+\.\d\]", sadeh.locator("td:nth-child(5)").inner_text())
    assert "Under the study protocol: WASO to lights on" in t.page.locator(".protocol-note").first.inner_text()
    report = _download(t, t.page.get_by_role("link", name=re.compile("validation report")))
    html = open(report.path(), encoding="utf-8").read()
    assert "<svg" in html and "not a medical device" in html and TRAINED in html
    saved = tmp_path / "report.html"
    saved.write_text(html, encoding="utf-8")
    t.page.goto(saved.as_uri())  # opened from disk, as a reader would: no console errors
    t.page.wait_for_load_state("networkidle")
    assert t.page.locator("svg").count() >= 4
    t.shot("report")


def test_ui_night_page_shows_the_models_intervals_beside_its_parameters(tab, site) -> None:  # noqa: F811
    import httpx

    t = _analyst(tab)
    night_id = site.night_ids[TRAINED][0]
    t.goto(_night_path(site, TRAINED) + "?method=personal")
    with httpx.Client(base_url=site.url, timeout=120) as http:
        body = http.get(f"/v1/studies/{STUDY}/participants/{TRAINED}/nights/{night_id}/scoring",
                        params={"method": "personal"}, headers=bearer(site.tokens["analyst"])).json()
    assert body["intervals"] is not None
    rows = t.page.locator("#interval-table tbody tr")
    assert rows.count() == len(body["intervals"]) == 5
    for k in range(rows.count()):
        row = rows.nth(k)
        low, high = body["intervals"][row.get_attribute("data-parameter")]
        assert row.get_attribute("data-low") == str(low) and row.get_attribute("data-high") == str(high)
        assert row.locator("td.low").inner_text() == ("–" if low is None else f"{low:.1f}")
        assert row.locator("svg.whisker").is_visible()
    level = f"{body['interval_level'] * 100:.0f}%"
    assert level in t.page.locator("#interval-table caption").inner_text()
    assert t.page.locator("#parameter-table span.interval").count() >= 5  # beside the values, per model
    assert "posterior" in t.page.get_attribute("#night-figure img", "alt")
    _check_accessible(t)
    t.shot("night-intervals")


def test_ui_participant_page_shows_the_calibration_of_the_active_models(tab, site) -> None:  # noqa: F811
    t = _analyst(tab)
    t.goto(f"/ui/studies/{STUDY}/participants/{TRAINED}")
    table = t.page.locator("#calibration-table")
    assert table.locator("tbody tr").count() == 2  # the personal and the pooled model
    card = _download(t, t.page.locator("#versions-table tr.active a", has_text="JSON"))
    calibration = json.loads(open(card.path(), encoding="utf-8").read())["calibration"]
    row = table.locator("tbody tr", has_text="personal")
    assert row.locator("td.brier-raw").inner_text() == f"{calibration['brier_raw']:.4f}"
    assert row.locator("td.brier-calibrated").inner_text() == f"{calibration['brier_calibrated']:.4f}"
    assert _image_loaded(t, "#reliability-figure img")
    assert t.page.locator("#interval-coverage tbody tr").count() >= 5
    _check_accessible(t)
    t.shot("participant-calibration")
