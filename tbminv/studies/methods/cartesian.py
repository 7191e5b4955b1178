"""Method (c): pyGIMLi's Cartesian 2.5D on the vertical section, ratio-corrected."""

from __future__ import annotations

import logging
import time
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.spatial import cKDTree

from tbminv.forward.cartesian25d import (
    GROUND,
    MACHINE,
    TUNNEL,
    Cartesian25DModel,
    Cartesian25DSettings,
)
from tbminv.forward.ratio import geometric_factors
from tbminv.forward.registry import ForwardModel
from tbminv.gimli import configure_operator, ert, ert_data_container
from tbminv.layout import Layout
from tbminv.readings.advance import AdvanceData
from tbminv.studies.methods.region3d import model_3d
from tbminv.studies.methods.synthetic import (
    AdvanceRecord,
    SyntheticDrive,
    _record,
    equivalent_contact,
    with_error_floor,
)

_LOG = logging.getLogger(__name__)


# ------------------------------------------------------------------------ (c) 2.5D section
@dataclass(frozen=True)
class Cartesian25DInversionSettings:
    """Settings of the Cartesian 2.5D section inversion.

    Attributes
    ----------
    lam : float
        Regularisation strength (pyGIMLi's ``lam``).
    lambda_factor : float
        Factor on lambda per iteration (1: fixed lambda; < 1: cooling).
    max_iter : int
        Iterations per advance.
    z_weight : float
        Vertical smoothness weight (pyGIMLi ``zWeight``; 1: isotropic).
    area_m2 : float
        Largest triangle of the section mesh, m^2 (the mesh is the parameter mesh).
    refine_m : float
        Refinement distance at the electrodes, m.
    domain_m : float
        Half-width of the section box, m.
    rho_ref_ohmm : float
        Homogeneous resistivity of the ratio correction and factors, ohm-m.
    profile_ahead_m : float or None
        Length of the axial profile read from the image, m (None: 5 D).
    min_contrast : float
        Smallest contrast reported as a contact.
    lower_ohmm, upper_ohmm : float
        Bounds of the log-bounded model, ohm-m.
    """

    lam: float = 2.0
    lambda_factor: float = 0.8
    max_iter: int = 8
    z_weight: float = 1.0
    area_m2: float = 400.0
    refine_m: float = 0.1
    domain_m: float = 250.0
    rho_ref_ohmm: float = 100.0
    profile_ahead_m: float | None = None
    min_contrast: float = 1.25
    lower_ohmm: float = 0.1
    upper_ohmm: float = 1e5


