"""Closed forms of the forward layer: the full-space geometric factor, the plane contact."""

from __future__ import annotations

import math

import numpy as np
import pytest

from tbminv.forward.analytic import contact_potential, full_space_geometric_factor
from tbminv.gimli import ert, pg

NAN3 = np.full((1, 3), np.nan)


def test_full_space_factor_closed_forms():
    """Point source in a full space, V = rho I / (4 pi r) (Telford, Geldart & Sheriff 1990,
    Applied Geophysics, 2nd ed., ch. 8; section number not checked, from memory): Wenner
    spacing a -> k = 4 pi a; pole-pole -> 4 pi AM; pole-dipole -> 4 pi / (1/AM - 1/AN)."""
    a = 2.5
    p = [np.array([[x, 0.0, 0.0]]) for x in (0.0, a, 2 * a, 3 * a)]
    assert full_space_geometric_factor(p[0], p[3], p[1], p[2])[0] == pytest.approx(4 * math.pi * a)
    assert full_space_geometric_factor(p[0], NAN3, p[1], NAN3)[0] == pytest.approx(4 * math.pi * a)
    assert full_space_geometric_factor(p[0], NAN3, p[1], p[2])[0] == pytest.approx(
        4 * math.pi / (1 / a - 1 / (2 * a)))
    assert np.isnan(full_space_geometric_factor(NAN3, p[1], p[2], p[3])[0])


def test_full_space_factor_matches_pygimli_deep_limit():
    """pyGIMLi's geometricFactors for buried electrodes (half space with an image) tends to the
    full-space factor when the electrodes are deep: at 1e4 m depth they agree to 1e-3."""
    rng = np.random.default_rng(3)
    pts = rng.uniform(-3, 3, (4, 3)) + np.array([0.0, 0.0, -1e4])
    data = pg.DataContainerERT()
    for p in pts:
        data.createSensor(pg.Pos(*p))
    quads = [(0, 1, 2, 3), (0, -1, 2, 3), (0, -1, 1, -1), (1, 3, 0, 2)]
    data.resize(len(quads))
    for j, c in enumerate("abmn"):
        data.set(c, pg.Vector([float(q[j]) for q in quads]))
    ref = np.array(ert.geometricFactors(data, 3))

    def at(col):
        return np.array([pts[q[col]] if q[col] >= 0 else [np.nan] * 3 for q in quads])

    ours = full_space_geometric_factor(at(0), at(1), at(2), at(3))
    np.testing.assert_allclose(ours, ref, rtol=1e-3)


@pytest.mark.parametrize("rho2", [5.0, 500.0])
@pytest.mark.parametrize("src_x", [-2.0, 3.0])
def test_contact_potential_meets_the_interface_conditions(rho2, src_x):
    """The plane-contact potential solves the boundary-value problem that defines it, checked
    without the image construction: at the contact the potential is continuous and so is the
    normal current density (1/rho) dV/dx (Telford, Geldart & Sheriff 1990, sec. 8.3, from
    memory); away from it V is harmonic (zero Laplacian, by central differences); with equal
    resistivities it is the full-space potential (sec. 8.2). Source on either side."""
    rho1, c, h = 50.0, 1.0, 1e-4
    src = np.array([src_x, 0.3, -0.2])

    def v(x, y, z):
        return float(contact_potential(rho1, rho2, c, src, np.array([x, y, z])))

    for y, z in ((0.0, 0.0), (1.5, -0.7), (-3.0, 2.0)):
        below, above = v(c - 1e-9, y, z), v(c + 1e-9, y, z)
        assert above == pytest.approx(below, rel=1e-7)
        e_below = (v(c - h, y, z) - v(c - 2 * h, y, z)) / h
        e_above = (v(c + 2 * h, y, z) - v(c + h, y, z)) / h
        assert e_above / rho2 == pytest.approx(e_below / rho1, rel=2e-3)
    for p in ((-4.0, 1.0, 0.5), (0.2, -0.4, 0.9), (5.0, 2.0, -1.0)):
        d2 = [(v(*(np.array(p) + d)) - 2 * v(*p) + v(*(np.array(p) - d))) / 1e-6
              for d in np.eye(3) * 1e-3]
        assert abs(sum(d2)) < 1e-4 * max(abs(x) for x in d2)
    rec = np.array([4.0, -1.0, 2.0])
    assert float(contact_potential(rho1, rho1, c, src, rec)) == pytest.approx(
        rho1 / (4 * math.pi * np.linalg.norm(rec - src)), rel=1e-12)
