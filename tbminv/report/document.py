"""The shift report: one multi-page PDF, the per-advance table as CSV and the figures as PNG.

Pages, in order:

1. the answer (:mod:`tbminv.report.answer`): drive, shift, face chainage range and data
   quality; the level of concern and what changes where, how sure; the key figure
   (:func:`tbminv.plots.keyfigure.plot_key_figure`); the detection limit at the shift's noise
   (:func:`tbminv.studies.detectionlimit.detection_limit`); what would narrow the answer; the
   short cautions;
2. cautions in full (:mod:`tbminv.report.cautions`);
3. the moving section, the ahead profile and the data fit (figures);
4. changes ahead (every change, its reasons) and candidate materials (typeset table, with
   ranges and the table's source);
5. QC per advance, fit per advance and, where stored, the off-axis body per advance (typeset
   tables from :func:`tbminv.report.tables.advance_table`, also written as
   ``advances_<shift>.csv``);
6. appendix: settings as TOML text and provenance (input hashes, versions).

Every page's footer names the report, carries the caution and, when the store says the readings
were simulated (attribute ``synthetic``), "synthetic data".
"""

from __future__ import annotations

import logging
import math
from collections.abc import Mapping
from dataclasses import asdict
from pathlib import Path
from typing import Any

import matplotlib
import numpy as np
import xarray as xr
from matplotlib.backends.backend_pdf import PdfPages
from matplotlib.figure import Figure

import tbminv
from tbminv.cache import atomic_path
from tbminv.layout import Layout, layout_document
from tbminv.materials import HANDBOOK_TABLE, MaterialTable, classify_values
from tbminv.plots import section as figures
from tbminv.plots.keyfigure import plot_key_figure
from tbminv.plots.probes import draw_probes_on_profile, draw_probes_on_section
from tbminv.readings.probes import ProbeLog, probe_rows_text
from tbminv.report import answer, appendix, cautions, tables
from tbminv.report.pages import (
    BOTTOM,
    TOP,
    TextFlow,
    add_footers,
    figure_page,
    new_page,
    table_pages,
)
from tbminv.results.ahead import AheadSettings, AheadSummary, detect_changes
from tbminv.results.probecheck import check_probe_contacts, probe_materials_beyond
from tbminv.results.section import SectionError, machine_attrs
from tbminv.results.store import open_section
from tbminv.studies.detectionlimit import DetectionLimit, detection_limit

_LOG = logging.getLogger(__name__)

LEVEL_COLOURS = {"none seen": "0.35", "watch": "#8a6d00", "likely": "#b35900", "firm": "#a00000"}
"""Text colour of the level word on page 1 (the word itself carries the meaning)."""

PAGE_ONE_CLOSING = ("Read with the cautions (next page): electrical safety of the hardware is the "
                    "site's; the level words and thresholds are tool defaults to be set per "
                    "site.")
SHORT_CAUTION = ("An interpretation aid: not a substitute for probing ahead, site investigation "
                 "or licensed engineers; local codes rule; 'none seen' is not 'all clear'.")


def _shift_of_last(ds: xr.Dataset) -> str:
    return str(ds["shift"].values[-1])


