"""The validation report's figures and tables as a PDF (matplotlib's PdfPages; no browser needed).

The same content as the HTML report in print form: a first page with the study, the research-use
caution, the protocol and the participant/night/epoch flow; one page of agreement tables per
parameter; the Bland-Altman plots with the participants told apart; the participant-level epoch
figures and the paired comparisons. File metadata carry no date, so the bytes depend on the data.
"""

from __future__ import annotations

import io
from typing import Any, cast

import matplotlib as mpl
import pandas as pd
from matplotlib.backends.backend_pdf import PdfPages
from matplotlib.figure import Figure
from sqlalchemy.orm import Session, sessionmaker

from ..results import reports
from ..results.agreement_stats import STATISTIC_PARAMETERS
from ..store import protocols, registry
from ..store.db import session_scope
from . import figures
from .report_figures import draw_paired_differences, draw_participant_epochs, draw_repeated_bland_altman
from .report_page import REPORT_METRICS, bland_altman_inputs, bound, report_methods
from .templating import CAUTIONS, method_label, number, parameter_label

__all__ = ["build_report_pdf"]

_A4 = (8.27, 11.69)


def _text_page(pdf: PdfPages, lines: list[str]) -> None:
    fig = Figure(figsize=_A4)
    fig.text(0.07, 0.95, "\n".join(lines), va="top", ha="left", fontsize=8.5, family="DejaVu Sans", wrap=True)
    pdf.savefig(fig)


def _table_page(pdf: PdfPages, title: str, header: list[str], rows: list[list[str]]) -> None:
    fig = Figure(figsize=(_A4[1], _A4[0]))  # landscape: the agreement tables are wide
    ax = fig.subplots()
    ax.set_axis_off()
    ax.set_title(title, loc="left")
    if rows:
        table = ax.table(cellText=rows, colLabels=header, loc="upper left", cellLoc="left")
        table.auto_set_font_size(False)
        table.set_fontsize(7.5)
        table.scale(1.0, 1.3)
    pdf.savefig(fig)


def _ci(entry: dict[str, Any], key: str) -> str:
    low, high = entry.get(key) or (None, None)
    return f"[{bound(low)}, {bound(high)}]"


def _agreement_rows(comparison: dict[str, Any], methods: list[str], parameter: str) -> list[list[str]]:
    repeated = {(r["method"], r["parameter"]): r for r in comparison.get("repeated_bland_altman", [])}
    icc = {(r["method"], r["parameter"]): r for r in comparison.get("icc", [])}
    equivalence = {(r["method"], r["parameter"]): r for r in comparison.get("equivalence", [])}
    rows = []
    for m in methods:
        r = repeated.get((m, parameter))
        if r is None:
            continue
        i, e = icc.get((m, parameter)) or {}, equivalence.get((m, parameter)) or {}
        rows.append([method_label(m), f"{r['n_participants']} / {r['n_nights']}",
                     f"{number(r['bias'])} {_ci(r, 'bias_ci')}", f"{number(r['loa_lower'])} {_ci(r, 'loa_lower_ci')}",
                     f"{number(r['loa_upper'])} {_ci(r, 'loa_upper_ci')}", number(i.get("icc"), 3),
                     ("yes" if e.get("equivalent") else "no") + f", p = {number(e.get('p_value'), 3)}" if e else "–"])
    return rows


def build_report_pdf(factory: sessionmaker[Session], *, study_id: str) -> bytes:
    """The validation report of a study as PDF bytes.

    Raises
    ------
    NotFound
        If the study does not exist.
    """
    with session_scope(factory) as session:
        study = registry.find_study(session, study_id)
        protocol = protocols.protocol_info(session, study).to_dict()
        participants = [p.participant_id for p in registry.study_participants(session, study=study)]
    comparison = reports.study_comparison(factory, study_id=study_id)
    methods = report_methods(comparison)
    buffer = io.BytesIO()
    with figures._LOCK, mpl.rc_context(cast(Any, figures._STYLE)):
        with PdfPages(buffer, metadata={"Title": f"Validation report, study {study_id}", "CreationDate": None,
                                        "Creator": "nightbank", "Producer": None}) as pdf:
            lines = [f"Validation report: {study.name} (study {study_id})", "",
                     "Research use only: research software, not a medical device; not for diagnosis or for "
                     "treatment decisions.", "", f"Protocol (fingerprint {protocol['fingerprint']}):"]
            lines += [f"  {k}: {v}" for k, v in protocol["protocol"].items()]
            lines += ["", "Participants, nights and epochs:"]
            lines += [f"  {f['participant_id']}: {f['n_nights']} nights, {f['n_labelled_nights']} labelled, "
                      f"{f['epochs_compared']} of {f['in_bed_epochs']} in-bed epochs compared "
                      f"({f['reference_unscored_epochs']} unscored in the reference, {f['epochs_without_counts']} "
                      "without counts)" for f in comparison.get("flow", [])]
            lines += ["", *CAUTIONS]
            _text_page(pdf, lines)
            header = ["method", "k / n", "bias [CI]", "lower limit [CI]", "upper limit [CI]", "ICC(A,1)",
                      "equivalent?"]
            for parameter in STATISTIC_PARAMETERS:
                _table_page(pdf, f"{parameter_label(parameter)}: method − PSG (nights nested in participants)",
                            header, _agreement_rows(comparison, methods, parameter))
            for method, pairs, stats in bland_altman_inputs(comparison, methods):
                fig = Figure(figsize=(8.0, 5.2), layout="constrained")
                draw_repeated_bland_altman(fig, method, pairs, stats, participants)
                pdf.savefig(fig)
            epochs = comparison.get("participant_epochs") or {}
            per, group = pd.DataFrame(epochs.get("participants", [])), pd.DataFrame(epochs.get("group", []))
            if not per.empty and not group.empty:
                shown = [m for m in methods if m in set(per["method"])]
                for metric in REPORT_METRICS:
                    fig = Figure(figsize=(7.0, 0.45 * len(shown) + 1.4), layout="constrained")
                    draw_participant_epochs(fig, per, group, methods=shown, metric=metric,
                                            participant_ids=participants)
                    pdf.savefig(fig)
            if comparison.get("paired_differences"):
                fig = Figure(figsize=(7.0, 0.5 * len(comparison["paired_differences"]) + 1.0), layout="constrained")
                draw_paired_differences(fig, comparison["paired_differences"])
                pdf.savefig(fig)
    return buffer.getvalue()
