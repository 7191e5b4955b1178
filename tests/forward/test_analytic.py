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


# ------------------------------------------------------------------ sphere, Legendre series
SPHERE_C = np.array([10.0, 2.0, -1.0])
SPHERE_A = 2.0
SPHERE_SRC = np.array([0.0, 0.0, 0.0])


def _points_outside(n: int, seed: int = 1) -> np.ndarray:
    pts = np.random.default_rng(seed).uniform(-10.0, 20.0, (n, 3))
    return pts[np.linalg.norm(pts - SPHERE_C, axis=1) > 1.01 * SPHERE_A]


def test_sphere_series_perfect_conductor_is_kelvin_image():
    """A floating, perfectly conducting sphere (rho2 -> 0): Kelvin's image, charge -q a/s at
    a^2/s from the centre plus +q a/s at the centre (Jackson 1999, Classical Electrodynamics,
    3rd ed., sec. 2.2-2.3, from memory). rho2 = 1e-9 rho1 agrees to 1e-8."""
    from tbminv.forward.analytic import sphere_potential

    rec = _points_outside(300)
    v = sphere_potential(100.0, 1e-7, SPHERE_C, SPHERE_A, SPHERE_SRC, rec, current_a=2.0)
    s = np.linalg.norm(SPHERE_SRC - SPHERE_C)
    img = SPHERE_C + (SPHERE_SRC - SPHERE_C) / s * SPHERE_A ** 2 / s
    kelvin = 100.0 * 2.0 / (4 * math.pi) * (
        1 / np.linalg.norm(rec - SPHERE_SRC, axis=1)
        - SPHERE_A / s / np.linalg.norm(rec - img, axis=1)
        + SPHERE_A / s / np.linalg.norm(rec - SPHERE_C, axis=1))
    np.testing.assert_allclose(v, kelvin, rtol=1e-8)


def test_sphere_series_equal_resistivity_is_full_space():
    """rho2 = rho1: no anomaly, V = rho I / (4 pi R) (Telford, Geldart & Sheriff 1990, ch. 8)."""
    from tbminv.forward.analytic import full_space_potential, sphere_potential

    rec = _points_outside(100)
    np.testing.assert_allclose(
        sphere_potential(30.0, 30.0, SPHERE_C, SPHERE_A, SPHERE_SRC, rec),
        full_space_potential(30.0, SPHERE_SRC, rec), rtol=1e-12)


@pytest.mark.parametrize("rho2", [3.0, 1000.0, math.inf])
def test_sphere_series_boundary_conditions(rho2):
    """The series satisfies the boundary-value problem it solves (Van Nostrand & Cook 1966,
    USGS Professional Paper 499): the potential and the normal current density rho^-1 dV/dr are
    continuous across the sphere's surface (one-sided second-order differences, h = 1e-4 a)."""
    from tbminv.forward.analytic import sphere_potential

    rho1 = 100.0
    dirs = np.random.default_rng(4).normal(size=(40, 3))
    dirs /= np.linalg.norm(dirs, axis=1)[:, None]
    h = 1e-4 * SPHERE_A

    def v(rr):
        return sphere_potential(rho1, rho2, SPHERE_C, SPHERE_A, SPHERE_SRC, SPHERE_C + rr * dirs)

    v_in, v_out = v(SPHERE_A - 1e-12), v(SPHERE_A + 1e-12)
    np.testing.assert_allclose(v_in, v_out, rtol=1e-9)
    j_out = (-3 * v_out + 4 * v(SPHERE_A + h) - v(SPHERE_A + 2 * h)) / (2 * h) / rho1
    scale = np.abs(j_out).max()
    if math.isinf(rho2):  # insulating sphere: no current crosses it
        assert np.max(np.abs(j_out)) < 1e-6 * np.max(np.abs(v_out)) / SPHERE_A / rho1
    else:
        j_in = (3 * v_in - 4 * v(SPHERE_A - h) + v(SPHERE_A - 2 * h)) / (2 * h) / rho2
        np.testing.assert_allclose(j_in, j_out, rtol=1e-5, atol=1e-5 * scale)


def test_sphere_series_far_sphere_is_a_dipole():
    """A small sphere far from source and receiver responds as the dipole induced by a uniform
    field: anomaly = rho1 I/(4 pi) (rho2 - rho1)/(rho1 + 2 rho2) a^3 cos(gamma) / (s^2 r^2)
    (Telford, Geldart & Sheriff 1990, sec. 8.3, sphere in a uniform field, from memory). With
    a / s = a / r = 0.01 the two agree to 1e-3."""
    from tbminv.forward.analytic import full_space_potential, sphere_potential

    a, c = 0.1, np.array([0.0, 0.0, 0.0])
    src = np.array([10.0, 0.0, 0.0])
    rec = np.array([[0.0, 10.0, 0.0], [-10.0, 0.1, 0.0], [6.0, 8.0, 0.0]])
    for rho1, rho2 in ((100.0, 1.0), (100.0, 1e4)):
        anomaly = (sphere_potential(rho1, rho2, c, a, src, rec)
                   - full_space_potential(rho1, src, rec))
        cosg = rec @ src / (np.linalg.norm(rec, axis=1) * 10.0)
        dip = (rho1 / (4 * math.pi) * (rho2 - rho1) / (rho1 + 2 * rho2) * a ** 3 * cosg
               / (100.0 * np.linalg.norm(rec, axis=1) ** 2))
        keep = np.abs(cosg) > 0.05
        np.testing.assert_allclose(anomaly[keep], dip[keep], rtol=1e-3)


def test_sphere_series_source_inside_is_refused():
    from tbminv.forward.analytic import sphere_potential

    with pytest.raises(ValueError, match="not outside the sphere"):
        sphere_potential(1.0, 2.0, SPHERE_C, SPHERE_A, SPHERE_C + 0.5, SPHERE_SRC[None])
