"""Linearised 3D image ahead of the face (tbminv.inversion.bodyimage)."""

from __future__ import annotations

import numpy as np

from tbminv.forward.axisym.fields import AxisymSettings
from tbminv.inversion.bodyfit import AdvanceReadings, BodyFitter
from tbminv.inversion.bodyimage import ImageGrid, body_image
from tests.studies.test_bodyreach import _layout


def test_image_points_to_the_body_bearing():
    """Linearised data of a small conductive body at bearing 130 deg, 3 m ahead, 2 m off the
    axis (first-order data from this project's sensitivity, no noise, 0.1 % stated error):
    the image's strongest sector is the body's (30 deg sectors), positive (more conductive),
    and the misfit meets the discrepancy target (measured with this project's model, this
    file)."""
    lay = _layout()
    quads = [q.labels() for q in lay.measurements]
    ang = np.repeat(np.arange(0.0, 360.0, 30.0), len(quads))
    meas = tuple(quads) * 12
    fitter = BodyFitter(lay, 100.0, sensitivity_options={"settings": AxisymSettings.fast(),
                                                          "m_max": 12})
    base = AdvanceReadings(meas, ang, np.ones(ang.size), np.full(ang.size, 0.001), 0.0)
    prep = fitter.prepare(base)
    sens = fitter.sensitivity
    r0 = prep["r0"]
    h = sens.density(prep["qi"], ang, np.array([[3.0, 2.0, 130.0]]))[:, 0] / r0
    r = r0 * np.exp(50.0 * h)
    rd = AdvanceReadings(meas, ang, r, np.full(ang.size, 0.001), 0.0)
    grid = ImageGrid.for_diameter(6.0, ahead_max_d=1.0, radius_max_d=0.75, step_d=0.25)
    img = body_image(rd, lay, 100.0, grid=grid, fitter=fitter)
    m = img["dlog_conductivity"]
    by_sector = np.abs(m).max(dim=("ahead", "radius"))
    assert float(by_sector.bearing[int(np.argmax(by_sector.values))]) == 120.0
    assert float(m.max()) > -float(m.min())
    assert img.attrs["chi2"] <= img.attrs["chi2_target"] * 1.001
    assert m.attrs["units"] == "1" and img.ahead.attrs["units"] == "m"