def _materials(ds: xr.Dataset, summary: AheadSummary
               ) -> tuple[list[tuple[str, float, float | None]], list[list[str]]]:
    """Zones to classify (label, lo, hi) and zones not classified (rows)."""
    prof = figures.ahead_profile(ds)
    near = (prof["ahead_m"] >= 0) & (prof["ahead_m"] <= 3.0) & prof["covered"]
    vals: list[tuple[str, float, float | None]] = []
    if near.any():
        lo = float(np.nanmin(prof["lo_ohmm"][near]))
        hi = float(np.nanmax(prof["hi_ohmm"][near]))
        vals.append(("ground at the face (0-3 m ahead)", lo, hi if hi > lo else None))
    face = float(ds["face_chainage_m"].values[-1])
    unclassified: list[list[str]] = []
    for c in summary.changes:
        b = c.resistivity_beyond_ohmm
        if not np.isfinite(b):
            continue
        label = f"beyond chainage {c.chainage_m:.1f} m ({c.level})"
        if c.at_bound or c.contrast_open:
            # a contrast at (or open to) the fit's bound is a limit, not a value: naming a
            # material from it would state more than the data hold
            unclassified.append([label, f"{b:.3g} is the fit's bound, not a value",
                                 "not classified", "", ""])
            continue
        far = (prof["ahead_m"] >= c.chainage_hi_m - face + 1.0) & prof["covered"]
        if far.any():  # the band of the covered profile beyond the contact
            lo = float(np.nanmin(prof["lo_ohmm"][far]))
            hi = float(np.nanmax(prof["hi_ohmm"][far]))
            lo, hi = min(lo, b), max(hi, b)
            vals.append((label, lo, hi if hi > lo else None))
        else:
            vals.append((label + ", fitted value", b, None))
    return vals, unclassified


def _noise(table: Any, ds: xr.Dataset) -> float:
    """The shift's median relative error of one reading as inverted (NaN: not stored)."""
    v = table["qc_rel_error_median"].to_numpy(float)
    if np.isfinite(v).any():
        return float(np.nanmedian(v))
    if "contact_rel_error" in ds:
        e = ds["contact_rel_error"].values
        if np.isfinite(e).any():
            return float(np.nanmedian(e))
    return math.nan


def _limit(ds: xr.Dataset, noise_rel: float) -> tuple[DetectionLimit | None, str]:
    if not math.isfinite(noise_rel):
        return None, "the store holds no error of the readings"
    try:
        layout = Layout.from_dict(layout_document(str(ds.attrs.get("layout_text", ""))),
                                  "store layout")
        return detection_limit(layout, noise_rel), ""
    except Exception as exc:  # noqa: BLE001  (a report without the limit beats no report)
        _LOG.warning("detection limit not computed: %s", exc)
        return None, f"the store's layout cannot be studied: {str(exc).splitlines()[0][:120]}"


def _page_one(p1: answer.PageOne, synthetic: bool, draw_key: Any) -> list[Figure]:
    fig = new_page(p1.title)
    y = TOP + 0.01
    facts = TextFlow(p1.title, [fig], top=y)
    for line in p1.facts:
        facts.paragraph(line, size=9.5, indent=-0.01)
        facts.y += 0.3 * 0.024
    y = facts.y - 0.01
    fig.text(0.05, y, "level of concern:", fontsize=13, va="top", weight="bold")
    fig.text(0.225, y, p1.level.upper(), fontsize=13, va="top", weight="bold",
             color=LEVEL_COLOURS.get(p1.level, "k"))
    if synthetic:
        fig.text(0.95, y, "synthetic data", fontsize=11, va="top", ha="right",
                 weight="bold", bbox={"facecolor": "0.9", "edgecolor": "0.4", "lw": 0.6})
    y -= 0.04
    flow = TextFlow(p1.title, [fig], top=y)
    for line in p1.headline:
        flow.paragraph(line, size=9.5, weight="bold" if line is p1.headline[0] else "normal")
    flow.paragraph(p1.how_sure, size=8.5)
    tail = [p1.detection, p1.narrow, PAGE_ONE_CLOSING]
    need = sum(flow.height(t, size=8.5) for t in tail)
    y = flow.y - 0.005
    h = max(y - BOTTOM - need - 0.01, 0.30)
    bottom, height = y - h + 0.055, h - 0.085
    draw_key((fig.add_axes((0.07, bottom, 0.36, height)),
              fig.add_axes((0.50, bottom, 0.47, height))))
    flow.y = y - h - 0.005
    for t in tail:
        flow.paragraph(t, size=8.5)
    if len(flow.pages) > 1:
        _LOG.warning("page 1 ran over onto a second page")
    return flow.pages


