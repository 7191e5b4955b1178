"""Per-advance cost of the drive inversion against pyGIMLi's stock ERT manager.

``ours``
    :class:`tbminv.invert.DriveInverter`: the axisymmetric operator and the parameter grid are
    built once for the layout and reused; each advance starts from the previous model shifted
    by the advance (warm start). ``--time-lapse`` adds the difference-to-previous-model
    regularisation.
``stock``
    ``pygimli.physics.ert.ERTManager`` on a 3D tetgen mesh of the machine and tunnel, rebuilt
    for every advance (mesh cache off), steel and bore as fixed regions (steel 1e-5 ohm-m,
    bore at the lining resistivity), ground cells inverted with the manager's default smoothness,
    cold start from the median apparent resistivity, the manager's default forward mesh
    refinement. Its geometric factors come from a homogeneous run on the same refined mesh with
    the bodies in (the stock numerical factors leave them out).

Both invert the same readings (tests/data/drive_contact10_seed11.csv, made with the 3D model
and 2 % noise, seed 11) with the same QC error model; both stop at chi-squared 1 or after the
same number of iterations. Each method runs in a child process so its peak memory (max RSS) is
its own. Time inside the linear solver: for ours every sparse factorisation and solve (timed
by wrapping them); for the stock manager the share of its forward and Jacobian calls (the
solver itself runs in C++ and cannot be separated from assembly there).

Run from the project root::

    python bench/bench_invert.py            # writes bench/results/invert.json
"""

from __future__ import annotations

import argparse
import json
import platform
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
DATA = ROOT / "tests" / "data"
OUT = Path(__file__).parent / "results" / "invert.json"
DRIVE = "contact10_seed11"
MAX_ITER = 8


def _data(advances: list[int]):
    from tbminv.layout import load_layout
    from tbminv.readings.advance import prepare_advances
    from tbminv.readings.qc import QCSettings

    layout = load_layout(DATA / "fixture_layout.toml")
    data = prepare_advances(DATA / f"drive_{DRIVE}.csv", layout,
                            QCSettings(error_model_group="log")).advances
    return layout, [data[i] for i in advances]


_SOLVER_S = [0.0]


def _time_solver() -> None:
    """Time every sparse factorisation and solve of the axisymmetric model.

    CHOLMOD's Cython functions are invisible to cProfile, so the factorisation and the returned
    solve callable are wrapped here.
    """
    from tbminv.forward.axisym import layout as axisym

    orig = axisym.AxisymSolver._factor

    def factor(self, m, a_red, _orig=orig):
        t = time.perf_counter()
        f = _orig(self, m, a_red)
        _SOLVER_S[0] += time.perf_counter() - t

        def solve(b, _f=f):
            t1 = time.perf_counter()
            out = _f(b)
            _SOLVER_S[0] += time.perf_counter() - t1
            return out

        return solve

    axisym.AxisymSolver._factor = factor


def run_ours(advances: list[int], time_lapse: bool) -> dict:
    from tbminv.inversion.drive import DriveInverter
    from tbminv.inversion.settings import InversionSettings

    layout, data = _data(advances)
    settings = InversionSettings(max_iter=MAX_ITER, contact_fit=False, time_lapse=time_lapse)
    _time_solver()
    t0 = time.perf_counter()
    inv = DriveInverter(layout, settings)
    inv.operator(data[0].face_chainage_m, data[0].cutterhead_deg)
    t_setup = time.perf_counter() - t0
    res = inv.run(data)
    total = time.perf_counter() - t0
    rows = [{"advance": r.advance, "face_chainage_m": r.face_chainage_m, "chi2": r.chi2,
             "iterations": r.iterations, "time_s": r.time_s} for r in res]
    models = [_section_row(r) for r in res]
    return {"method": "ours-timelapse" if time_lapse else "ours", "setup_s": t_setup,
            "total_s": total, "advances": rows, "solver_s": _SOLVER_S[0],
            "n_param": int(inv.grid.n_param), "models": models}


def _section_row(r) -> dict:
    """Axial profile near the axis (ground frame) for the advance-to-advance comparison."""
    a, rad = r.ahead_m, r.radius_m
    rho = r.resistivity_ohmm
    near = rad <= 3.0
    prof = np.nanmedian(np.where(np.isfinite(rho[:, near]), rho[:, near], np.nan), axis=1)
    return {"chainage_m": (r.face_chainage_m + a).tolist(), "rho_ohmm": prof.tolist()}


