"""Calibration of the contact fit's stated uncertainty, measured by simulation.

Stated uncertainty is a product claim; this benchmark measures it. It simulates many drives,
runs the production chain after the image inversion on each (the QC error model of
:func:`tbminv.readings.advance.prepare_advances`, the running joint contact fit of
:class:`tbminv.inversion.drive.DriveInverter`, the levels of concern of
:func:`tbminv.results.ahead.detect_changes`) and counts how often the stated answers hold the
truth. Writes ``<out>/calibration.json`` and the reliability figure ``<out>/calibration.png``
and ``.svg``.

Drives (layout ``tests/data/fixture_layout.toml``: D = 6 m, steel machine and 30 m of open
tunnel in the model, deep; pole-pole and machine-pole readings with reciprocals):

* **contact drives** (``--n-drives``): ground of 50 ohm-m and a plane square to the axis
  beyond which the resistivity is ``c`` times that. ``c`` is log-uniform between 1:20 and 20:1,
  drawn as the centre of one of ``--contrast-bins`` equal-probability bins of ``log c`` (each
  bin is one forward run per distance); the contact lies 0.5 to 10 diameters ahead of the first
  face (uniform, on the lattice of the advance step). Faces advance by ``--step-m``; a drive has
  up to ``--advances`` advances and ends one diameter after the face passes the contact.
* **homogeneous drives** (``--n-homogeneous``): 50 ohm-m, the same faces; false alarms.
* **3D drives**: the bundled logs ``tests/data/drive_*.csv`` simulated with pyGIMLi's 3D finite
  elements (steel machine and open tunnel; one with the ground surface 12 m = 2 D above the
  crown: ``drive_cover12_contact01_seed19.csv``); made by ``tests/data/make_drive_fixtures.py``
  (truth below, in ``THREE_D_DRIVES``). The demo log (``tbminv/data/demo_readings.csv``) is not
  used: its layout needs its own contact table and 3D surface correction.

Forward responses: the axisymmetric model the inversion uses (preset
``InversionSettings.forward_settings``), solved once per (contrast, distance) at the exact
distances the drives need (a lattice of the advance step) and cached on disk; every drive then
draws fresh noise through :func:`tbminv.studies.simulate.simulate_drive` (Gaussian relative
noise ``--noise-rel`` plus ``--noise-abs-v``, reciprocals, ``voltage_std_v``). Nothing is
interpolated: a distance off the lattice is an error. The fit's own response table (other
distances and contrasts, interpolated) is never used to make data. The same axisymmetric
physics makes the data and the table; the 3D drives carry the modelling error.

Stand-ins: the images are not inverted here (that costs minutes per advance); every advance
gets a flat image, so :func:`detect_changes` grades the contact-fit picks only (its
section-profile fallback finds no step in a flat image). The contact table is built once at
50 ohm-m (production builds it at the first advance's median apparent resistivity; the fit
profiles the resistivity around the machine, and only the fixed tunnel lining breaks the
scaling).

Counted per advance: the running fit's interval against the true distance ahead (buckets of
the true distance in diameters; an advance without a reported contact has no interval and is
counted in ``detected``), its contrast interval against the true contrast, and the level of
concern of :func:`detect_changes` on the section up to that advance (what the report of that
shift would show). False 'likely' and 'firm' on homogeneous drives per report and per drive
(any report of the drive). Statistics, table and figure: ``bench/calibration_stats.py``.

Fields of :class:`tbminv.inversion.contactfit.ContactEstimate` that a version of the fit may
not have (``contrast_lo``, ``contrast_hi``, ``at_bound``, ``ambiguous``, ``p_false_alarm``) are
read with NaN defaults; the output says which were missing.

Usage (from the project root; about 25 min on a busy 2-core machine at the defaults, 3-4 s per
drive; the first run adds the forward responses and the contact table, about 15 min)::

    python bench/bench_calibration.py [--n-drives 200] [--n-homogeneous 200] [--seed 1]
                                      [--out bench/results]
"""

from __future__ import annotations

import argparse
import dataclasses
import datetime as _dt
import json
import logging
import math
import platform
import sys
import time
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from calibration_stats import (
    EXTRA_LEVELS,
    clean_json,
    interval_holds,
    p_none_reliability,
    print_table,
    reliability_figure,
    summarise_contact,
    summarise_homogeneous,
    verdict,
)

