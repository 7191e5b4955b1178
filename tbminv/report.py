"""The shift report: one multi-page PDF plus the figures as PNG (and PDF), from a section store.

Pages: cover (shift, advances, level of concern, the caution), the moving section with the
face positions, the section ahead of the face at the last advance, the ahead profile with its
band, the changes detected (distance, contrast interval, calibrated false-alarm probability,
every part of an ambiguous distance answer) and candidate materials, the inversion fit per
advance, the QC summary (if given) and the provenance (input hashes, settings, versions).
With a probe log (``probes``), the probes are drawn on the moving section and the ahead
profile and a page lists them and checks them against the contact fit (:func:`_probe_hook`).
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import logging
import textwrap
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import matplotlib
import numpy as np
import xarray as xr
from matplotlib.backends.backend_pdf import PdfPages
from matplotlib.figure import Figure

import tbminv
from tbminv.gimli import versions
from tbminv.materials import HANDBOOK_TABLE, MaterialTable, candidate_table_rows
from tbminv.plots import section as figures
from tbminv.plots.probes import draw_probes_on_profile, draw_probes_on_section
from tbminv.readings.probes import ProbeLog, probe_rows_text
from tbminv.results.ahead import AheadSettings, AheadSummary, detect_changes
from tbminv.results.probecheck import check_probe_contacts, probe_materials_beyond
from tbminv.results.section import SectionError, clean_advances
from tbminv.results.store import open_section

_LOG = logging.getLogger(__name__)

PAGE = (11.69, 8.27)  # A4 landscape, inches
WRAP = 150


def _text_pages(title: str, blocks: list[tuple[str, list[str]]]) -> list[Figure]:
    """Pages of text: (heading, lines) blocks, wrapped, continued on new pages as needed."""
    pages: list[Figure] = []

    def new_page(cont: bool) -> Figure:
        fig = Figure(figsize=PAGE)
        fig.text(0.05, 0.94, title + (" (continued)" if cont else ""), fontsize=16,
                 weight="bold", va="top")
        pages.append(fig)
        return fig

    fig, y = new_page(False), 0.88
    for heading, lines in blocks:
        if y < 0.15:
            fig, y = new_page(True), 0.88
        if heading:
            fig.text(0.05, y, heading, fontsize=11, weight="bold", va="top")
            y -= 0.035
        for line in lines:
            for part in textwrap.wrap(line, WRAP, subsequent_indent="    ") or [""]:
                if y < 0.05:
                    fig, y = new_page(True), 0.88
                fig.text(0.06, y, part, fontsize=8.5, va="top")
                y -= 0.026
        y -= 0.02
    return pages


def _sha256_file(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _shift_of_last(ds: xr.Dataset) -> str:
    return str(ds["shift"].values[-1])


def _materials_rows(ds: xr.Dataset, summary: AheadSummary,
                    table: MaterialTable) -> list[tuple[str, str, str]]:
    prof = figures.ahead_profile(ds)
    near = (prof["ahead_m"] >= 0) & (prof["ahead_m"] <= 3.0) & prof["covered"]
    vals: list[tuple[str, float, float | None]] = []
    if near.any():
        lo = float(np.nanmin(prof["lo_ohmm"][near]))
        hi = float(np.nanmax(prof["hi_ohmm"][near]))
        vals.append(("ground at the face (0-3 m ahead)", lo, hi if hi > lo else None))
    face = float(ds["face_chainage_m"].values[-1])
    unclassified: list[tuple[str, str, str]] = []
    for c in summary.changes:
        b = c.resistivity_beyond_ohmm
        if not np.isfinite(b):
            continue
        if c.at_bound or c.contrast_open:
            # a contrast at (or open to) the fit's bound is a limit, not a value: naming a
            # material from it would state more than the data hold
            unclassified.append((f"beyond chainage {c.chainage_m:.1f} m ({c.level})",
                                 f"{b:.3g} ohm-m is the fit's bound, not a value",
                                 "not classified"))
            continue
        far = (prof["ahead_m"] >= c.chainage_hi_m - face + 1.0) & prof["covered"]
        if far.any():  # the band of the covered profile beyond the contact
            lo = float(np.nanmin(prof["lo_ohmm"][far]))
            hi = float(np.nanmax(prof["hi_ohmm"][far]))
            lo, hi = min(lo, b), max(hi, b)
            vals.append((f"beyond chainage {c.chainage_m:.1f} m ({c.level})", lo,
                         hi if hi > lo else None))
        else:
            vals.append((f"beyond chainage {c.chainage_m:.1f} m ({c.level}, fitted value)",
                         b, None))
    return candidate_table_rows(vals, table) + unclassified


def _qc_lines(qc: Mapping[str, Any] | None) -> list[str]:
    if not qc:
        return ["no QC summary given"]
    out = []
    for k, v in qc.items():
        if isinstance(v, float):
            out.append(f"{k}: {v:.4g}")
        else:
            out.append(f"{k}: {v}")
    return out


def _provenance_lines(store: Path, ds: xr.Dataset, shift: str) -> list[str]:
    prov = json.loads(ds.attrs.get("provenance_by_shift", "{}") or "{}")
    lines = [f"store: {store}", f"store SHA-256: {_sha256_file(store)}",
             f"layout SHA-256: {ds.attrs.get('layout_sha256', '')}"]
    for name in sorted(prov):
        p = prov[name]
        mark = " (this report)" if name == shift else ""
        lines.append(f"shift {name}{mark}: inputs SHA-256 {p.get('inputs_sha256', '')}, "
                     f"settings SHA-256 {p.get('settings_sha256', '')}, written "
                     f"{p.get('date_created', '')}, tbminv {p.get('tbminv_version', '')}, "
                     f"pyGIMLi {p.get('pygimli_version', '')}, pgcore "
                     f"{p.get('pgcore_version', '')}")
    ver = versions()
    lines.append(f"report made {_dt.datetime.now(_dt.UTC):%Y-%m-%dT%H:%M:%SZ} with tbminv "
                 f"{tbminv.__version__}, pyGIMLi {ver.get('pygimli', '?')}, pgcore "
                 f"{ver.get('pgcore', '?')}, matplotlib {matplotlib.__version__}")
    return lines


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
        Numbers of the readings check (e.g. readings used / rejected, fitted error model).
    shift : str, optional
        Shift to report (default: the shift of the last advance in the store).
    material_table : MaterialTable, optional
        Site-calibrated table instead of the handbook one.
    ahead_settings : AheadSettings, optional
        Thresholds of the change detection.
    probes : ProbeLog, optional
        Probe log: drawn on the moving section and the ahead profile, listed and checked
        against the contact fit on a page of its own (:func:`_probe_hook`).

    Returns
    -------
    list of Path
        The report PDF first, then the figures as PNG (for vector figures use
        :func:`tbminv.plots.section.save_figure`).
    """
    store = Path(store_path)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    full = open_section(store)
    if full.sizes["advance"] == 0:
        raise SectionError(f"{store}: the store holds no advances")
    shift = shift or _shift_of_last(full)
    in_shift = full["shift"].values.astype(str) == shift
    if not in_shift.any():
        raise SectionError(f"{store}: no advances of shift {shift!r}; shifts in the store: "
                           f"{sorted(set(full['shift'].values.astype(str)))}")
    last_adv = int(full["advance"].values[in_shift][-1])
    upto = full.sel(advance=full["advance"].values[full["advance"].values <= last_adv])
    ds = full.isel(advance=np.flatnonzero(in_shift))
    summary = detect_changes(upto, ahead_settings)
    table = material_table or HANDBOOK_TABLE
    norm = figures.resistivity_norm(ds)
    safe = "".join(ch if ch.isalnum() or ch in "-_" else "_" for ch in shift)
    stem = out / f"shift_{safe}"

    figs: list[tuple[str, Figure]] = [
        ("section", figures.plot_moving_section(ds, norm=norm)),
        ("ahead", figures.plot_section_ahead(upto, last_adv, norm=norm)),
        ("profile", figures.plot_ahead_profile(upto, last_adv)),
        ("fit", figures.plot_data_fit(ds, highlight=last_adv)),
    ]
    faces = ds["face_chainage_m"].values
    n_flagged = int((~clean_advances(ds)).sum())
    cover = _text_pages("tbminv shift report", [
        ("", [f"shift {shift}: advances {int(ds['advance'].values[0])}-{last_adv} "
              f"({ds.sizes['advance']} advances), face chainage {faces[0]:.1f} to "
              f"{faces[-1]:.1f} m",
              f"store {store.name}; {n_flagged} advance(s) flagged for their "
              "data fit (not converged or misfit outside limits): shown, never as clean "
              "answers"]),
        ("Change ahead", summary.describe()),
        ("Caution", [tbminv.CAUTION]),
    ])
    mat_rows = _materials_rows(upto, summary, table)
    change_lines = summary.describe() + [""] + [
        f"  why: {'; '.join(c.reasons)}; from {c.source}" for c in summary.changes]
    mat_lines = [f"{label}: {val} -> {names}" for label, val, names in mat_rows] or [
        "no resistivity to classify"]
    mat_lines += ["Every class whose range overlaps is listed: the ranges overlap (a "
                  "water-bearing sand and a silt can both read 60 ohm-m), resistivity alone "
                  "does not decide.",
                  f"table: {table.source}"]
    changes_pages = _text_pages("Changes ahead and candidate materials", [
        ("Changes detected (distance from the last face of the shift)", change_lines),
        ("Candidate materials", mat_lines),
    ])
    fit_lines = []
    for i, a in enumerate(ds["advance"].values):
        sub = ds.isel(advance=i)
        fit_lines.append(
            f"advance {int(a):5d}  face {float(sub['face_chainage_m']):9.2f} m  chi2 "
            f"{float(sub['chi2']):7.3f}  rrms {float(sub['rrms']):6.2f} %  iterations "
            f"{int(sub['iterations']):3d}  lambda {float(sub['lambda']):8.3g}  flag "
            f"{int(sub['fit_flag'])}  {str(sub['stop_reason'].values)}")
    settings_text = str(full.attrs.get("settings_text", "")).splitlines()[:25]
    prov_pages = _text_pages("QC, fit per advance and provenance", [
        ("QC summary", _qc_lines(qc_summary)),
        ("Inversion fit per advance (flag: 1 not converged, 2 misfit high, 4 misfit low)",
         fit_lines),
        ("Provenance", _provenance_lines(store, full, shift)),
        ("Settings (first lines)", settings_text or ["(none stored)"]),
    ])

    probe_pages = _probe_hook(probes, figs, upto, summary, table) if probes else []
    pdf_path = out / f"report_{safe}.pdf"
    written: list[Path] = []
    meta = {"Title": f"tbminv shift report {shift}", "Author": "tbminv",
            "Subject": tbminv.CAUTION, "Creator": f"tbminv {tbminv.__version__}"}
    with matplotlib.rc_context({"pdf.fonttype": 42}):
        tmp_pdf = pdf_path.with_name(pdf_path.name + ".part")
        with PdfPages(tmp_pdf, metadata=meta) as pdf:
            pages = (cover + [f for _, f in figs[:3]] + changes_pages + probe_pages
                     + [figs[3][1]] + prov_pages)
            for page in pages:
                pdf.savefig(page)
        tmp_pdf.replace(pdf_path)
        written.append(pdf_path)
        for name, fig in figs:
            png = Path(f"{stem}_{name}.png")
            fig.savefig(png, dpi=150)
            written.append(png)
    _LOG.info("report of shift %s: %s", shift, pdf_path)
    return written