class Cartesian25DInverter:
    """Cartesian 2.5D section inversion of one layout (see the module docstring).

    Parameters
    ----------
    layout : Layout
    settings : Cartesian25DInversionSettings, optional
    reference : ForwardModel, optional
        The 3D model of the ratio correction (default: :func:`model_3d`, small P1 mesh).
    """

    def __init__(self, layout: Layout, settings: Cartesian25DInversionSettings | None = None,
                 reference: ForwardModel | None = None) -> None:
        self.layout = layout
        self.settings = settings or Cartesian25DInversionSettings()
        s = self.settings
        self.reference = reference or model_3d(layout)
        self.section = Cartesian25DModel(layout, Cartesian25DSettings(
            domain_m=s.domain_m, refine_m=s.refine_m, area_m2=s.area_m2,
            rho_ref_ohmm=s.rho_ref_ohmm, ratio_correction=True), reference=self.reference)

    def fit(self, adv: AdvanceData) -> dict[str, Any]:
        """Invert one advance; returns chi2, rrms, iterations, the axial profile and more."""
        s = self.settings
        face, ch = adv.face_chainage_m, adv.cutterhead_deg
        ratio = self.section.ratio(face, ch)
        # the section's own numeric factors, k = rho_ref / R_2.5D(hom)
        k2 = geometric_factors(self.layout, None, face, ch, s.rho_ref_ohmm,
                               model=self.section.uncorrected())
        with np.errstate(divide="ignore", invalid="ignore"):
            rhoa = k2 * adv.r_ohm / ratio
        sel = np.nonzero(np.isfinite(rhoa) & (rhoa > 0) & np.isfinite(k2)
                         & np.isfinite(adv.rel_error) & (adv.rel_error > 0))[0]
        if sel.size < 3:
            raise ValueError(f"advance {adv.advance}: {sel.size} usable readings")
        mesh, sensors, index = self.section._mesh(face, ch)
        quads = self.layout.measurements
        data = ert_data_container(
            sensors, [[index.get(lab, -1) if lab is not None else -1
                       for lab in quads[i].labels()] for i in sel],
            {"k": k2[sel], "rhoa": rhoa[sel], "err": adv.rel_error[sel]})
        mgr = ert.ERTManager(sr=False, verbose=False)
        configure_operator(mgr.fop)
        mgr.setData(data)
        # no H2 refinement of the forward mesh: the factors k2 come from the unrefined section
        # mesh, and data and model must see the same discretisation (also 4x faster)
        mgr.fop._refineH2 = False
        mgr.setMesh(mesh)          # first the mesh, then the regions (see PYGIMLI-NOTES)
        if self.layout.machine.model_body:
            mgr.fop.setRegionProperties(MACHINE, fix=self.layout.machine.body_resistivity_ohmm)
        if self.layout.tunnel.model_cavity:
            mgr.fop.setRegionProperties(TUNNEL, fix=self.layout.tunnel.lining_resistivity_ohmm)
        mgr.fop.setRegionProperties(GROUND, background=False)
        model = mgr.invert(lam=s.lam, lambdaFactor=s.lambda_factor, maxIter=s.max_iter,
                           zWeight=s.z_weight, limits=[s.lower_ohmm, s.upper_ohmm],
                           startModel=float(np.median(rhoa[sel])), verbose=False)
        model = np.asarray(model, float)
        pd_mesh = mgr.paraDomain
        centers = np.array(pd_mesh.cellCenters())[:, :2]
        yc = self.section.axis_y_m()
        d = self.layout.machine.diameter_m
        length = s.profile_ahead_m or 5.0 * d
        a = np.linspace(0.05 * d, length, 60)
        # nearest parameter cell to each point on the axis ahead of the face
        tree = cKDTree(centers)
        _, idx = tree.query(np.column_stack([a, np.full_like(a, yc)]))
        prof = np.log(model[idx])
        # the ground around the machine: cells within one radius outside the shield
        R = self.layout.machine.radius_m
        L = self.layout.machine.shield_length_m
        dz = np.abs(centers[:, 1] - yc)
        around = (centers[:, 0] < -0.1 * L) & (centers[:, 0] > -L) & (dz > R) & (dz < 2 * R)
        near = float(np.median(np.log(model[around]))) if around.any() else None
        ahead = equivalent_contact(a, prof, near_value=near, min_contrast=s.min_contrast)
        chi2 = float(mgr.inv.chi2())
        return {"chi2": chi2, "rrms_percent": float(mgr.inv.relrms()),
                "iterations": max(0, len(mgr.inv.chi2History) - 1), "n_used": int(sel.size),
                "ahead_m": ahead, "profile_ahead_m": a, "profile_log_rho": prof,
                "model_ohmm": model, "mesh": pd_mesh, "selected": sel,
                "data_ohmm": rhoa[sel], "response_ohmm": np.asarray(mgr.inv.response, float),
                "chi2_history": [float(v) for v in mgr.inv.chi2History]}


def run_cartesian25d(drive: SyntheticDrive,
                     settings: Cartesian25DInversionSettings | None = None, *,
                     reference: ForwardModel | None = None, label: str = "default",
                     error_floor: float = 0.0, inverter: Cartesian25DInverter | None = None
                     ) -> list[AdvanceRecord]:
    """Method ``section25d``: pyGIMLi 2.5D section inversion of ratio-corrected data.

    ``time_s`` is the wall time of each advance including the homogeneous runs of the ratio
    correction and the factors (cached, :mod:`tbminv.forward.ratio`).
    """
    data = with_error_floor(drive.data, error_floor)
    inv = inverter or Cartesian25DInverter(drive.layout, settings, reference)
    out = []
    for adv in data:
        t0 = time.perf_counter()
        res = inv.fit(adv)
        t = time.perf_counter() - t0
        _LOG.info("section25d advance %d: chi2 %.2f, %.1f s", adv.advance, res["chi2"], t)
        out.append(_record("section25d", label, drive, adv, res["ahead_m"], res["chi2"],
                           res["rrms_percent"], res["iterations"], res["n_used"], t))
    return out


__all__ = ["Cartesian25DInversionSettings", "Cartesian25DInverter", "run_cartesian25d"]