from tbminv.cache import atomic_path, cache_dir, cache_key
from tbminv.ground import Contact, Scenario
from tbminv.inversion.drive import DriveInverter
from tbminv.inversion.outcome import AdvanceResult
from tbminv.inversion.settings import InversionSettings
from tbminv.layout import Layout, load_layout
from tbminv.readings.advance import prepare_advances
from tbminv.readings.qc import QCSettings
from tbminv.results.ahead import LEVELS, detect_changes
from tbminv.results.section import build_section
from tbminv.studies.simulate import simulate_drive

ROOT = Path(__file__).resolve().parents[1]
DATA = ROOT / "tests" / "data"
RESULTS = Path(__file__).resolve().parent / "results"
RHO_OHMM = 50.0
CONTRAST_MAX = 20.0
OPTIONAL_FIELDS = ("contrast_lo", "contrast_hi", "at_bound", "ambiguous", "p_false_alarm")

#: 3D-simulated logs bundled with the tests, and the scenario each was made with
#: (tests/data/make_drive_fixtures.py): layout file, contrast rho2/rho1 (1: homogeneous),
#: contact chainage (m).
THREE_D_DRIVES = {
    "contact10_seed11": ("fixture_layout.toml", 10.0, 30.0),
    "contact01_seed13": ("fixture_layout.toml", 0.1, 30.0),
    "cover12_contact01_seed19": ("fixture_layout_cover12.toml", 0.1, 30.0),
    "homogeneous_seed7": ("fixture_layout.toml", 1.0, math.nan),
    "homogeneous3pc_seed17": ("fixture_layout.toml", 1.0, math.nan),
}

_LOG = logging.getLogger("bench_calibration")


# ----------------------------------------------------------------------- forward responses
def contrast_grid(n_bins: int) -> np.ndarray:
    """Centres of ``n_bins`` equal-width bins of log10 contrast in [-log10 20, log10 20]."""
    edges = np.linspace(-math.log10(CONTRAST_MAX), math.log10(CONTRAST_MAX), n_bins + 1)
    return 10.0 ** (0.5 * (edges[:-1] + edges[1:]))


@dataclass
class ResponseBank:
    """Forward responses at exact (contrast, distance ahead) points, ground of ``rho_ohmm``.

    ``r_ohm[i, j]``: the readings (``quads`` order, reciprocals included) for contrast
    ``contrasts[i]`` at ``distances_m[j]`` ahead of the face (negative: the face has passed).
    """

    quads: list[tuple]
    contrasts: np.ndarray
    distances_m: np.ndarray
    r_ohm: np.ndarray
    r0_ohm: np.ndarray
    rho_ohmm: float


def simulated_quads(layout: Layout) -> list[tuple]:
    """Quadrupoles of a simulated log (protocol plus reciprocals), as simulate_drive has them."""
    seen: list[tuple] = []
    for q in layout.measurements:
        t = tuple(None if v in (None, "") else v for v in q.labels())
        for x in (t, (t[2], t[3], t[0], t[1])):
            if x not in seen:
                seen.append(x)
    return seen


def response_bank(layout: Layout, model: Any, model_key: str, contrasts: np.ndarray,
                  distances_m: np.ndarray) -> ResponseBank:
    """Solve (or read from the cache) the forward responses of every grid point."""
    quads = simulated_quads(layout)
    key = cache_key({"layout": layout.to_dict(), "model": model_key, "rho": RHO_OHMM,
                     "c": contrasts, "d": distances_m, "quads": [list(q) for q in quads]})
    path = cache_dir("calibration-responses") / f"{key}.npz"
    if path.exists():
        with np.load(path, allow_pickle=False) as z:
            return ResponseBank(quads, contrasts, distances_m, z["r_ohm"], z["r0_ohm"], RHO_OHMM)
    t0 = time.time()
    r0 = np.asarray(model.response(Scenario.homogeneous(RHO_OHMM), 0.0, 0.0, quads), float)
    r = np.empty((contrasts.size, distances_m.size, len(quads)))
    for i, c in enumerate(contrasts):
        for j, d in enumerate(distances_m):
            sc = Scenario(RHO_OHMM, contacts=(Contact(chainage_m=float(d),
                                                      resistivity_ohmm=RHO_OHMM * float(c)),))
            r[i, j] = model.response(sc, 0.0, 0.0, quads)
        _LOG.info("forward responses: contrast %d of %d done (%.0f s)", i + 1, contrasts.size,
                  time.time() - t0)
    with atomic_path(path) as tmp:
        with open(tmp, "wb") as fh:
            np.savez(fh, r_ohm=r, r0_ohm=r0)
    return ResponseBank(quads, contrasts, distances_m, r, r0, RHO_OHMM)


