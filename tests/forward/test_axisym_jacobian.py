"""Jacobian of the axisymmetric model against finite differences (common practice, no
source: a derivative must match its difference quotient)."""

from __future__ import annotations

import numpy as np
import pytest

from tbminv.forward.axisym.fields import AxElectrode, AxisymSettings
from tbminv.forward.axisym.mesh import CylGeometry, CylMeshSettings
from tbminv.forward.axisym.solver import AxisymSolver

GEO = CylGeometry(machine_radius_m=3.1, shield_length_m=9.5, tunnel_length_m=20.0)
MESH = CylMeshSettings(h_fine_m=0.1, growth=1.3, domain_m=200.0)
PAIRS = [("A", "M"), ("A", "N"), ("B", "M"), ("S", "M"), ("A", "S"), ("S", "S"), ("B", "N")]


@pytest.fixture(scope="module")
def case():
    els = [AxElectrode("A", 0.2, 1.0, 0.0), AxElectrode("M", 0.2, 2.5, 90.0),
           AxElectrode("B", -3.0, 3.4, 180.0), AxElectrode("N", 3.0, 0.0, 0.0),
           AxElectrode("S", on_steel=True)]
    f = AxisymSolver(els, ["A", "B", "S"], ["M", "N", "S"], GEO, AxisymSettings(mesh=MESH))
    rng = np.random.default_rng(1)
    rho = np.exp(rng.normal(np.log(100.0), 0.3, len(f.ground_cells)))
    for lab in ("A", "B"):  # cells around a current electrode share one resistivity
        rho[np.searchsorted(f.ground_cells, f._node_cells[f.node_of[lab]])] = 50.0
    jac, _ = f.jacobian(rho, PAIRS)
    return f, rho, jac


def _values(f, rho):
    g = f.solve(rho).potentials()
    return np.array([g[f.receiver_index[k], f.source_index[s]] for s, k in PAIRS])


def test_jacobian_not_all_zero(case):
    _, _, jac = case
    assert np.count_nonzero(jac) > 0.5 * jac.size
    assert np.all(np.isfinite(jac))


def test_jacobian_matches_finite_differences(case):
    f, rho, jac = case
    v0 = _values(f, rho)
    c = f.ground_centers()
    for x, r in [(1.0, 1.0), (0.3, 2.0), (5.0, 3.0), (-5.0, 4.0), (-2.9, 3.5), (10.0, 1.0)]:
        i = int(np.argmin(np.hypot(c[:, 0] - x, c[:, 1] - r)))
        eps = 1e-4
        r2 = rho.copy()
        r2[i] *= np.exp(eps)
        fd = (_values(f, r2) - v0) / eps
        np.testing.assert_allclose(jac[:, i], fd, rtol=2e-2, atol=1e-3 * np.abs(fd).max())


def test_jacobian_cells_around_current_electrode(case):
    """The cells around a current electrode together (they share one resistivity)."""
    f, rho, jac = case
    v0 = _values(f, rho)
    for lab in ("A", "B"):
        gi = np.searchsorted(f.ground_cells, f._node_cells[f.node_of[lab]])
        r2 = rho.copy()
        r2[gi] *= np.exp(1e-4)
        fd = (_values(f, r2) - v0) / 1e-4
        np.testing.assert_allclose(jac[:, gi].sum(axis=1), fd, rtol=2e-2,
                                   atol=1e-3 * np.abs(fd).max())
