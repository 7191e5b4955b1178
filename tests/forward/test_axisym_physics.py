"""Axisymmetric harmonic model against closed forms (no machine, no tunnel)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from tbminv.forward.analytic import contact_potential, sphere_potential
from tbminv.forward.axisym.fields import AxElectrode, AxisymSettings
from tbminv.forward.axisym.solver import AxisymSolver

D = 6.0  # machine diameter used to scale distances, m (common practice for a mid-size TBM)


def _full_space(rho, src, rec):
    """Point source in a full space: V = rho I / (4 pi R) (any textbook, e.g. Telford et al.
    1990, Applied Geophysics 2nd ed., sec. 8.2)."""
    return rho / (4.0 * math.pi * np.linalg.norm(src - rec))


def _receivers():
    pts = []
    for dist in (0.5, 2.0, 8.0):
        for ang in (0.0, 45.0, 90.0, 180.0):
            pts.append((dist, 2.0, ang))
    pts += [(0.05, 2.5, 0.0), (0.05, 2.5, 45.0), (-3.0, 0.0, 0.0), (30.0, 4.0, 90.0)]
    return pts


@pytest.mark.parametrize("sr", [True, False])
def test_homogeneous_full_space(sr):
    """Sources on and off the axis, receivers at several distances and angles: within 0.5 %
    of rho I / (4 pi R). With ``sr=False`` (plain point loads I/(2 pi), I/pi per harmonic) this
    checks the source normalisation of the harmonic weak form itself."""
    srcs = [AxElectrode("A", 0.0, 0.0, 0.0), AxElectrode("B", 0.05, 2.0, 0.0)]
    recs = [AxElectrode(f"R{i}", x, r, t) for i, (x, r, t) in enumerate(_receivers())]
    from tbminv.forward.axisym.mesh import CylMeshSettings

    # the plain point-load field needs a finer mesh near the sources
    mesh = CylMeshSettings() if sr else CylMeshSettings(h_fine_m=0.02, growth=1.1)
    settings = AxisymSettings(mesh=mesh, singularity_removal=sr, min_harmonics=2 if sr else 40)
    f = AxisymSolver(srcs + recs, ["A", "B"], [e.label for e in recs], settings=settings)
    sol = f.solve(np.full(len(f.ground_cells), 50.0))
    g = sol.potentials()
    for js, es in enumerate(f.sources):
        for jk, ek in enumerate(f.receivers):
            sep = np.linalg.norm(es.xyz() - ek.xyz())
            if not sr and sep < 1.0:
                continue  # the plain field converges slowly next to the source
            ref = _full_space(50.0, es.xyz(), ek.xyz())
            assert g[jk, js] == pytest.approx(ref, rel=5e-3), (es.label, ek.label)


def test_potentials_any_azimuth():
    """The harmonic fields do not depend on the azimuths: turning both electrodes together
    leaves the potential unchanged; turning one follows 1/R (full-space formula)."""
    els = [AxElectrode("A", 0.05, 1.5, 0.0), AxElectrode("M", 0.05, 2.5, 30.0)]
    f = AxisymSolver(els, ["A"], ["M"])
    sol = f.solve(np.full(len(f.ground_cells), 10.0))
    for th_a, th_m in ((0.0, 30.0), (100.0, 130.0), (0.0, 170.0)):
        g = sol.potentials({"A": th_a, "M": th_m})[0, 0]
        ref = _full_space(10.0, AxElectrode("a", 0.05, 1.5, th_a).xyz(),
                          AxElectrode("m", 0.05, 2.5, th_m).xyz())
        assert g == pytest.approx(ref, rel=5e-3)


@pytest.mark.parametrize("ratio", [10.0, 0.1])
@pytest.mark.parametrize("dist_d", [0.25, 2.0, 10.0])
def test_plane_contact_square_to_axis(ratio, dist_d):
    """Plane contact square to the axis at 0.25 D ... 10 D ahead; image method with
    k = (rho2 - rho1)/(rho2 + rho1) (Telford, Geldart & Sheriff 1990, Applied Geophysics 2nd
    ed., sec. 8.3); receivers on both sides; within 1 %."""
    c = dist_d * D
    srcs = [AxElectrode("A", 0.05, 0.0, 0.0), AxElectrode("B", 0.05, 2.8, 0.0)]
    pts = [(0.05, 1.2, 0.0), (0.05, 2.8, 90.0), (0.05, 2.8, 180.0), (-3.0, 3.2, 0.0),
           (c - 0.5, 1.0, 45.0), (c + 0.5, 1.0, 180.0), (c + 3.0, 0.0, 0.0), (0.5 * c, 2.0, 0.0)]
    recs = [AxElectrode(f"R{i}", x, r, t) for i, (x, r, t) in enumerate(pts)]
    f = AxisymSolver(srcs + recs, ["A", "B"], [e.label for e in recs], extra_x=[c])
    xc = f.ground_centers()[:, 0]
    rho = np.where(xc > c, 100.0 * ratio, 100.0)
    g = f.solve(rho).potentials()
    for js, es in enumerate(f.sources):
        for jk, ek in enumerate(f.receivers):
            ref = contact_potential(100.0, 100.0 * ratio, c, es.xyz(), ek.xyz())
            assert g[jk, js] == pytest.approx(ref, rel=1e-2), (es.label, ek.label)


def _sphere_rho(f, x0, a, rho1, rho2, sub=6):
    """Cell resistivities with the sphere's volume fraction (r-weighted sub-samples)."""
    cm = f.mesh
    i, j = cm.cell_ij()
    i, j = i[f.ground_cells], j[f.ground_cells]
    t = (np.arange(sub) + 0.5) / sub
    xs = cm.x[i, None, None] + np.diff(cm.x)[i, None, None] * t[None, :, None]
    rs = cm.r[j, None, None] + np.diff(cm.r)[j, None, None] * t[None, None, :]
    inside = ((xs - x0) ** 2 + rs**2) < a * a
    frac = np.sum(inside * rs, axis=(1, 2)) / np.sum(rs + 0 * xs, axis=(1, 2))
    sig = frac / rho2 + (1 - frac) / rho1
    return 1.0 / sig


