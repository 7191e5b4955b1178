"""Time and accuracy of the axisymmetric model vs mesh size and harmonic count.

Demo layout (machine, tunnel, 19 electrodes), a 24-quadrupole protocol taken evenly from the
demo protocol, ground 80 ohm-m with a 12 ohm-m contact 15 m ahead of the face. Error: largest
relative difference of the transfer resistances against the finest setting. Writes
bench/results/axisym.json.
"""

from __future__ import annotations

import dataclasses
import json
import os
import platform
import time
from pathlib import Path

import numpy as np

from tbminv.forward.axisym.fields import HAVE_CHOLMOD, AxisymSettings
from tbminv.forward.axisym.layout import AxisymLayoutSolver
from tbminv.forward.axisym.mesh import CylMeshSettings
from tbminv.ground import Scenario
from tbminv.layout import demo_layout_path, load_layout

FACE = 1200.0
OUT = Path(__file__).parent / "results" / "axisym.json"


def protocol_layout(n: int = 24):
    lay = load_layout(demo_layout_path())
    qs = lay.measurements
    pick = tuple(qs[i] for i in np.linspace(0, len(qs) - 1, n).astype(int))
    return dataclasses.replace(lay, explicit_measurements=pick, generators=())


def run_case(lay, sc, settings, jac=True, extra_x=()):
    t0 = time.perf_counter()
    model = AxisymLayoutSolver(lay, face_chainage_m=FACE, settings=settings,
                                      extra_x=extra_x)
    t_build = time.perf_counter() - t0
    rho = model.ground_resistivity(sc, FACE)
    t0 = time.perf_counter()
    r = model.response(rho)
    t_fwd = time.perf_counter() - t0
    t_jac = float("nan")
    if jac:
        t0 = time.perf_counter()
        model.jacobian(rho)
        t_jac = time.perf_counter() - t0
    fw = model.forward
    return r, {"nodes": fw.mesh.n_nodes, "harmonics_max": fw.m_max,
               "sources": len(fw.sources), "receivers": len(fw.receivers),
               "build_s": round(t_build, 3), "forward_s": round(t_fwd, 3),
               "jacobian_s": round(t_jac, 3)}


def main() -> None:
    lay = protocol_layout()
    sc = Scenario.from_dict({"background_resistivity_ohmm": 80.0,
                             "contact": [{"chainage_m": FACE + 15.0,
                                          "resistivity_ohmm": 12.0}]})
    # reference: fine mesh with the contact on a mesh line, many harmonics
    ref_settings = AxisymSettings(mesh=CylMeshSettings(h_fine_m=0.0125, growth=1.15),
                                  harmonic_factor=5.0, max_harmonics=120)
    r_ref, info_ref = run_case(lay, sc, ref_settings, jac=False, extra_x=[15.0])
    rows = [{"label": "reference (contact on a mesh line)", **info_ref,
             "h_fine_m": 0.0125, "growth": 1.15, "harmonic_factor": 5.0}]
    # the cases fill the mesh as in use: contact not on a line, series average in cells
    d = AxisymSettings()
    f = AxisymSettings.fast()
    cases = [("default", d), ("fast", f)] + [
        (f"h{h}_g{g}_hf{hf}", AxisymSettings(mesh=CylMeshSettings(h_fine_m=h, growth=g),
                                             harmonic_factor=hf))
        for h, g, hf in [(0.025, 1.2, 3.5), (0.05, 1.2, 3.5), (0.1, 1.25, 2.0)]]
    for label, s in cases:
        h, g, hf = s.mesh.h_fine_m, s.mesh.growth, s.harmonic_factor
        r, info = run_case(lay, sc, s)
        err = np.abs(r / r_ref - 1)
        rows.append({"label": label, "h_fine_m": h, "growth": g,
                     "harmonic_factor": hf, **info,
                     "max_rel_error": float(np.max(err)),
                     "median_rel_error": float(np.median(err))})
        print(rows[-1], flush=True)
    out = {"what": "axisymmetric forward / Jacobian timing vs mesh and harmonics, "
                   "24-quadrupole protocol of the demo layout, contact 15 m ahead",
           "solver": "CHOLMOD (scikit-sparse)" if HAVE_CHOLMOD else "scipy SuperLU",
           "cpu_count": os.cpu_count(), "machine": platform.machine(),
           "python": platform.python_version(), "rows": rows}
    OUT.parent.mkdir(parents=True, exist_ok=True)
    OUT.write_text(json.dumps(out, indent=2))


if __name__ == "__main__":
    main()