# ------------------------------------------------------------------ face probes (hook)
def _probe_hook(probes: ProbeLog, figs: list[tuple[str, Figure]], upto: xr.Dataset,
                summary: AheadSummary, table: MaterialTable) -> list[Figure]:
    """Draw the probes on the section and profile figures; the pages of the probe check."""
    draw_probes_on_section(dict(figs)["section"].axes[0], probes)
    draw_probes_on_profile(dict(figs)["profile"].axes[0], probes,
                           float(upto["face_chainage_m"].values[-1]))
    agreements = check_probe_contacts(probes, upto)
    beyond = probe_materials_beyond(agreements, summary)
    return _text_pages("Face probes", [
        ("Probe log", [f"{probes.source}: {len(probes.rows)} of {probes.rows_read} rows kept "
                       f"({len(probes.quarantine)} quarantine entries)"]
         + probe_rows_text(probes)),
        ("Probed contacts against the readings", [a.text for a in agreements]
         or ["the probes log no change of material"]),
        ("Material beyond a change the probes confirm", beyond or [
            "no change ahead is confirmed by a probe"]),
        ("Material table", [f"candidate materials on the previous page from: {table.source}"]),
        ("Caution", ["A probe sees a line, not the face: between probes and beyond their "
                     "reach the ground is known only from the readings. " + tbminv.CAUTION]),
    ])


__all__ = ["write_report"]