@pytest.mark.parametrize("rho2", [10.0, 1000.0])
def test_sphere_on_axis(rho2):
    """Conducting / resistive sphere centred on the axis, point source on the axis: total
    potential within 1 % of the series solution (Van Nostrand & Cook 1966, USGS Prof. Paper
    499; :func:`tbminv.forward.analytic.sphere_potential`); the anomalous part within 5 %."""
    rho1, a, x0 = 100.0, 1.5, 3.5
    srcs = [AxElectrode("A", 0.05, 0.0, 0.0)]
    pts = [(0.5, 0.0, 0.0), (0.05, 1.0, 0.0), (3.5, 2.5, 90.0), (6.0, 0.0, 0.0),
           (-2.0, 1.0, 180.0), (8.0, 2.0, 0.0)]
    recs = [AxElectrode(f"R{i}", x, r, t) for i, (x, r, t) in enumerate(pts)]
    lines_x = list(np.arange(x0 - a, x0 + a + 1e-9, 0.1))
    lines_r = list(np.arange(0.1, a + 1e-9, 0.1))
    from tbminv.forward.axisym.solver import AxisymSolver as F

    f = F(srcs + recs, ["A"], [e.label for e in recs], extra_x=lines_x, extra_r=lines_r)
    g = f.solve(_sphere_rho(f, x0, a, rho1, rho2)).potentials()
    for jk, (x, r, _) in enumerate(pts):
        rec = np.array([x, 0.0, r])
        total = float(sphere_potential(rho1, rho2, np.array([x0, 0.0, 0.0]), a,
                                       np.array([0.05, 0.0, 0.0]), rec))
        prim = rho1 / (4 * math.pi * math.hypot(x - 0.05, r))
        anomaly = total - prim
        assert g[jk, 0] == pytest.approx(total, rel=1e-2)
        assert g[jk, 0] - prim == pytest.approx(anomaly, rel=5e-2, abs=2e-3 * abs(total))
