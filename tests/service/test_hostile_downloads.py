"""Downloads named after hostile labels, end to end over real HTTP: safe headers, figures and tables that render.

Nights are posted with labels in other scripts, with quotes, ``;``, ``=``, ``$`` and line breaks;
their figures (SVG, PNG) and tables (CSV) are downloaded from the pages and the
``Content-Disposition`` header is read with the standard library's e-mail header parser, which
implements RFC 2231 parameter values (the ``filename*`` form of RFC 6266 / RFC 5987).
"""

from __future__ import annotations

import csv
import io
import re
import xml.etree.ElementTree as ET
from email.parser import HeaderParser
from email.utils import collapse_rfc2231_value
from typing import Any

import pytest
from factories import night_json

LABELS = ["Nacht – Schlaf 睡眠 ночь ليلة", 'he said "hi"; x=1', "line one\nline two\r\nthree", '=HYPERLINK("x")',
          "cost $5 and $x^2$", r"$\nosuch{x}$ night", "../../etc/passwd", "tab\there"]
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"  # PNG specification, file signature


def _filenames(header: str) -> tuple[str, str]:
    """(ASCII fallback, full name) of a Content-Disposition value."""
    assert header.isascii() and "\n" not in header and "\r" not in header
    params = HeaderParser().parsestr(f"Content-Disposition: {header}\n\n").get_params(header="content-disposition")
    assert params[0][0] in ("attachment", "inline")
    plain = [v for k, v in params if k == "filename" and isinstance(v, str)]
    extended = [v for k, v in params if k == "filename" and isinstance(v, tuple)]
    assert len(plain) == 1 and len(extended) == 1, params
    assert extended[0][0].upper() == "UTF-8"
    return plain[0], collapse_rfc2231_value(extended[0])


@pytest.fixture
def nights(http: Any, admin: dict[str, str], study: str) -> dict[str, str]:
    out = {}
    for k, label in enumerate(LABELS):
        body = night_json(240, seed=k, label=label, start=f"2031-03-{k + 2:02d}T22:41:00+01:00")
        response = http.post("/v1/studies/s1/participants/P01/nights", json=body, headers=admin)
        assert response.status_code == 201, response.text
        out[label] = response.json()["night_id"]
    return out


def test_downloads_named_after_hostile_labels_have_safe_headers_and_render(http: Any, admin: dict[str, str],
                                                                          nights: dict[str, str]) -> None:
    cookie = {"Cookie": f"nightbank_ui={admin['Authorization'].split()[1]}"}
    for label, night_id in nights.items():
        base = f"/ui/studies/s1/participants/P01/nights/{night_id}"
        for path, kind in ((f"{base}/figure.svg?download=1", "svg"), (f"{base}/figure.png?download=1", "png"),
                           (f"{base}/parameters.csv", "csv")):
            response = http.get(path, headers=cookie)
            assert response.status_code == 200, (label, path, response.text[:200])
            plain, full = _filenames(response.headers["content-disposition"])
            assert plain.isascii() and '"' not in plain and plain.endswith(f".{kind}")
            assert full.endswith(f".{kind}") and "/" not in full and "\n" not in full and "\r" not in full
            pieces = [p for p in re.split(r"[\x00-\x1f/\\]+", label) if p]  # what a file name can keep (no separators)
            assert all(p in full for p in pieces), (label, full)
            if kind == "svg":
                ET.fromstring(response.content)
            elif kind == "png":
                assert response.content.startswith(PNG_MAGIC)
            else:
                rows = list(csv.reader(io.StringIO(response.text)))
                assert len(rows) > 1 and len({len(r) for r in rows}) == 1
        page = http.get(base, headers=cookie)
        assert page.status_code == 200
    assert http.get("/v1/studies/s1/participants", headers=admin).status_code == 200  # the connection still works


@pytest.mark.parametrize("fmt", ["svg", "png"])
def test_figures_with_night_labels_as_tick_labels_render_them_as_text(fmt: str) -> None:
    import pandas as pd

    from service.ui.figures import draw_held_out_nights, render

    table = pd.DataFrame({"night": LABELS, "method": "cole-kripke", "balanced_accuracy": 0.7, "specificity": 0.6})
    body = render(draw_held_out_nights, table, fmt=fmt, size_in=(7.0, 3.2))
    if fmt == "png":
        assert body.startswith(PNG_MAGIC)
    else:
        text = "".join(ET.fromstring(body).itertext())
        assert r"$\nosuch{x}$ night" in text and "cost $5 and $x^2$" in text  # as written, not as mathematics
