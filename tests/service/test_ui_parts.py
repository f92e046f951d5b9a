"""Pieces of the web pages that need no browser: redirects, figures and model cards."""

from __future__ import annotations

import xml.etree.ElementTree as ET
from datetime import UTC, datetime

import numpy as np
import pytest


@pytest.mark.parametrize("target", ["https://elsewhere.example/ui/studies", "//elsewhere.example/ui/", "/v1/studies",
                                    "/ui", "/ui\\..\\v1", "", None])
def test_safe_next_refuses_addresses_outside_the_pages(target) -> None:
    from service.ui.access import safe_next

    assert safe_next(target, "/ui/studies") == "/ui/studies"


def test_safe_next_keeps_a_page_address() -> None:
    from service.ui.access import safe_next

    page = "/ui/studies/s1/participants/P-01?job=1"
    assert safe_next(page, "/ui/studies") == page


def _svg_texts(data: bytes) -> list[str]:
    root = ET.fromstring(data)
    return [el.text.strip() for el in root.iter() if el.text and el.text.strip()]


def test_bland_altman_figure_prints_the_given_bias_and_limits_as_text() -> None:
    from service.ui.figures import draw_bland_altman, render

    rng = np.random.default_rng(3)
    reference = rng.normal(400.0, 30.0, 12)
    method = reference + rng.normal(-20.0, 10.0, 12)
    d = method - reference
    # Bland & Altman 1986: bias = mean difference, limits = bias -/+ 1.96 SD (n - 1)
    bias, sd = d.mean(), d.std(ddof=1)
    stats = {"tst_min": {"bias": bias, "loa_lower": bias - 1.96 * sd, "loa_upper": bias + 1.96 * sd, "n": 12}}
    svg = render(draw_bland_altman, "sadeh", {"tst_min": (method, reference)}, stats, fmt="svg", size_in=(7, 4))
    texts = _svg_texts(svg)
    assert f"bias {bias:.1f}" in texts
    assert f"+1.96 SD {bias + 1.96 * sd:.1f}" in texts and f"-1.96 SD {bias - 1.96 * sd:.1f}" in texts
    assert "method − PSG (min)" in texts and "TST (n = 12)" in texts


def test_figures_are_reproducible_byte_for_byte() -> None:
    from service.ui.figures import draw_roc, render

    x = np.linspace(0.0, 1.0, 30)
    curves = {"personal": (x, np.sqrt(x), 0.667), "sadeh": (x, x**0.8, 0.556)}
    for fmt in ("svg", "png"):
        assert render(draw_roc, curves, fmt=fmt, size_in=(4, 4)) == render(draw_roc, curves, fmt=fmt, size_in=(4, 4))


def test_model_card_markdown_says_what_the_json_says() -> None:
    from service.store.metadata import ModelMetadata
    from service.store.versions import VersionInfo
    from service.ui.cards import model_card, model_card_markdown

    info = {"metrics": {"n_nights": 3, "balanced_accuracy": {"mean": 0.8123, "sd": 0.0456},
                        "specificity": {"mean": 0.7011, "sd": None}},
            "threshold": 0.4321, "training_nights": [{"participant_id": "P-01", "night_id": "ab12", "label": "n1"}],
            "feature_set_version": "f1", "hyperparameters": {"max_depth": 3}, "library_versions": {"xgboost": "3"}}
    version = VersionInfo(pk=1, uid="u", kind="personal", version=2, active=True,
                          created_at=datetime(2031, 3, 2, tzinfo=UTC), job_id="j",
                          metadata=ModelMetadata.from_json(info))
    card = model_card(version, study_id="s1", participant_id="P-01",
                      choice={"method": "personal", "reason": "higher held-out balanced accuracy"})
    text = model_card_markdown(card)
    assert card["threshold"]["p_sleep"] == 0.4321 and "P(sleep) ≥ 0.432" in text
    assert "| balanced accuracy | 0.812 | 0.046 |" in text and "| specificity | 0.701 | – |" in text
    assert "higher held-out balanced accuracy" in text and "P-01 night ab12 (n1)" in text
    assert all(f"- {caution}" in text for caution in card["cautions"])
    assert any("not a medical device" in c for c in card["cautions"])