class BankModel:
    """A forward model that answers only at the bank's exact points (no interpolation)."""

    def __init__(self, bank: ResponseBank, layout: Layout):
        self.bank = bank
        self.layout = layout

    def response(self, scenario: Scenario, face_chainage_m: float, cutterhead_deg: float = 0.0,
                 measurements: Sequence[tuple] | None = None) -> np.ndarray:
        """Transfer resistances of ``measurements`` (the bank's quadrupoles), ohm."""
        b = self.bank
        if measurements is None or [tuple(q) for q in measurements] != b.quads:
            raise KeyError("the response bank holds the simulated protocol only")
        if not math.isclose(scenario.background_resistivity_ohmm, b.rho_ohmm):
            raise KeyError(f"the response bank holds {b.rho_ohmm} ohm-m ground only")
        if not scenario.contacts:
            return b.r0_ohm.copy()
        con = scenario.contacts[0]
        c = con.resistivity_ohmm / b.rho_ohmm
        d = con.chainage_m - face_chainage_m
        i = np.flatnonzero(np.isclose(b.contrasts, c, rtol=1e-9, atol=0.0))
        j = np.flatnonzero(np.abs(b.distances_m - d) < 1e-6)
        if i.size != 1 or j.size != 1:
            raise KeyError(f"contrast {c:g} at {d:g} m is not in the response bank")
        return b.r_ohm[i[0], j[0]].copy()


# ----------------------------------------------------------------------- one drive
class RecordingFitter:
    """Passes every call to a contact fitter and keeps what ``fit_drive`` returned."""

    def __init__(self, fitter: Any):
        self._fitter = fitter
        self.last: list[Any] = []

    def fit_drive(self, *args: Any, **kw: Any) -> list[Any]:
        """The fitter's running joint fit; the estimates are kept in ``last``."""
        self.last = self._fitter.fit_drive(*args, **kw)
        return self.last

    def __getattr__(self, name: str) -> Any:
        return getattr(self._fitter, name)


def _get(est: Any, name: str) -> float:
    if est is None:
        return math.nan
    v = getattr(est, name, math.nan)
    try:
        return float(v)
    except (TypeError, ValueError):
        return math.nan


def _flat_results(inv: DriveInverter, data: Sequence[Any], contacts: Sequence[Any]
                  ) -> list[AdvanceResult]:
    a, r = inv.output_grid()
    aa, rr = np.meshgrid(a, r, indexing="ij")
    solid = inv._solid(aa, rr)
    out = []
    for adv, con in zip(data, contacts):
        around = getattr(con, "resistivity_around_ohmm", math.nan) if con is not None else math.nan
        rho = np.where(solid, np.nan, around if around > 0 else RHO_OHMM)
        out.append(AdvanceResult(
            advance=adv.advance, face_chainage_m=adv.face_chainage_m, ahead_m=a, radius_m=r,
            resistivity_ohmm=rho, coverage=np.where(solid, np.nan, 0.0), chi2=1.0,
            rrms_percent=2.0, iterations=1, lambda_=1.0, stop_reason="stand-in",
            converged=True, time_s=0.0, chi2_history=[1.0], n_data=adv.n_readings,
            n_used=adv.n_readings, contact=con))
    return out