def write_report(store_path: str | Path, out_dir: str | Path,
                 qc_summary: Mapping[str, Any] | None = None, *, shift: str | None = None,
                 material_table: MaterialTable | None = None,
                 ahead_settings: AheadSettings | None = None,
                 probes: ProbeLog | None = None) -> list[Path]:
    """Write the shift report of a section store.

    Parameters
    ----------
    store_path : str or Path
        Section store (NetCDF).
    out_dir : str or Path
        Output folder (created).
    qc_summary : mapping, optional
        The readings check's summary (``qc_summary.json``'s ``qc``): its ``[qc]`` settings go
        to the appendix, its error models fill the QC table of stores without per-advance QC.
    shift : str, optional
        Shift to report (default: the shift of the last advance in the store).
    material_table : MaterialTable, optional
        Site-calibrated table instead of the handbook one.
    ahead_settings : AheadSettings, optional
        Thresholds of the change detection.
    probes : ProbeLog, optional
        Probe log: drawn on the moving section and the ahead profile, listed and checked
        against the contact fit on a page of its own (:func:`_probe_pages`).

    Returns
    -------
    list of Path
        The report PDF first, then the per-advance CSV, then the figures as PNG (for vector
        figures use :func:`tbminv.plots.section.save_figure`).
    """
    store = Path(store_path)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    full = open_section(store)
    if full.sizes["advance"] == 0:
        raise SectionError(f"{store}: the store holds no advances")
    if "machine_diameter_m" not in full.attrs:   # stores whose layout text had `;` pairs
        full.attrs.update(machine_attrs(str(full.attrs.get("layout_text", ""))))
    shift = shift or _shift_of_last(full)
    in_shift = full["shift"].values.astype(str) == shift
    if not in_shift.any():
        raise SectionError(f"{store}: no advances of shift {shift!r}; shifts in the store: "
                           f"{sorted(set(full['shift'].values.astype(str)))}")
    last_adv = int(full["advance"].values[in_shift][-1])
    upto = full.sel(advance=full["advance"].values[full["advance"].values <= last_adv])
    ds = full.isel(advance=np.flatnonzero(in_shift))
    st = ahead_settings or AheadSettings()
    summary = detect_changes(upto, st)
    table = material_table or HANDBOOK_TABLE
    synthetic = bool(int(full.attrs.get("synthetic", 0) or 0)) or bool(
        "qc_synthetic" in ds and np.nansum(ds["qc_synthetic"].values) > 0)
    norm = figures.resistivity_norm(ds)
    safe = "".join(ch if ch.isalnum() or ch in "-_" else "_" for ch in shift)
    stem = out / f"shift_{safe}"

    adv_table = tables.advance_table(ds, qc_summary)
    limit, limit_note = _limit(full, _noise(adv_table, ds))
    mat_values, unclassified = _materials(upto, summary)
    mat_rows = tables.material_rows(mat_values, table) + unclassified
    n_cand = next((len(found) for label, _, _, found in classify_values(mat_values, table)
                   if label.startswith("beyond")), 0)
    p1 = answer.page_one(ds, shift, summary, adv_table, limit, n_candidates=n_cand,
                         limit_note=limit_note)
    recent = upto.sel(advance=upto["advance"].values[
        upto["advance"].values >= int(ds["advance"].values[0]) - 10])

    def draw_key(axes: Any = None) -> Figure:
        return plot_key_figure(
            recent, last_adv, change_chainage_m=p1.change_chainage_m,
            detection_limit_m=limit.contact_reach_m if limit else None,
            detection_label=(f"1:{limit.contact_contrast:g} contact: detection limit at best"
                             if limit else ""), norm=norm, axes=axes)

    key = draw_key()
    figs: list[tuple[str, Figure]] = [
        ("key", key),
        ("section", figures.plot_moving_section(ds, norm=norm)),
        ("ahead", figures.plot_section_ahead(upto, last_adv, norm=norm)),
        ("profile", figures.plot_ahead_profile(upto, last_adv)),
        ("fit", figures.plot_data_fit(ds, highlight=last_adv)),
    ]
    face = float(upto["face_chainage_m"].values[-1])

    def with_probes(draw: Any, kind: str) -> Any:
        """A figure-page drawer that also draws the probes (section or profile)."""
        def run(ax: Any) -> Any:
            out = draw(ax)
            if probes is not None:
                if kind == "section":
                    draw_probes_on_section(ax, probes)
                else:
                    draw_probes_on_profile(ax, probes, face)
            return out
        return run

    if probes is not None:
        draw_probes_on_section(dict(figs)["section"].axes[0], probes)
        draw_probes_on_profile(dict(figs)["profile"].axes[0], probes, face)
    pages: list[Figure] = _page_one(p1, synthetic, draw_key)

    flow = TextFlow("Cautions")
    for heading, paras in cautions.all_cautions(st, synthetic):
        flow.heading(heading)
        if len(paras) > 1:
            flow.bullets(paras)
        else:
            flow.paragraph(paras[0])
    pages += flow.pages
    pages += [
        figure_page("Moving section", with_probes(lambda ax: figures.plot_moving_section(
            ds, ax=ax, norm=norm), "section"), "Resistivity image of every advance of the "
            "shift, in chainage; hatched cells are not constrained by the data."),
        figure_page("Section ahead of the last face", lambda ax: figures.plot_section_ahead(
            upto, last_adv, ax=ax, norm=norm)),
        figure_page("Resistivity along the axis ahead of the last face",
                    with_probes(lambda ax: figures.plot_ahead_profile(upto, last_adv, ax=ax),
                                "profile")),
    ]

    flow = TextFlow("Changes ahead")
    flow.heading("Changes found (distances from the last face of the shift)")
    flow.bullets(summary.describe())
    for c in summary.changes:
        flow.paragraph(f"why '{c.level}' at chainage {c.chainage_m:.1f} m: "
                       f"{'; '.join(c.reasons)}; from {c.source}", size=8.0)
    pages += flow.pages
    if probes is not None:
        pages += _probe_pages(probes, upto, summary, table)
    pages += table_pages(
        "Candidate materials", tables.MATERIAL_HEADER, mat_rows,
        col_widths=(2.2, 1.1, 1.3, 1.1, 2.6),
        notes=["Every class whose range overlaps the resistivity is listed: the ranges overlap "
               "(a water-bearing sand and a silt can both read 60 ohm-m) and resistivity alone "
               "does not decide. A probe or a sample does.",
               f"Table: {table.source}."])
    pages.append(figure_page("Data fit per advance", lambda ax: figures.plot_data_fit(
        ds, ax=ax, highlight=last_adv)))
    pages += table_pages(
        "Readings QC per advance", tables.QC_HEADER, tables.qc_rows(adv_table),
        col_widths=(0.6, 0.8, 0.7, 0.55, 0.6, 4.0, 0.75, 0.65, 1.15, 0.95), font_size=7.5,
        notes=["a, b: error model e = a + b|R| of a normal-reciprocal difference (ohm, -); "
               "reciprocal error |Rn - Rr| / mean |R|, median and 90th percentile over the "
               "advance's pairs (%).",
               "Flag names: reciprocal, stacking, contact, low_voltage, sign, outlier, "
               "no_error_model, negative_rhoa (DEVELOPERS.md, Error model). Flagged readings "
               "are kept in qc_flags.csv and not inverted."])
    pages += table_pages(
        "Fit per advance", tables.FIT_HEADER, tables.fit_rows(adv_table),
        col_widths=(0.7, 0.9, 0.8, 0.8, 0.8, 0.8, 1.2, 1.6, 1.1),
        notes=["chi²: error-weighted misfit per datum (1 = fit within the stated errors); "
               "rrms: relative root-mean-square misfit; λ: regularisation strength; flag: "
               "not converged, misfit high or low (flagged advances are shown, never used as "
               "clean answers). Contact ahead: the contact fit's distance (95 % interval).",
               f"The whole table, with QC and body columns, is in advances_{safe}.csv beside "
               "this report."])
    if "body_ahead_m" in ds:
        pages += table_pages("Off-axis body per advance", tables.BODY_HEADER,
                             tables.body_rows(adv_table),
                             notes=["bearing: clockwise from the crown looking ahead; "
                                    "interval in parentheses."])
    qc_settings = (qc_summary or {}).get("settings")
    toml_text = appendix.settings_toml(str(full.attrs.get("settings_text", "")),
                                       qc=qc_settings, ahead=asdict(st))
    flow = TextFlow("Appendix: settings (TOML)")
    flow.paragraph("The settings of the inversion as stored with the shift, the QC settings of "
                   "the check (when given) and the level thresholds this report used, as a "
                   "settings file would hold them.", size=8.5)
    flow.code(toml_text.splitlines())
    pages += flow.pages
    pages += table_pages("Appendix: provenance", ("item", "value"),
                         appendix.provenance_rows(store, full, shift), col_widths=(1.3, 4.0),
                         font_size=7.5)
    drive = answer.drive_name(full)
    add_footers(pages, f"tbminv shift report: {drive + ', ' if drive else ''}shift {shift}",
                synthetic=synthetic, caution=SHORT_CAUTION)

    pdf_path = out / f"report_{safe}.pdf"
    csv_path = out / f"advances_{safe}.csv"
    written: list[Path] = []
    meta = {"Title": f"tbminv shift report {shift}", "Author": "tbminv",
            "Subject": tbminv.CAUTION, "Creator": f"tbminv {tbminv.__version__}",
            "Keywords": "synthetic data" if synthetic else ""}
    with matplotlib.rc_context({"pdf.fonttype": 42}):
        with atomic_path(pdf_path) as tmp_pdf:
            with PdfPages(tmp_pdf, metadata=meta) as pdf:
                for page in pages:
                    pdf.savefig(page)
        written.append(pdf_path)
        with atomic_path(csv_path) as tmp:
            adv_table.to_csv(tmp, index=False, float_format="%.6g", lineterminator="\n")
        written.append(csv_path)
        for name, fig in figs:
            png = Path(f"{stem}_{name}.png")
            fig.savefig(png, dpi=150)
            written.append(png)
    _LOG.info("report of shift %s: %s", shift, pdf_path)
    return written


def _probe_pages(probes: ProbeLog, upto: xr.Dataset, summary: AheadSummary,
                 table: MaterialTable) -> list[Figure]:
    """Pages of the probe log and its check against the contact fit."""
    agreements = check_probe_contacts(probes, upto)
    beyond = probe_materials_beyond(agreements, summary)
    flow = TextFlow("Face probes")
    flow.heading("Probe log")
    flow.bullets([f"{probes.source}: {len(probes.rows)} of {probes.rows_read} rows kept "
                  f"({len(probes.quarantine)} quarantine entries)"] + probe_rows_text(probes))
    flow.heading("Probed contacts against the readings")
    flow.bullets([a.text for a in agreements] or ["the probes log no change of material"])
    flow.heading("Material beyond a change the probes confirm")
    flow.bullets(beyond or ["no change ahead is confirmed by a probe"])
    flow.heading("Material table")
    flow.paragraph(f"candidate materials on the next page from: {table.source}")
    flow.heading("Caution")
    flow.paragraph("A probe sees a line, not the face: between probes and beyond their reach "
                   "the ground is known only from the readings. " + tbminv.CAUTION)
    return flow.pages


__all__ = ["write_report"]
