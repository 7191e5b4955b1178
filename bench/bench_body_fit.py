"""Off-axis body fit on 3D-simulated advances: errors, false alarms, and the bearing reach.

What it does (run: ``python bench/bench_body_fit.py [--seeds N]``):

1. Reads the 3D-simulated advances of ``tests/data/body_*_3d.csv`` (made by
   ``tests/data/make_body_fixtures.py``: deep demo layout, steel and bore in, pyGIMLi 3D P2,
   8 cutterhead angles, a conductive and a resistive sphere in different quadrants, and a
   homogeneous ground), adds 2 % Gaussian relative noise with ``N`` seeds and fits every
   realisation (:meth:`tbminv.inversion.bodyfit.BodyFitter.fit_many`), stated error
   ``sqrt(2 %^2 + 0.6 %^2)``. Backgrounds: ``axisym`` (the axisymmetric model, one common
   scale), ``axisym_quadrupole_scale`` (the same with a free scale per quadrupole: only the
   change with the angle is fitted) and ``3d_homogeneous`` (the homogeneous ground computed by
   the same 3D model at every angle: the fit alone, without the error between the two forward
   models, about 1 % RMS per quadrupole on the fixtures' small 3D mesh).
2. Writes per case: how often a body is reported, the bearing error (deg) and the error of
   the centre's distance ahead (m) of the reported bodies (median, 90th percentile, largest),
   the fraction within 30 deg and 0.5 D, and the coverage of the stated intervals.
3. The false-alarm rate of ``body_p_none`` at 0.01, 0.05 and 0.20 on ``--null`` homogeneous
   realisations (goal: at most the nominal rate).
4. The planning study (:func:`tbminv.studies.bodyreach.body_bearing_study`) on the same
   layout: distance to which the bearing of each sphere can be told at 2 % noise.

Results: ``bench/results/body_fit.json``.
"""

from __future__ import annotations

import argparse
import csv
import datetime as _dt
import importlib.util
import json
import math
import time
from pathlib import Path

import numpy as np

from tbminv.inversion.bodyfit import AdvanceReadings, BodyFitter, bearing_difference_deg
from tbminv.studies.bodyreach import body_bearing_study

ROOT = Path(__file__).resolve().parents[1]
DATA = ROOT / "tests" / "data"
NOISE = 0.02
FLOOR = 0.006