def run_chain(inv: DriveInverter, data: list[Any], extra: dict[float, Any]
              ) -> list[dict[str, Any]]:
    """Contact fit and levels of concern of one drive; one record per advance."""
    fitter = inv.contact_fitter(inv.rho_ref_ohmm or RHO_OHMM)
    rec = RecordingFitter(fitter)
    inv._fitter = rec
    try:
        contacts, failed = inv._contacts(data)
    finally:
        inv._fitter = fitter
    est = rec.last if len(rec.last) == len(data) else [None] * len(data)
    extra_est: dict[float, list[Any]] = {}
    if extra:
        r, e, faces = inv._contact_data(data)
        for lvl, fit in extra.items():
            extra_est[lvl] = fit.fit_drive(r, e, faces, skip_unusable=True)
    ds = build_section(_flat_results(inv, data, contacts), "", "", "0" * 64)
    # what the grading reads: per-advance variables and the image (flat here); the rest only
    # slows the per-advance selection down
    keep = {"resistivity", "coverage", "covered"}
    ds = ds.drop_vars([v for v in ds.data_vars
                       if v not in keep and set(ds[v].dims) != {"advance"}]).load()
    out = []
    for k, adv in enumerate(data):
        s = detect_changes(ds.isel(advance=slice(0, k + 1)))
        top = s.changes[0] if s.changes else None
        es = est[k]
        row = {
            "advance": adv.advance, "face_m": adv.face_chainage_m, "fit_failed": bool(failed[k]),
            "found": bool(getattr(es, "found", False)) if es is not None else False,
            "ahead_m": _get(es, "ahead_m"), "lo_m": _get(es, "ahead_lo_m"),
            "hi_m": _get(es, "ahead_hi_m"), "contrast": _get(es, "contrast"),
            "p_no_contact": _get(es, "p_no_contact"), "p_homogeneous": _get(es, "p_homogeneous"),
            "level": s.level, "top_chainage_m": top.chainage_m if top else math.nan,
            "top_direction": top.direction if top else "",
        }
        for name in OPTIONAL_FIELDS:
            row[name] = _get(es, name)
        for lvl, ests in extra_est.items():
            x = ests[k]
            ok = x is not None and bool(getattr(x, "found", False))
            row[f"lo_{lvl}"] = _get(x, "ahead_lo_m") if ok else math.nan
            row[f"hi_{lvl}"] = _get(x, "ahead_hi_m") if ok else math.nan
        out.append(row)
    return out


# ----------------------------------------------------------------------- drives
def axisym_drives(args: argparse.Namespace, diam_m: float, rng: np.random.Generator
                  ) -> tuple[list[dict[str, Any]], np.ndarray, np.ndarray]:
    """Contact and homogeneous drive specifications, the contrasts and distances they need."""
    step = args.step_m
    contrasts = contrast_grid(args.contrast_bins)
    n_lo = int(math.ceil(0.5 * diam_m / step))
    n_hi = int(math.floor(10.0 * diam_m / step))
    specs = []
    for i in range(args.n_drives):
        x = step * int(rng.integers(n_lo, n_hi + 1))
        c = float(contrasts[int(rng.integers(contrasts.size))])
        faces = [step * k for k in range(args.advances) if x - step * k >= -diam_m - 1e-9]
        specs.append({"kind": "contact", "name": f"contact{i:04d}", "contrast": c,
                      "chainage_m": x, "faces_m": faces, "seed": int(rng.integers(2**31))})
    for i in range(args.n_homogeneous):
        specs.append({"kind": "homogeneous", "name": f"homogeneous{i:04d}", "contrast": 1.0,
                      "chainage_m": math.nan,
                      "faces_m": [step * k for k in range(args.advances)],
                      "seed": int(rng.integers(2**31))})
    # the whole lattice (not only the distances these drives need): one cached bank per layout
    n_behind = int(math.ceil(diam_m / step - 1e-9))
    dist = step * np.arange(-n_behind, n_hi + 1, dtype=float)
    return specs, contrasts, dist


def run_axisym(args: argparse.Namespace, layout: Layout, settings: InversionSettings,
               qc: QCSettings) -> tuple[pd.DataFrame, dict[str, Any]]:
    """Simulate and fit the contact and homogeneous drives."""
    rng = np.random.default_rng(args.seed)
    diam = layout.machine.diameter_m
    specs, contrasts, dist = axisym_drives(args, diam, rng)
    inv = DriveInverter(layout, settings)
    inv.rho_ref_ohmm = RHO_OHMM
    used = sorted({s["contrast"] for s in specs if s["kind"] == "contact"})
    bank = response_bank(layout, inv.model, repr(getattr(inv.model, "settings", None)),
                         contrasts, dist)
    model = BankModel(bank, layout)
    fitter = inv.contact_fitter(RHO_OHMM)
    extra = {}
    if not args.no_extra_levels:
        for lvl in EXTRA_LEVELS:
            st = dataclasses.replace(fitter.settings, confidence=lvl)
            extra[lvl] = type(fitter)(fitter.table, st)
    rows = []
    t0 = time.time()
    n_extra = 0
    for n, s in enumerate(specs):
        sc = (Scenario.homogeneous(RHO_OHMM) if s["kind"] == "homogeneous" else
              Scenario(RHO_OHMM, contacts=(Contact(s["chainage_m"], RHO_OHMM * s["contrast"]),)))
        log = simulate_drive(layout, sc, s["faces_m"], model=model, noise_rel=args.noise_rel,
                             noise_abs_v=args.noise_abs_v, seed=s["seed"])
        data = prepare_advances(log, layout, qc, label=s["name"]).advances
        data = inv.prepare(data)
        use_extra = s["kind"] == "contact" and n_extra < args.extra_level_drives
        n_extra += use_extra
        for row in run_chain(inv, data, extra if use_extra else {}):
            row["extra_levels"] = bool(use_extra and extra)
            row.update({"drive": s["name"], "kind": s["kind"], "c_true": s["contrast"],
                        "d_true": s["chainage_m"] - row["face_m"]})
            rows.append(row)
        if (n + 1) % 20 == 0:
            _LOG.info("%d of %d drives (%.0f s)", n + 1, len(specs), time.time() - t0)
    info = {"contrasts_simulated": [float(c) for c in used],
            "distances_simulated_m": [float(dist.min()), float(dist.max()), float(args.step_m)],
            "forward_model": f"axisym, preset {settings.forward_settings!r}",
            "fit_seconds": time.time() - t0, "extra_level_drives": n_extra}
    return pd.DataFrame(rows), info


