"""The robust drive run: null-coupled readings, fail fast, journal and resume, degrade.

The drive (``symmetric_dipole_drive`` in conftest.py) has cutterhead dipoles that are
null-coupled in axisymmetric ground: before, they made the contact fit crash the whole run
after every advance was inverted, and nothing was stored.
"""

from __future__ import annotations

import logging
import signal
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from tbminv.inversion.drive import DriveInverter
from tbminv.inversion.image import ImageResult
from tbminv.inversion.journal import Journal, journal_root
from tbminv.inversion.outcome import POSTPROCESS_CONTACT_FIT_FAILED, SectionError
from tbminv.inversion.settings import InversionError, load_settings
from tbminv.jobs import EXIT_PARTIAL, invert_job, run_drive
from tbminv.layout import Layout, load_layout
from tbminv.results.store import open_section

ROOT = Path(__file__).resolve().parents[2]

KILL_SCRIPT = """
import os, signal, sys
from tbminv.inversion.drive import DriveInverter

original = DriveInverter.invert_advance

def killed_during(self, adv, *args, **kwargs):
    if adv.advance == {kill_at}:
        os.kill(os.getpid(), signal.SIGKILL)  # as a crash or `kill -9` would, mid-advance
    return original(self, adv, *args, **kwargs)

DriveInverter.invert_advance = killed_during
from tbminv.cli import main
sys.exit(main({argv!r}))
"""


def _invert_cli(drive, store: Path, kill_at: int | None = None
                ) -> subprocess.CompletedProcess:
    """``tbminv invert`` on the drive in a child process (optionally killed at an advance).

    Every run of a comparison goes through a child process with the same environment: the
    images differ at 1e-5 between BLAS thread counts (OMP_NUM_THREADS), far above the 1e-6
    asked of a resumed run.
    """
    argv = ["invert", str(drive.readings), "--layout", str(drive.layout), "--store",
            str(store), "--settings", str(drive.settings)]
    if kill_at is None:
        script = f"import sys\nfrom tbminv.cli import main\nsys.exit(main({argv!r}))\n"
    else:
        script = KILL_SCRIPT.format(kill_at=kill_at, argv=argv)
    return subprocess.run([sys.executable, "-c", script], cwd=ROOT, capture_output=True,
                          text=True, timeout=900)


@pytest.fixture(scope="module")
def uninterrupted(symmetric_dipole_drive, tmp_path_factory):
    """The drive inverted in one go by the command line: the store and the run's stderr."""
    store = tmp_path_factory.mktemp("uninterrupted") / "section.nc"
    out = _invert_cli(symmetric_dipole_drive, store)
    assert out.returncode == 0, out.stderr[-3000:]
    return store, out.stderr


def test_null_coupled_dipoles_invert_end_to_end(symmetric_dipole_drive, uninterrupted):
    store, stderr = uninterrupted
    ds = open_section(store)
    assert ds.sizes["advance"] == symmetric_dipole_drive.n_advances
    assert np.all(np.isfinite(ds["chi2"].values))
    # the contact fit ran on every advance (finite fitted resistivity around the machine) or
    # recorded its failure; here it runs: the null-coupled readings were left out, with reasons
    post = ds["postprocess_flag"].values
    assert np.all(np.isfinite(ds["resistivity_around"].values)
                  | (post & POSTPROCESS_CONTACT_FIT_FAILED > 0))
    assert np.all(post == 0), post
    left_out = [ln for ln in stderr.splitlines() if "left out of the relative-response" in ln]
    assert len(left_out) == 1 and left_out[0].count("null-coupled") == 3, stderr[-3000:]
    assert not journal_root(store).exists()      # removed once the shift is stored


def test_invert_cli_writes_the_flags_file_beside_the_quarantine(symmetric_dipole_drive,
                                                                uninterrupted):
    import pandas as pd

    from tbminv.jobs import qc_folder
    from tbminv.readings.flagfile import FLAGS_COLUMNS, FLAGS_FILE

    store, stderr = uninterrupted
    folder = qc_folder(store, symmetric_dipole_drive.readings)
    assert folder.parent.parent == store.parent
    assert (folder / "quarantine.csv").exists()
    flags = pd.read_csv(folder / FLAGS_FILE)
    log = pd.read_csv(symmetric_dipole_drive.readings)
    assert tuple(flags.columns) == FLAGS_COLUMNS
    assert len(flags) == len(log)                     # one row per reading, none quarantined
    assert flags["line"].tolist() == list(range(2, len(log) + 2))
    settings, _ = load_settings(symmetric_dipole_drive.settings)
    assert settings.model_error_floor > 0
    assert (flags["model_error_floor"] == settings.model_error_floor).all()
    # a simulated drive with 1 % noise has no polarity reversal: no negative readings
    assert flags["negative_rhoa"].sum() == 0


@pytest.mark.slow  # two more command-line runs: about 22 s on 2 CPUs
def test_killed_run_resumes_to_the_same_result(symmetric_dipole_drive, uninterrupted,
                                               tmp_path):
    d = symmetric_dipole_drive
    store = tmp_path / "section.nc"
    kill_at = 2
    out = _invert_cli(d, store, kill_at=kill_at)
    assert out.returncode == -signal.SIGKILL, out.stderr[-3000:]
    assert not store.exists()
    journals = [p for p in journal_root(store).iterdir() if p.is_dir()]
    assert len(journals) == 1
    entries = sorted(p.name for p in journals[0].glob("advance-*.npz"))
    assert entries == [f"advance-{k:06d}.npz" for k in range(1, kill_at)]

    # the same command again: resumes, skipping the journaled advance
    out = _invert_cli(d, store)
    assert out.returncode == 0, out.stderr[-3000:]
    assert f"1 of {d.n_advances} advances already inverted" in out.stderr
    a, b = open_section(store), open_section(uninterrupted[0])
    assert a.sizes["advance"] == b.sizes["advance"] == d.n_advances
    np.testing.assert_allclose(a["chi2"].values, b["chi2"].values, rtol=1e-6)
    np.testing.assert_allclose(a["resistivity"].values, b["resistivity"].values, rtol=1e-6)
    np.testing.assert_allclose(a["contact_p_none"].values, b["contact_p_none"].values,
                               rtol=1e-6)
    assert not journal_root(store).exists()