def test_bland_altman_panels_keep_tick_labels_apart() -> None:
    """In the small panels of the Bland-Altman figure no two tick labels of an axis overlap (their drawn
    extents, from matplotlib's renderer)."""
    import matplotlib as mpl
    import numpy as np
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    from service.ui import figures

    rng = np.random.default_rng(0)
    ref = {"sol_min": rng.uniform(0, 90, 30), "tst_min": rng.uniform(200, 480, 30),
           "waso_min": rng.uniform(5, 150, 30), "awakenings": rng.integers(0, 40, 30).astype(float),
           "sleep_efficiency_pct": rng.uniform(60, 99, 30)}
    pairs = {k: (v + rng.normal(0, 0.1 * (v.std() + 1), v.size), v) for k, v in ref.items()}
    stats = {k: {"bias": 1.0, "loa_lower": -5.0, "loa_upper": 7.0, "n": 30, "bias_ci": (0.0, 2.0)} for k in ref}
    with mpl.rc_context(figures._STYLE):  # the pages' own style: sizes as the pages draw them
        fig = Figure(figsize=(7.0, 4.8), layout="constrained")
        figures.draw_bland_altman(fig, "sadeh", pairs, stats)
        canvas = FigureCanvasAgg(fig)
        canvas.draw()
        renderer = canvas.get_renderer()
    drawn = [ax for ax in fig.axes if ax.axison]
    labels = {id(ax): [t.get_window_extent(renderer) for t in (*ax.get_xticklabels(), *ax.get_yticklabels())
                       if t.get_text() and t.get_visible()] for ax in drawn}
    for ax in drawn:
        ticks = [t.get_window_extent(renderer) for t in ax.get_xticklabels() if t.get_text() and t.get_visible()]
        for a, b in zip(ticks, ticks[1:], strict=False):
            assert not a.overlaps(b), (ax.get_title(), a, b)
        # the bias and limit values printed beside a panel stay clear of the neighbouring panels' tick labels
        for text in ax.texts:
            box = text.get_window_extent(renderer)
            for other in drawn:
                if other is not ax:
                    assert not any(box.overlaps(t) for t in labels[id(other)]), (ax.get_title(), text.get_text())


@pytest.mark.parametrize("n_nights", [3, 12, 40])
def test_held_out_figure_keeps_rotated_night_names_apart(n_nights: int) -> None:
    """Rotated tick labels do not touch when the gap between neighbouring labels, measured across their
    direction (tick spacing x sin(angle)), is at least the text's height (plane geometry)."""
    import math

    import matplotlib as mpl
    import numpy as np
    import pandas as pd
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    from service.ui import figures

    rng = np.random.default_rng(1)
    nights = [f"2031-03-{d % 28 + 1:02d} lab night {d}" for d in range(n_nights)]
    table = pd.DataFrame([{"night": n, "method": m, "balanced_accuracy": rng.uniform(0.5, 1),
                           "specificity": rng.uniform(0.3, 1)} for n in nights for m in ("personal", "sadeh")])
    width = max(5.5, min(7.0, 3.0 + 0.9 * n_nights))  # the page's size for this many nights
    with mpl.rc_context(figures._STYLE):
        fig = Figure(figsize=(width, 3.2), layout="constrained")
        figures.draw_held_out_nights(fig, table)
        canvas = FigureCanvasAgg(fig)
        canvas.draw()
    for ax in fig.axes:
        shown = [(tick, label) for tick, label in zip(ax.get_xticks(), ax.get_xticklabels(), strict=True)
                 if label.get_text()]
        x_in = [ax.transData.transform((tick, 0))[0] / fig.dpi for tick, _ in shown]
        angle = math.radians(shown[0][1].get_rotation())
        height_in = shown[0][1].get_fontsize() / 72
        gaps = np.diff(x_in[:-1]) * math.sin(angle)  # the last label (the mean) sits apart, after a rule
        assert (gaps >= height_in).all(), (n_nights, gaps.min(), height_in)


def test_model_card_states_the_calibration_it_is_given() -> None:
    """The card's calibration section: Brier scores and the reliability table as given (here computed with
    scikit-learn's brier_score_loss and calibration_curve on simulated probabilities), and a plain statement
    for a model without calibration."""
    import numpy as np
    from sklearn.calibration import calibration_curve
    from sklearn.metrics import brier_score_loss

    from service.store.metadata import ModelMetadata
    from service.store.versions import VersionInfo
    from service.ui.calibration_view import reliability_svg
    from service.ui.cards import model_card, model_card_markdown

    rng = np.random.default_rng(3)
    p = rng.uniform(0, 1, 400)
    y = (rng.uniform(0, 1, 400) < p ** 0.7).astype(int)  # simulated labels, miscalibrated on purpose
    observed, predicted = calibration_curve(y, p, n_bins=5)
    facts = {"method": "isotonic", "brier_raw": brier_score_loss(y, p), "brier_calibrated": 0.1234,
             "reliability": {"predicted": predicted.tolist(), "observed": observed.tolist(), "count": [80] * 5},
             "decoder": {"decoder": "hmm"}, "n_inner_nights": 3}
    info = {"metrics": {"n_nights": 3}, "threshold": 0.5, "training_nights": []}
    version = VersionInfo(pk=1, uid="u", kind="personal", version=1, active=True,
                          created_at=datetime(2031, 3, 2, tzinfo=UTC), job_id="j",
                          metadata=ModelMetadata.from_json(info))
    card = model_card(version, study_id="s1", participant_id="P-01", calibration=facts)
    text = model_card_markdown(card)
    assert card["calibration"] == facts
    assert f"| raw P(sleep) | {brier_score_loss(y, p):.3f} |" in text and "| calibrated P(sleep) | 0.123 |" in text
    assert all(f"| {a:.3f} | {b:.3f} | 80 |" in text for a, b in zip(predicted, observed, strict=True))
    assert "<svg" in (reliability_svg({"P-01 v1": facts}, salt="t") or "")
    assert reliability_svg({"none": {"reliability": {"predicted": [], "observed": [], "count": []}}},
                           salt="t") is None
    bare = model_card_markdown(model_card(version, study_id="s1", participant_id="P-01"))
    assert "## Calibration" in bare and "No calibration" in bare