def run_stock(advances: list[int]) -> dict:
    from tbminv.forward.fem3d.mesh import MeshSettings, layout_mesh
    from tbminv.gimli import configure_operator, ert, ert_data_container, pg

    layout, data = _data(advances)
    rows = []
    t_fwd = [0.0]
    t_all0 = time.perf_counter()
    for adv in data:
        t0 = time.perf_counter()
        tm = layout_mesh(layout, adv.face_chainage_m, adv.cutterhead_deg, MeshSettings(),
                         use_cache=False)
        t_mesh = time.perf_counter() - t0
        mesh = pg.Mesh(tm.mesh)
        node = dict(tm.electrode_nodes)
        for e in layout.electrodes:
            if e.kind == "machine":
                node[e.label] = tm.steel_node
        pos = np.asarray(mesh.positions())
        idx = {lab: i for i, lab in enumerate(lab for lab, nd in node.items() if nd is not None)}
        use = np.array([qi for qi in range(len(layout.measurements))
                        if np.isfinite(adv.r_ohm[qi]) and np.isfinite(adv.rel_error[qi])])
        scheme = ert_data_container(
            [pos[node[lab]] for lab in idx],
            [[idx.get(x, -1) if x is not None else -1 for x in layout.measurements[qi].labels()]
             for qi in use])
        markers = np.asarray(mesh.cellMarkers())
        steel = np.unique(markers[tm.steel_mask()])
        bore = np.unique(markers[tm.region_mask("tunnel")])
        ground = np.unique(markers[tm.region_mask("ground")])
        # geometric factors: homogeneous ground with the bodies in, same refined mesh
        rho0 = 50.0
        cells = np.full(mesh.cellCount(), rho0)
        cells[tm.steel_mask()] = 1e-5
        cells[tm.region_mask("tunnel")] = layout.tunnel.lining_resistivity_ohmm
        fk = ert.ERTModelling(sr=False)
        configure_operator(fk)
        fk.setData(scheme)
        m2 = mesh.createH2()
        fk.setMesh(m2, ignoreRegionManager=True)
        child = np.asarray(m2.cellMarkers())  # H2 children keep the parents' markers
        rc = np.full(m2.cellCount(), rho0)
        for mk in steel:
            rc[child == mk] = 1e-5
        for mk in bore:
            rc[child == mk] = layout.tunnel.lining_resistivity_ohmm
        r_hom = np.array(fk.response(pg.Vector(rc)))
        k = rho0 / r_hom
        scheme.set("k", pg.Vector(k))
        scheme.set("rhoa", pg.Vector(k * adv.r_ohm[use]))
        scheme.set("err", pg.Vector(adv.rel_error[use]))
        mgr = ert.ERTManager(sr=False, verbose=False)
        mgr.setData(scheme)
        mgr.setMesh(mesh)
        configure_operator(mgr.fop)
        for mk in steel:
            mgr.fop.setRegionProperties(int(mk), fix=1e-5)
        for mk in bore:
            mgr.fop.setRegionProperties(int(mk), fix=layout.tunnel.lining_resistivity_ohmm)
        for mk in ground:
            mgr.fop.setRegionProperties(int(mk), background=False)
        fop = mgr.fop
        resp0, jac0 = fop.response, fop.createJacobian

        def response(model, _f=resp0):
            t = time.perf_counter()
            out = _f(model)
            t_fwd[0] += time.perf_counter() - t
            return out

        def jacobian(model, *a, _f=jac0, **kw):
            t = time.perf_counter()
            out = _f(model, *a, **kw)
            t_fwd[0] += time.perf_counter() - t
            return out

        fop.response, fop.createJacobian = response, jacobian
        start = float(np.median(k * adv.r_ohm[use]))
        t1 = time.perf_counter()
        mgr.invert(lam=100.0, startModel=start, maxIter=MAX_ITER, stopAtChi1=True,
                   verbose=False, limits=[0.1, 1e5])
        t_inv = time.perf_counter() - t1
        rows.append({"advance": adv.advance, "face_chainage_m": adv.face_chainage_m,
                     "chi2": float(mgr.inv.chi2()),
                     "iterations": max(0, len(mgr.inv.chi2History) - 1),
                     "time_s": time.perf_counter() - t0, "mesh_s": t_mesh,
                     "invert_s": t_inv, "n_param": int(len(np.asarray(mgr.fw.model))),
                     "n_cells": int(mesh.cellCount()),
                     "n_fwd_cells": int(fop.mesh().cellCount())})
    total = time.perf_counter() - t_all0
    return {"method": "stock", "setup_s": 0.0, "total_s": total, "advances": rows,
            "solver_s": t_fwd[0], "solver_note": "forward + Jacobian calls (assembly included)"}