def run_3d(layout_cache: dict[str, Layout], settings: InversionSettings, qc: QCSettings
           ) -> list[dict[str, Any]]:
    """The bundled 3D-simulated drives through the production chain (reference from data)."""
    out = []
    for name, (lay_file, c_true, x_true) in THREE_D_DRIVES.items():
        layout = layout_cache.setdefault(lay_file, load_layout(DATA / lay_file))
        diam = layout.machine.diameter_m
        inv = DriveInverter(layout, settings)
        data = prepare_advances(DATA / f"drive_{name}.csv", layout, qc).advances
        data = inv.prepare(data)
        rows = run_chain(inv, data, {})
        for r in rows:
            r["d_true"] = x_true - r["face_m"]
            r["c_true"] = c_true
        df = pd.DataFrame(rows)
        rec: dict[str, Any] = {"drive": name, "layout": lay_file, "contrast_true": c_true,
                               "chainage_true_m": x_true, "advances": len(df),
                               "rho_ref_ohmm": inv.rho_ref_ohmm,
                               "final_level": str(df["level"].iloc[-1]) if len(df) else ""}
        if c_true == 1.0:
            rank = df["level"].map(LEVELS.index)
            rec["false_found_advances"] = int(df["found"].sum())
            rec["highest_level"] = LEVELS[int(rank.max())] if len(df) else ""
        else:
            near = df[(df["d_true"] > 0) & (df["d_true"] <= 2 * diam)]
            fnd = near[near["found"]]
            rec["within_2D"] = {
                "advances": int(len(near)), "found": int(len(fnd)),
                "distance_holds": int(interval_holds(fnd["lo_m"].to_numpy(), fnd["hi_m"].to_numpy(),
                                             fnd["d_true"].to_numpy()).sum()),
                "contrast_holds": int(interval_holds(fnd["contrast_lo"].to_numpy(),
                                             fnd["contrast_hi"].to_numpy(),
                                             fnd["c_true"].to_numpy()).sum()),
                "contrast_interval_available": bool(np.isfinite(fnd["contrast_lo"]).any()),
                "median_abs_distance_error_m": float(np.median(np.abs(fnd["ahead_m"]
                                                                      - fnd["d_true"])))
                if len(fnd) else math.nan}
            rec["levels"] = [str(v) for v in df["level"]]
        rec["per_advance"] = [
            {k: (None if isinstance(v, float) and not math.isfinite(v) else v)
             for k, v in r.items() if k in ("face_m", "d_true", "found", "ahead_m", "lo_m",
                                            "hi_m", "contrast", "contrast_lo", "contrast_hi",
                                            "p_no_contact", "level")}
            for r in rows]
        out.append(rec)
    return out


def _shown(path: Path) -> str:
    """A path as the results show it: relative to the project, else its name only."""
    try:
        return str(path.resolve().relative_to(ROOT))
    except ValueError:
        return path.name


