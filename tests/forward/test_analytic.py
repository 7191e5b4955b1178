"""Closed forms of the forward layer: the full-space geometric factor."""

from __future__ import annotations

import math

import numpy as np
import pytest

from tbminv.forward.analytic import full_space_geometric_factor
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