def _child(args: argparse.Namespace) -> None:
    adv = [int(a) for a in args.advances.split(",")]
    out = run_stock(adv) if args.method == "stock" else run_ours(adv, args.method == "ours-tl")
    out["peak_rss_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    print("RESULT " + json.dumps(out))


def _spawn(method: str, advances: str) -> dict:
    cmd = [sys.executable, __file__, "--child", "--method", method, "--advances", advances]
    p = subprocess.run(cmd, capture_output=True, text=True, cwd=ROOT)
    for line in p.stdout.splitlines():
        if line.startswith("RESULT "):
            return json.loads(line[7:])
    raise RuntimeError(f"{method} failed:\n{p.stderr[-4000:]}")


def _summary(r: dict) -> dict:
    adv = r["advances"]
    t = np.array([a["time_s"] for a in adv])
    return {"method": r["method"], "advances": len(adv),
            "mean_time_per_advance_s": float((r["total_s"]) / len(adv)),
            "median_inversion_time_s": float(np.median(t)),
            "mean_chi2": float(np.mean([a["chi2"] for a in adv])),
            "mean_iterations": float(np.mean([a["iterations"] for a in adv])),
            "peak_rss_mb": r["peak_rss_mb"],
            "solver_share": float(r["solver_s"] / r["total_s"])}


def _consistency(r: dict) -> dict:
    """Advance-to-advance change of the near-axis profile, ground frame, and error vs truth."""
    ms = r["models"]
    diffs = []
    errs = []
    for m in ms:
        c, p = np.array(m["chainage_m"]), np.array(m["rho_ohmm"])
        truth = np.where(c < 30.0, 50.0, 500.0)
        ok = np.isfinite(p) & (c > m["chainage_m"][0]) & (np.abs(c - 30.0) > 3.0)
        errs.append(np.abs(np.log10(p[ok] / truth[ok])))
    for m0, m1 in zip(ms[:-1], ms[1:]):
        c0, p0 = np.array(m0["chainage_m"]), np.array(m0["rho_ohmm"])
        c1, p1 = np.array(m1["chainage_m"]), np.array(m1["rho_ohmm"])
        q = np.interp(c1, c0, np.log10(p0), left=np.nan, right=np.nan)
        ok = np.isfinite(q) & np.isfinite(p1)
        diffs.append(np.abs(np.log10(p1[ok]) - q[ok]))
    d = np.concatenate(diffs) if diffs else np.array([np.nan])
    e = np.concatenate(errs)
    return {"median_change_log10": float(np.nanmedian(d)),
            "p90_change_log10": float(np.nanpercentile(d, 90)),
            "median_error_log10_vs_truth": float(np.nanmedian(e))}


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--child", action="store_true")
    ap.add_argument("--method", default="ours")
    ap.add_argument("--advances", default="6,7,8,9")
    ap.add_argument("--stock-advances", default="6,7")
    ap.add_argument("--tl-advances", default="0,1,2,3,4,5,6,7,8,9,10,11")
    args = ap.parse_args()
    if args.child:
        _child(args)
        return
    ours = _spawn("ours", args.advances)
    stock = _spawn("stock", args.stock_advances)
    warm = _spawn("ours", args.tl_advances)
    tl = _spawn("ours-tl", args.tl_advances)
    s_ours, s_stock = _summary(ours), _summary(stock)
    result = {
        "machine": platform.platform(), "python": platform.python_version(),
        "drive": DRIVE, "max_iter": MAX_ITER,
        "ours": {**s_ours, "setup_s": ours["setup_s"], "n_param": ours["n_param"],
                 "per_advance": ours["advances"]},
        "stock": {**s_stock, "per_advance": stock["advances"],
                  "solver_note": stock["solver_note"]},
        "speedup_per_advance": s_stock["mean_time_per_advance_s"]
        / s_ours["mean_time_per_advance_s"],
        "time_lapse": {"advances": args.tl_advances,
                       "warm": {**_summary(warm), **_consistency(warm)},
                       "time_lapse": {**_summary(tl), **_consistency(tl)}},
    }
    OUT.parent.mkdir(parents=True, exist_ok=True)
    OUT.write_text(json.dumps(result, indent=2))
    print(json.dumps({k: result[k] for k in ("speedup_per_advance",)}, indent=2))
    print(json.dumps(result["ours"] | {"per_advance": None}, indent=2))
    print(json.dumps(result["stock"] | {"per_advance": None}, indent=2))
    print(json.dumps(result["time_lapse"], indent=2))


if __name__ == "__main__":
    main()