def main(argv: Sequence[str] | None = None) -> int:
    """Run the benchmark; write the JSON and the figure."""
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--n-drives", type=int, default=200, help="contact drives (axisym)")
    ap.add_argument("--n-homogeneous", type=int, default=200, help="homogeneous drives")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--out", type=Path, default=RESULTS, help="folder of the results")
    ap.add_argument("--advances", type=int, default=20, help="advances per drive at most")
    ap.add_argument("--step-m", type=float, default=1.5, help="advance length, m")
    ap.add_argument("--contrast-bins", type=int, default=12)
    ap.add_argument("--noise-rel", type=float, default=0.02)
    ap.add_argument("--noise-abs-v", type=float, default=1e-5)
    ap.add_argument("--no-3d", action="store_true", help="leave out the bundled 3D drives")
    ap.add_argument("--records", type=Path, default=None,
                    help="also write every simulated advance's answers to this CSV file")
    ap.add_argument("--extra-level-drives", type=int, default=100,
                    help=f"contact drives also fitted at the levels {EXTRA_LEVELS} "
                    "(coverage curve)")
    ap.add_argument("--no-extra-levels", action="store_true",
                    help="fit at the stated 95 %% only (no coverage curve over levels)")
    args = ap.parse_args(argv)
    if args.n_drives + args.n_homogeneous < 1:
        ap.error("--n-drives and --n-homogeneous: at least one drive")
    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(name)s %(message)s")
    for name in ("tbminv",):
        logging.getLogger(name).setLevel(logging.ERROR)
    t0 = time.time()
    layouts = {"fixture_layout.toml": load_layout(DATA / "fixture_layout.toml")}
    layout = layouts["fixture_layout.toml"]
    settings = InversionSettings()
    qc = QCSettings()
    df, info = run_axisym(args, layout, settings, qc)
    diam = layout.machine.diameter_m
    if args.records is not None:
        with atomic_path(args.records) as tmp:
            df.to_csv(tmp, index=False)
    contact = df[df["kind"] == "contact"]
    hom = df[df["kind"] == "homogeneous"]
    missing = [f for f in OPTIONAL_FIELDS if not np.isfinite(df[f]).any()]
    notes = [
        "images are flat stand-ins: the levels grade the contact-fit picks only",
        f"contact table at {RHO_OHMM:g} ohm-m for every axisym drive (production: the first "
        "advance's apparent resistivity)",
        "contrasts: centres of equal-probability bins of log-uniform 1:20..20:1; distances on "
        f"the {args.step_m:g} m lattice of the advance step",
        "coverage counts advances with a reported contact; 'distance_coverage_all_advances' "
        "counts a missed detection as not holding the truth",
        "an interval open beyond reach (ahead_hi_m NaN) is [lo, infinity)",
    ]
    if missing:
        notes.append("fields missing from ContactEstimate (read as NaN): " + ", ".join(missing))
    summary: dict[str, Any] = {
        "benchmark": "calibration",
        "generated_utc": _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"),
        "python": platform.python_version(),
        "arguments": {k: (_shown(v) if isinstance(v, Path) else v) for k, v in vars(args).items()},
        "layout": "tests/data/fixture_layout.toml", "machine_diameter_m": diam,
        "qc": dataclasses.asdict(qc),
        "contact_fit_settings": {k: (list(v) if isinstance(v, tuple) else v) for k, v in
                                 dataclasses.asdict(settings.contact).items()},
        "simulation": info, "missing_fields": missing, "notes": notes,
        "goals": {"interval_coverage": [0.90, 0.98], "false_likely_per_drive_max": 0.02,
                  "false_firm_per_drive_max": 0.005},
        "axisym": summarise_contact(contact, diam) if len(contact) else None,
        "homogeneous": summarise_homogeneous(hom) if len(hom) else None,
    }
    both = df[df["kind"].isin(["contact", "homogeneous"])]
    before = both[~(both["d_true"] <= 0)]
    summary["reliability"] = {"p_no_contact": p_none_reliability(both),
                              "share_no_contact": float(np.mean(~(before["d_true"] > 0)))}
    summary["drives_3d"] = [] if args.no_3d else run_3d(layouts, settings, qc)
    summary["verdict"] = verdict(summary)
    summary["seconds"] = time.time() - t0
    args.out.mkdir(parents=True, exist_ok=True)
    path = args.out / "calibration.json"
    with atomic_path(path) as tmp:
        Path(tmp).write_text(json.dumps(clean_json(summary), indent=1) + "\n")
    figs = reliability_figure(summary, args.out) if summary["axisym"] and \
        summary["homogeneous"] else []
    print_table(summary)
    print(f"\nwrote {path}" + "".join(f", {p}" for p in figs))
    return 0


if __name__ == "__main__":
    sys.exit(main())