def _fake_image(inv: DriveInverter, adv) -> ImageResult:
    n = inv.grid.n_param
    return ImageResult(np.full(n, 100.0), 1.0, 1.0, 1, 10.0, "test", True, 0.0, [2.0, 1.0],
                       np.zeros(n), None, 3, np.ones(3), np.ones(3), np.full(3, 0.01))


def test_contact_fit_failure_keeps_images_and_exits_3(symmetric_dipole_drive, tmp_path,
                                                      monkeypatch, caplog):
    from tbminv.inversion.contactfit import ContactFitter

    d = symmetric_dipole_drive
    monkeypatch.setattr(DriveInverter, "invert_advance",
                        lambda self, adv, *a, **k: _fake_image(self, adv))

    def broken(*args, **kwargs):
        raise RuntimeError("made to fail by the test")

    monkeypatch.setattr(ContactFitter, "fit_drive", broken)
    store = tmp_path / "section.nc"
    lines: list[str] = []
    with caplog.at_level(logging.WARNING, logger="tbminv"):
        code = invert_job(d.readings, d.layout, store, settings_path=d.settings,
                          progress=False, echo=lines.append)
    assert code == EXIT_PARTIAL == 3
    assert any(line.startswith("partial: images stored") for line in lines), lines
    assert "contact fit failed" in caplog.text
    ds = open_section(store)
    assert np.all(ds["postprocess_flag"].values == POSTPROCESS_CONTACT_FIT_FAILED)
    assert ds["postprocess_flag"].attrs["flag_meanings"].split()[0] == "contact_fit_failed"
    assert np.all(np.isfinite(ds["resistivity"].values[:, -1, -1]))   # images stored
    assert np.all(np.isnan(ds["contact_ahead_m"].values))


def _never(*args, **kwargs):
    raise AssertionError("work started before the inputs and the store were checked")


def test_unwritable_store_fails_before_any_inversion(symmetric_dipole_drive, tmp_path,
                                                     monkeypatch):
    d = symmetric_dipole_drive
    monkeypatch.setattr(DriveInverter, "invert_advance", _never)
    monkeypatch.setattr(DriveInverter, "prepare", _never)
    blocker = tmp_path / "not-a-folder"
    blocker.write_text("a file where the store's folder should be")
    settings, qc = load_settings(d.settings)
    with pytest.raises(SectionError, match="cannot write beside the store"):
        run_drive(d.readings, load_layout(d.layout), blocker / "section.nc", settings=settings,
                  qc_settings=qc)


def test_store_of_another_layout_fails_before_any_inversion(symmetric_dipole_drive, tmp_path,
                                                            monkeypatch):
    d = symmetric_dipole_drive
    settings, qc = load_settings(d.settings)
    monkeypatch.setattr(DriveInverter, "invert_advance",
                        lambda self, adv, *a, **k: _fake_image(self, adv))
    store = tmp_path / "section.nc"
    lay = load_layout(d.layout)
    run_drive(d.readings, lay, store, settings=settings, qc_settings=qc, shift="a")
    other = Layout.from_dict({**lay.to_dict(), "name": "another layout"}, source="<other>")
    monkeypatch.setattr(DriveInverter, "invert_advance", _never)
    monkeypatch.setattr(DriveInverter, "prepare", _never)
    with pytest.raises(SectionError, match="different layout"):
        run_drive(d.readings, other, store, settings=settings, qc_settings=qc, shift="b")


def test_readings_outside_the_protocol_fail_before_any_inversion(symmetric_dipole_drive,
                                                                 tmp_path):
    d = symmetric_dipole_drive
    lay = load_layout(d.layout)
    only = Layout.from_dict({**lay.to_dict(), "protocol": {},
                             "measurement": [{"a": "S1", "b": "S2", "m": "T1", "n": "T2"}]},
                            source="<one quadrupole nobody measured>")
    settings, qc = load_settings(d.settings)
    with pytest.raises(InversionError, match="none of its .* valid readings is a quadrupole"):
        run_drive(d.readings, only, tmp_path / "s.nc", settings=settings, qc_settings=qc)
    assert not (tmp_path / "s.nc").exists()


def test_journal_round_trip_is_exact(tmp_path):
    rng = np.random.default_rng(1)
    img = ImageResult(rng.uniform(1, 100, 50), 1.2345678901234567, 3.3, 4, 12.5,
                      "chi-squared reached 1", True, 7.25, [9.0, 2.0, 1.2345678901234567],
                      rng.normal(size=50), None, 17, rng.normal(size=17),
                      rng.normal(size=17), np.full(17, 0.02), postprocess_flag=2)
    j = Journal(tmp_path / "s.nc", {"x": 1})
    j.write(5, img)
    back = j.load()[5]
    for name in ("model_ohmm", "coverage", "response_ohmm", "data_ohmm", "rel_error"):
        np.testing.assert_array_equal(getattr(back, name), getattr(img, name))
    assert back.chi2 == img.chi2 and back.chi2_history == img.chi2_history
    assert back.doi_index is None and back.postprocess_flag == 2
    assert Journal(tmp_path / "s.nc", {"x": 2}).load() == {}   # other inputs: not mixed in
    j.remove()
    assert not journal_root(tmp_path / "s.nc").exists()
