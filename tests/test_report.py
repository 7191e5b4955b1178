"""Shift report: the PDF renders (pdftoppm) and carries the caution text (pypdf).

Invented sections (tests/test_section.make_results): plumbing tests only.
"""

from __future__ import annotations

import re
import shutil
import subprocess

import numpy as np
import pytest
from pypdf import PdfReader

import tbminv
from tbminv.cli import main
from tbminv.plots import section as figures
from tbminv.report import cautions, write_report
from tbminv.results.store import append_shift, open_section
from tests.helpers import make_section


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    path = tmp_path_factory.mktemp("report") / "section.nc"
    append_shift(path, make_section(range(0, 6), rho_beyond=12.0, noise_log10=0.01), "day-1")
    append_shift(path, make_section(range(6, 12), rho_beyond=12.0, noise_log10=0.01,
                                    flagged=(8,)), "night-1")
    return path


def _words(text):
    return re.sub(r"\s+", " ", text).strip()


def test_report_pdf_renders_and_contains_caution(store, tmp_path):
    qc = {"error_model_group": "advance", "settings": {"reciprocal_max": 0.1},
          "error_models": {"7": {"a_ohm": 0.001, "b": 0.02}}}
    paths = write_report(store, tmp_path / "out", qc_summary=qc)
    pdf = paths[0]
    assert pdf.suffix == ".pdf" and pdf.exists()
    assert [p.suffix for p in paths[1:]] == [".csv"] + [".png"] * 5
    assert all(p.stat().st_size > 1000 for p in paths)
    reader = PdfReader(pdf)
    assert len(reader.pages) >= 10
    text = _words(" ".join(page.extract_text() for page in reader.pages))
    assert _words(tbminv.CAUTION) in text
    assert _words(cautions.ELECTRICAL_SAFETY) in text
    assert "level of concern: FIRM" in text
    assert "Reynolds 2011" in text  # the materials table names its source
    assert "reciprocal_max = 0.1" in text   # QC settings as TOML in the appendix
    assert "[invert]" in text and "lambda = 20.0" in text
    for key in ("readings SHA-256", "settings SHA-256", "pyGIMLi 1.6"):
        assert key in text
    if shutil.which("pdftoppm") is None:
        pytest.skip("pdftoppm (Debian poppler-utils) not installed")
    subprocess.run(["pdftoppm", "-r", "40", "-png", str(pdf), str(tmp_path / "page")],
                   check=True, capture_output=True, timeout=120)
    pngs = sorted(tmp_path.glob("page-*.png"))
    assert len(pngs) == len(reader.pages)
    assert all(p.stat().st_size > 2000 for p in pngs)


def test_report_of_named_shift_and_cli(store, tmp_path, capsys):
    paths = write_report(store, tmp_path / "a", shift="day-1")
    text = _words(" ".join(p.extract_text() for p in PdfReader(paths[0]).pages))
    assert "shift day-1: advances 0-5" in text
    rc = main(["report", str(store), "--out", str(tmp_path / "cli")])
    assert rc == 0
    out = capsys.readouterr().out
    assert "report_night-1.pdf" in out and out.count("wrote ") == len(paths)
    rc = main(["report", str(tmp_path / "none.nc"), "--out", str(tmp_path / "x")])
    assert rc == 2


def test_figures_have_units_and_save(store, tmp_path):
    ds = open_section(store)
    figs = [figures.plot_moving_section(ds), figures.plot_section_ahead(ds, 7),
            figures.plot_ahead_profile(ds), figures.plot_chainage_history(ds, 1225.0),
            figures.plot_data_fit(ds, highlight=7)]
    for fig in figs:
        for ax in fig.axes:
            label = ax.get_ylabel()
            if ax.get_label() == "<colorbar>":
                assert "ohm" in label
                continue
            assert re.search(r"\(.+\)", ax.get_xlabel() or "(x)"), ax.get_xlabel()
            assert re.search(r"\(.+\)", label), label
    out = figures.save_figure(figs[0], tmp_path / "fig" / "moving")
    assert [p.suffix for p in out] == [".pdf", ".png"] and all(p.exists() for p in out)


def test_ahead_profile_band_contains_profile(store):
    ds = open_section(store)
    p = figures.ahead_profile(ds)
    ok = np.isfinite(p["resistivity_ohmm"]) & (p["ahead_m"] >= 0)
    assert np.all(p["lo_ohmm"][ok] <= p["resistivity_ohmm"][ok] * (1 + 1e-9))
    assert np.all(p["hi_ohmm"][ok] >= p["resistivity_ohmm"][ok] * (1 - 1e-9))
    h = figures.chainage_history(ds, 1225.0)
    assert np.isfinite(h["resistivity_ohmm"]).sum() >= 10


def test_report_cli_takes_ahead_settings_and_site_table(store, tmp_path, capsys):
    site = tmp_path / "site.csv"
    site.write_text("# source: face probes, rings 10-40 (invented)\nname,low_ohmm,high_ohmm\n"
                    "grey silt,5,30\nsand and gravel,60,400\n")
    settings = tmp_path / "settings.toml"
    settings.write_text("[ahead]\nfirm_advances = 50\n")   # 'firm' out of reach: 'likely'
    rc = main(["report", str(store), "--out", str(tmp_path / "o"), "--settings", str(settings),
               "--materials", str(site), "--shift", "day-1"])
    assert rc == 0
    pdf = next((tmp_path / "o").glob("*.pdf"))
    text = _words(" ".join(p.extract_text() for p in PdfReader(pdf).pages))
    assert "face probes, rings 10-40" in text and "grey silt" in text
    assert "level of concern: LIKELY" in text
    settings.write_text("[ahead]\nfirm_advance = 5\n")
    rc = main(["report", str(store), "--out", str(tmp_path / "p"), "--settings", str(settings)])
    err = capsys.readouterr().err
    assert rc == 2 and "firm_advance: unknown key" in err and str(settings) in err
    site.write_text("name,low_ohmm,high_ohmm\nclay,abc,20\n")
    rc = main(["report", str(store), "--out", str(tmp_path / "q"), "--materials", str(site)])
    err = capsys.readouterr().err
    assert rc == 2 and "low_ohmm" in err and str(site) in err


def test_a_contrast_at_the_fits_bound_names_no_material(tmp_path):
    # our own rule (tbminv.report): a resistivity beyond that is the fit's bound is a limit,
    # not a value, so the report names no material from it; a handbook table would otherwise
    # turn 0.08 ohm-m into "saline groundwater" (Reynolds 2011 table 7.1, from memory)
    path = tmp_path / "bound.nc"
    append_shift(path, make_section(range(8), rho_beyond=0.08,
                                    contact_extra={"at_bound": True, "contrast_lo": 0.001,
                                                   "contrast_hi": 0.001}), "day-1")
    pdf = write_report(path, tmp_path / "out")[0]
    text = _words(" ".join(page.extract_text() for page in PdfReader(pdf).pages))
    assert "0.08 is the fit's bound, not a value" in text and "not classified" in text
    assert "saline groundwater" not in text