def fixtures() -> object:
    """The fixture-making module (scenarios, layout, face)."""
    spec = importlib.util.spec_from_file_location("make_body_fixtures",
                                                  DATA / "make_body_fixtures.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def read_case(case: str) -> tuple[tuple, np.ndarray, np.ndarray]:
    """(quadrupoles, angles, noise-free R) of a fixture."""
    with open(DATA / f"body_{case}_3d.csv") as fh:
        rows = list(csv.DictReader(fh))
    quads = tuple(tuple(r[k] or None for k in "abmn") for r in rows)
    return (quads, np.array([float(r["cutterhead_deg"]) for r in rows]),
            np.array([float(r["r_ohm"]) for r in rows]))


def _in_arc(b: float, lo: float, hi: float) -> bool:
    return (b - lo) % 360.0 <= (hi - lo) % 360.0 or (hi - lo) % 360.0 == 0.0


def run(n_seeds: int, n_null: int) -> dict:
    mod = fixtures()
    lay = mod.deep_demo_layout()
    diam = 2.0 * lay.machine.radius_m
    hom = read_case("hom")
    out: dict = {"cases": {}}
    for case in ("cond", "res", "hom"):
        quads, ang, r = read_case(case)
        assert quads == hom[0] and np.array_equal(ang, hom[1])
        rng = np.random.default_rng(1000)
        reals = r[None, :] * (1.0 + NOISE * rng.standard_normal((n_seeds, r.size)))
        err = np.full(r.size, math.hypot(NOISE, FLOOR))
        rd = AdvanceReadings(quads, ang, reals[0], err, mod.FACE)
        rho, ahead, off, bearing = mod.CASES[case]
        for bg_name, bg, nuisance in (("axisym", None, "scale"),
                                      ("axisym_quadrupole_scale", None, "quadrupole"),
                                      ("3d_homogeneous", hom[2], "scale")):
            t0 = time.perf_counter()
            fits = BodyFitter(lay, mod.BACKGROUND_OHMM, nuisance=nuisance).fit_many(rd, reals,
                                                                                  bg)
            sec = time.perf_counter() - t0
            found = [f for f in fits if f.found]
            res = {"n_realisations": n_seeds, "reported": len(found) / n_seeds,
                   "seconds": round(sec, 1),
                   "p_none_median": float(np.median([f.body_p_none for f in fits])),
                   "lr_median": float(np.median([f.lr_statistic for f in fits]))}
            if rho is not None and found:
                be = np.array([bearing_difference_deg(f.body_bearing_deg, bearing)
                               for f in found])
                de = np.array([abs(f.body_ahead_m - ahead) for f in found])
                res.update({
                    "bearing_error_deg": {"median": float(np.median(be)),
                                          "p90": float(np.percentile(be, 90)),
                                          "max": float(be.max())},
                    "ahead_error_m": {"median": float(np.median(de)),
                                      "p90": float(np.percentile(de, 90)),
                                      "max": float(de.max())},
                    "within_30deg_and_half_d": float(np.mean((be <= 30.0)
                                                             & (de <= 0.5 * diam))),
                    "bearing_interval_covers": float(np.mean(
                        [_in_arc(bearing, f.body_bearing_lo_deg, f.body_bearing_hi_deg)
                         for f in found])),
                    "ahead_interval_covers": float(np.mean(
                        [f.body_ahead_lo_m <= ahead <= f.body_ahead_hi_m for f in found])),
                    "moment_sign_right": float(np.mean(
                        [(f.body_moment_m3 > 0) == (rho < mod.BACKGROUND_OHMM)
                         for f in found]))})
            out["cases"].setdefault(case, {"truth": {"resistivity_ohmm": rho,
                                                     "ahead_m": ahead, "offset_m": off,
                                                     "bearing_deg": bearing,
                                                     "radius_m": mod.RADIUS_M}})[bg_name] = res
            print(case, bg_name, json.dumps(res), flush=True)
    # false alarms of the calibrated body_p_none: many homogeneous realisations
    quads, ang, r = hom
    rng = np.random.default_rng(2000)
    reals = r[None, :] * (1.0 + NOISE * rng.standard_normal((n_null, r.size)))
    rd = AdvanceReadings(quads, ang, reals[0], np.full(r.size, math.hypot(NOISE, FLOOR)),
                         mod.FACE)
    null = {}
    for bg_name, bg, nuisance in (("axisym_quadrupole_scale", None, "quadrupole"),
                                  ("3d_homogeneous", r, "scale")):
        p = np.array([f.body_p_none for f in BodyFitter(lay, mod.BACKGROUND_OHMM,
                                                        nuisance=nuisance).fit_many(rd, reals, bg)])
        null[bg_name] = {"n_realisations": n_null,
                         "rate_p_le_0.01": float(np.mean(p <= 0.01)),
                         "rate_p_le_0.05": float(np.mean(p <= 0.05)),
                         "rate_p_le_0.20": float(np.mean(p <= 0.20))}
        print("null", bg_name, null[bg_name], flush=True)
    out["false_alarms_homogeneous"] = null
    reach = {}
    for case in ("cond", "res"):
        rho, ahead, off, bearing = mod.CASES[case]
        st = body_bearing_study(lay, bearing, off, np.arange(2.0, 16.1, 1.0),
                                radius_m=mod.RADIUS_M,
                                resistivity_ratio=rho / mod.BACKGROUND_OHMM,
                                angles_deg=mod.ANGLES, noise_rel=NOISE,
                                background_ohmm=mod.BACKGROUND_OHMM,
                                face_chainage_m=mod.FACE)
        reach[case] = {"bearing_reach_m": float(st["bearing_reach_m"]),
                       "at_grid_end": bool(st["bearing_reach_at_grid_end"]),
                       "noncentrality": dict(zip(map(float, st.distance_ahead.values),
                                                 map(float, st.bearing_noncentrality.values)))}
        print(case, "bearing reach", reach[case]["bearing_reach_m"], flush=True)
    out["bearing_reach"] = reach
    out["settings"] = {"noise_rel": NOISE, "floor": FLOOR, "diameter_m": diam,
                       "angles_deg": list(map(float, mod.ANGLES)),
                       "date": _dt.date.today().isoformat()}
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=50)
    ap.add_argument("--null", type=int, default=500)
    args = ap.parse_args()
    res = run(args.seeds, args.null)
    path = ROOT / "bench" / "results" / "body_fit.json"
    path.write_text(json.dumps(res, indent=1) + "\n")
    print("wrote", path)


if __name__ == "__main__":
    main()
