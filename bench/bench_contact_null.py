"""Calibrate the contact fit's "no contact" statistic by simulation; write the package table.

What it does (run: ``python bench/bench_contact_null.py [--drives N]``):

1. Builds (or reads from the cache) the contact response table of a layout with the
   axisymmetric forward model (machine and tunnel in), as ``tbminv invert`` does for the
   readings between electrodes on the machine: the test fixture layout
   (``tests/data/fixture_layout.toml``, 21 readings; ``--layouts fixture,demo`` adds the demo
   layout, ``tbminv/data/demo_layout.toml``), forward settings "fast".
2. Simulates homogeneous drives: readings ``r0 * rho / rho_ref`` of the table's homogeneous
   response, faces every 1.5 m, with noise, for windows of n = 1 ... 30 advances, and computes
   the statistic ``T`` of the joint fit of the window (:meth:`ContactFitter.estimate`).
   Noise cases: ``independent``: 2 % Gaussian relative error per reading, stated 2 %;
   ``correlated``: the same plus a 0.5 % error common to all readings of an advance and a
   0.5 % error per reading that stays the same along the drive (a modelling error), stated 2 %.
3. Fits ``T ~ g * chi2_h`` per (case, n) to the simulated 90th and 98th percentiles
   (:func:`tbminv.inversion.nullcal.fit_scaled_chi2`) and writes
   ``tbminv/data/contact_null_calibration.toml``.
4. Checks on a second, independent set of simulated drives (other seeds) how often the
   calibrated tail probability falls at or below 0.01 and 0.002 (the thresholds of 'likely'
   and 'firm' in :class:`tbminv.results.ahead.AheadSettings`), and writes the numbers to
   ``bench/results/contact_null.json``.
"""

from __future__ import annotations

import argparse
import datetime as _dt
import json
import time
from pathlib import Path

import numpy as np

from tbminv.inversion.contactfit import ContactFitter
from tbminv.inversion.drive import DriveInverter
from tbminv.inversion.nullcal import CALIBRATION_FILE, NullCalibration, NullCase, fit_scaled_chi2
from tbminv.inversion.settings import InversionSettings
from tbminv.layout import load_layout

ROOT = Path(__file__).resolve().parents[1]
LAYOUTS = {"fixture": ROOT / "tests" / "data" / "fixture_layout.toml",
           "demo": ROOT / "tbminv" / "data" / "demo_layout.toml"}
WINDOWS = (1, 2, 4, 8, 15, 30)
STEP_M = 1.5
NOISE = 0.02
CASES = {"independent": (0.0, 0.0), "correlated": (0.005, 0.005)}   # common, static


def fitter_for(layout_name: str) -> ContactFitter:
    """The contact fitter of a layout, as the drive inversion builds it (table cached)."""
    inv = DriveInverter(load_layout(LAYOUTS[layout_name]),
                        InversionSettings(forward_settings="fast"))
    dummy = NullCalibration((NullCase("none", np.array([1.0]), np.array([1.0]),
                                      np.array([2.0])),))
    f = inv.contact_fitter(50.0)
    return ContactFitter(f.table, f.settings, calibration=dummy)


def simulate(fitter: ContactFitter, n: int, case: str, rng: np.random.Generator) -> float:
    """Statistic T of one homogeneous window of ``n`` advances."""
    common, static = CASES[case]
    r0 = fitter.table.r0_ohm
    rho = float(np.exp(rng.uniform(np.log(20.0), np.log(500.0))))
    bias = 1.0 + static * rng.standard_normal(r0.size)
    faces = np.arange(n) * STEP_M
    err = np.full(r0.size, NOISE)
    liks = []
    for _ in range(n):
        r = r0 * rho / fitter.table.rho_ref_ohmm * bias * (1.0 + common * rng.standard_normal())
        r = r * (1.0 + NOISE * rng.standard_normal(r0.size))
        liks.append(fitter.likelihood(r, err))
    return float(fitter.estimate(liks, faces).lr_statistic)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--drives", type=int, default=400, help="simulated windows per (case, n)")
    ap.add_argument("--check-drives", type=int, default=200,
                    help="held-out simulated windows per (case, n) for the check")
    ap.add_argument("--layouts", default="fixture")
    args = ap.parse_args()
    t0 = time.perf_counter()
    cases_out, report = [], {"windows": list(WINDOWS), "step_m": STEP_M, "noise_rel": NOISE,
                             "drives_per_cell": args.drives,
                             "check_drives_per_cell": args.check_drives, "cases": {}}
    for lname in args.layouts.split(","):
        fitter = fitter_for(lname)
        for case in CASES:
            name = f"{lname} layout, {case} noise"
            rng = np.random.default_rng(20261203)
            check_rng = np.random.default_rng(99)
            g_, h_, rows = [], [], []
            for n in WINDOWS:
                t = np.array([simulate(fitter, n, case, rng) for _ in range(args.drives)])
                g, h = fit_scaled_chi2(t)
                g_.append(g)
                h_.append(h)
                rows.append({"n": n, "scale": g, "dof": h, "mean": float(t.mean()),
                             "q90": float(np.quantile(t, 0.9)),
                             "q98": float(np.quantile(t, 0.98)),
                             "q995": float(np.quantile(t, 0.995))})
                print(f"{name}: n={n} g={g:.3f} h={h:.2f} q98={rows[-1]['q98']:.2f}",
                      flush=True)
            cal = NullCalibration((NullCase(name, np.array(WINDOWS, float), np.array(g_),
                                            np.array(h_)),))
            # held-out check: simulated rate of calibrated p at or below the thresholds
            for row in rows:
                n = row["n"]
                t = np.array([simulate(fitter, n, case, check_rng)
                              for _ in range(args.check_drives)])
                p = np.array([cal.p_false_alarm(v, n) for v in t])
                row["check_rate_p_le_0.01"] = float(np.mean(p <= 0.01))
                row["check_rate_p_le_0.002"] = float(np.mean(p <= 0.002))
            report["cases"][name] = rows
            cases_out.append((name, lname, case, g_, h_))
    stamp = _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
    lines = [
        "# Null distribution of the contact fit's likelihood-ratio statistic (no contact).",
        "# Made by python bench/bench_contact_null.py; see that script for how. Do not edit.",
        f'made_by = "python bench/bench_contact_null.py --drives {args.drives}"',
        f'date = "{stamp}"',
        'statistic = "(chi2_homogeneous - chi2_min) / max(1, chi2_min / dof) of the joint fit"',
        'model = "T ~ scale * chi2(dof), matched to the simulated 90th and 98th percentiles"',
        f"drives_per_window = {args.drives}",
        f"face_step_m = {STEP_M}",
        f"noise_rel = {NOISE}",
        ""]
    for name, lname, case, g_, h_ in cases_out:
        lines += ["[[case]]", f'name = "{name}"', f'layout = "{lname}"', f'noise = "{case}"',
                  f"n_advances = {list(WINDOWS)}",
                  "scale = [" + ", ".join(f"{v:.5g}" for v in g_) + "]",
                  "dof = [" + ", ".join(f"{v:.5g}" for v in h_) + "]", ""]
    CALIBRATION_FILE.write_text("\n".join(lines), encoding="utf-8")
    report["time_s"] = time.perf_counter() - t0
    out = ROOT / "bench" / "results" / "contact_null.json"
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(json.dumps(report, indent=1), encoding="utf-8")
    print(f"wrote {CALIBRATION_FILE} and {out} in {report['time_s']:.0f} s")


if __name__ == "__main__":
    main()
