"""Method (b): a coarse region-wise 3D inversion."""

from __future__ import annotations

import logging
import math
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from tbminv.forward.fem3d.mesh import MeshSettings
from tbminv.forward.fem3d.model import Fem3DSettings, Model3D
from tbminv.forward.ratio import geometric_factors
from tbminv.forward.registry import ForwardModel
from tbminv.ground import Contact, Scenario
from tbminv.layout import Layout
from tbminv.readings.advance import AdvanceData
from tbminv.studies.methods.synthetic import (
    AdvanceRecord,
    SyntheticDrive,
    _record,
    slab_contact,
    with_error_floor,
)

_LOG = logging.getLogger(__name__)


# ------------------------------------------------------------------------ (b) region-wise 3D
def coarse_mesh_settings() -> MeshSettings:
    """A small 3D mesh for the region-wise method (P1, ~4k nodes, about 1 s per forward)."""
    return MeshSettings(box_m=120.0, n_segments=8, quality=1.5, electrode_size_m=0.3,
                        face_size_m=1.5, growth=2.0, refine_ahead_m=20.0)


@dataclass(frozen=True)
class Region3DSettings:
    """Settings of the region-wise 3D method (lengths in m).

    Attributes
    ----------
    boundaries_in_diameters : tuple of float
        Starts of the slabs ahead of the face in machine diameters (the first is the face, 0);
        the last slab is open. Ground behind the face (around machine and tunnel) is one more
        region.
    p2 : bool
        Quadratic elements (slower; P1 suffices with the ratio-style geometric factors).
    mesh : MeshSettings or None
        3D mesh knobs; None: :func:`coarse_mesh_settings`.
    lam : float
        Marquardt damping relative to the mean diagonal of ``J^T J`` (multiplied by
        ``lambda_factor`` after each accepted step, by 10 after a rejected one).
    lambda_factor : float
        Damping decrease per accepted step.
    smoothness : float
        Weight of the squared log-resistivity differences between neighbouring regions
        (around machine - first slab - second slab ...), in units of one datum's chi-squared
        (0: no smoothing, damping only).
    max_iter : int
        Gauss-Newton iterations.
    fd_step : float
        Step of the finite-difference Jacobian in log resistivity.
    lower_ohmm, upper_ohmm : float
        Bounds of the resistivities, ohm-m.
    min_contrast : float
        Smallest contrast reported as a contact (:func:`equivalent_contact`).
    warm_start : bool
        Start each advance from the previous one's regions (slabs fixed to the machine: the
        values are carried over unshifted).
    """

    boundaries_in_diameters: tuple[float, ...] = (0.0, 1.0, 2.5, 5.0)
    p2: bool = False
    mesh: MeshSettings | None = None
    lam: float = 0.1
    lambda_factor: float = 0.3
    smoothness: float = 30.0
    max_iter: int = 6
    fd_step: float = 0.1
    lower_ohmm: float = 0.1
    upper_ohmm: float = 1e5
    min_contrast: float = 1.25
    warm_start: bool = True

    def __post_init__(self) -> None:
        b = self.boundaries_in_diameters
        if len(b) < 1 or b[0] != 0.0 or any(y <= x for x, y in zip(b[:-1], b[1:])):
            raise ValueError("Region3DSettings.boundaries_in_diameters must start at 0 and "
                             "increase")
        if not self.lam > 0 or not 0 < self.lambda_factor <= 1 or self.max_iter < 1:
            raise ValueError("Region3DSettings: expected lam > 0, 0 < lambda_factor <= 1, "
                             "max_iter >= 1")


def model_3d(layout: Layout, *, p2: bool = False, mesh: MeshSettings | None = None,
             honour_contacts: bool = True) -> Model3D:
    """The ``3d`` forward model (:class:`tbminv.forward.fem3d.model.Model3D`) with a small mesh.

    ``honour_contacts = False`` keeps one mesh for every ground (contacts filled by cell
    centres).
    """
    return Model3D(layout, Fem3DSettings(p2=p2, mesh=mesh or coarse_mesh_settings(),
                                         honour_contacts=honour_contacts))


def slab_scenario(face_chainage_m: float, boundaries_m: Sequence[float], rho_around: float,
                  rho_slabs: Sequence[float]) -> Scenario:
    """A ground of slabs square to the axis fixed to the face (resistivities in ohm-m)."""
    contacts = tuple(Contact(chainage_m=float(face_chainage_m + b), resistivity_ohmm=float(r))
                     for b, r in zip(boundaries_m, rho_slabs))
    return Scenario(background_resistivity_ohmm=float(rho_around), contacts=contacts,
                    name="region-wise slabs")


@dataclass
class RegionFit:
    """Outcome of one region-wise fit (resistivities in ohm-m)."""

    rho_around_ohmm: float
    rho_slabs_ohmm: np.ndarray
    chi2: float
    rrms_percent: float
    iterations: int
    chi2_history: list[float]
    n_forward: int


def gauss_newton_log(fun: Callable[[np.ndarray], np.ndarray], y_log: np.ndarray,
                     err_log: np.ndarray, p0: np.ndarray, *, lam: float = 0.1,
                     lambda_factor: float = 0.3, max_iter: int = 6, fd_step: float = 0.1,
                     bounds: tuple[float, float] = (math.log(0.1), math.log(1e5)),
                     min_dphi: float = 0.01, roughness: np.ndarray | None = None,
                     smoothness: float = 0.0) -> tuple[np.ndarray, list[float], int]:
    """Damped Gauss-Newton (Levenberg-Marquardt) fit of a few log parameters.

    Minimises ``phi(p) = sum(((y_log - fun(p)) / err_log)^2) + smoothness |C p|^2`` (``C`` the
    ``roughness`` matrix, e.g. first differences of neighbouring regions) with a
    forward-difference Jacobian and Marquardt damping; reports the data term as
    ``chi2 = mean(((y_log - fun(p)) / err_log)^2)``. Stops at chi2 <= 1, after ``max_iter``
    iterations or when phi improves by less than ``min_dphi`` (fraction).

    Returns
    -------
    (p, chi2_history, n_forward)
    """
    p = np.clip(np.asarray(p0, float), *bounds)
    n_fwd = 0
    c_mat = (np.zeros((0, p.size)) if roughness is None or smoothness <= 0
             else math.sqrt(smoothness) * np.asarray(roughness, float))

    def chi2_of(f: np.ndarray) -> float:
        return float(np.mean(((y_log - f) / err_log) ** 2))

    def phi_of(f: np.ndarray, q: np.ndarray) -> float:
        return float(np.sum(((y_log - f) / err_log) ** 2) + np.sum((c_mat @ q) ** 2))

    f = fun(p)
    n_fwd += 1
    hist = [chi2_of(f)]
    phi = phi_of(f, p)
    mu = lam
    for _ in range(max_iter):
        if hist[-1] <= 1.0:
            break
        jac = np.empty((y_log.size, p.size))
        for j in range(p.size):
            q = p.copy()
            q[j] += fd_step
            jac[:, j] = (fun(q) - f) / fd_step
            n_fwd += 1
        jw = jac / err_log[:, None]
        rw = (y_log - f) / err_log
        jtj = jw.T @ jw
        scale = max(float(np.mean(np.diag(jtj))), 1e-12)
        lhs = jtj + c_mat.T @ c_mat
        rhs = jw.T @ rw - c_mat.T @ (c_mat @ p)
        accepted = False
        for _try in range(4):
            step = np.linalg.solve(lhs + mu * scale * np.eye(p.size), rhs)
            q = np.clip(p + step, *bounds)
            fq = fun(q)
            n_fwd += 1
            phi_q = phi_of(fq, q)
            if phi_q < phi:
                accepted = True
                break
            mu *= 10.0
        if not accepted:
            break
        gain = (phi - phi_q) / phi
        p, f, phi = q, fq, phi_q
        hist.append(chi2_of(fq))
        mu *= lambda_factor
        if gain < min_dphi:
            break
    return p, hist, n_fwd


class RegionInverter:
    """Region-wise 3D inversion of one layout (see :class:`Region3DSettings`).

    Parameters
    ----------
    layout : Layout
    settings : Region3DSettings, optional
    model : ForwardModel, optional
        A 3D model built for ``layout`` (default: :func:`model_3d`).
    """

    def __init__(self, layout: Layout, settings: Region3DSettings | None = None,
                 model: ForwardModel | None = None) -> None:
        self.layout = layout
        self.settings = settings or Region3DSettings()
        self.model = model or model_3d(layout, p2=self.settings.p2, mesh=self.settings.mesh,
                                       honour_contacts=False)
        d = layout.machine.diameter_m
        self.boundaries_m = tuple(float(b) * d for b in self.settings.boundaries_in_diameters)

    def fit(self, adv: AdvanceData, rho_ref_ohmm: float, start: np.ndarray | None = None
            ) -> tuple[RegionFit, np.ndarray]:
        """Fit one advance; returns the fit and the selected readings' indices."""
        s = self.settings
        face, ch = adv.face_chainage_m, adv.cutterhead_deg
        k = geometric_factors(self.layout, None, face, ch, rho_ref_ohmm, model=self.model)
        rhoa = k * adv.r_ohm
        sel = np.nonzero(np.isfinite(rhoa) & (rhoa > 0) & np.isfinite(adv.rel_error)
                         & (adv.rel_error > 0))[0]
        if sel.size < 2:
            raise ValueError(f"advance {adv.advance}: {sel.size} usable readings")
        y = np.log(rhoa[sel])
        err = np.asarray(adv.rel_error[sel], float)   # d ln R = dR / R
        n_slab = len(self.boundaries_m)

        def fun(p: np.ndarray) -> np.ndarray:
            rho = np.exp(p)
            sc = slab_scenario(face, self.boundaries_m, rho[0], rho[1:])
            r = np.asarray(self.model.response(sc, face, ch), float)[sel]
            with np.errstate(invalid="ignore", divide="ignore"):
                out = np.log(np.abs(k[sel] * r))
            return out

        p0 = (np.full(n_slab + 1, float(np.median(y))) if start is None
              else np.log(np.asarray(start, float)))
        rough = np.diff(np.eye(n_slab + 1), axis=0)      # first differences of neighbours
        p, hist, nf = gauss_newton_log(fun, y, err, p0, lam=s.lam,
                                       lambda_factor=s.lambda_factor, max_iter=s.max_iter,
                                       fd_step=s.fd_step,
                                       bounds=(math.log(s.lower_ohmm), math.log(s.upper_ohmm)),
                                       roughness=rough, smoothness=s.smoothness)
        resid = np.exp(y - fun(p)) - 1.0
        nf += 1
        rrms = float(100.0 * np.sqrt(np.mean(resid ** 2)))
        rho = np.exp(p)
        return RegionFit(float(rho[0]), rho[1:], hist[-1], rrms, len(hist) - 1, hist, nf), sel

    def contact_ahead_m(self, fit: RegionFit) -> float:
        """Equivalent sharp contact of a fitted slab model, m ahead of the face."""
        return slab_contact(self.boundaries_m, np.log(fit.rho_slabs_ohmm),
                            math.log(fit.rho_around_ohmm),
                            min_contrast=self.settings.min_contrast)


def run_region3d(drive: SyntheticDrive, settings: Region3DSettings | None = None, *,
                 model: ForwardModel | None = None, label: str = "default",
                 error_floor: float = 0.0, rho_ref_ohmm: float = 100.0) -> list[AdvanceRecord]:
    """Method ``region3d``: slabs ahead + ground around the machine, Gauss-Newton on 3D.

    ``time_s`` is the wall time of each advance (the homogeneous run for the factors unless
    cached, Jacobians, line search).
    """
    data = with_error_floor(drive.data, error_floor)
    inv = RegionInverter(drive.layout, settings, model)
    out = []
    start = None
    for adv in data:
        t0 = time.perf_counter()
        fit, sel = inv.fit(adv, rho_ref_ohmm, start)
        ahead = inv.contact_ahead_m(fit)
        t = time.perf_counter() - t0
        _LOG.info("region3d advance %d: chi2 %.2f after %d iterations, %d forwards, %.1f s",
                  adv.advance, fit.chi2, fit.iterations, fit.n_forward, t)
        if inv.settings.warm_start:
            start = np.concatenate([[fit.rho_around_ohmm], fit.rho_slabs_ohmm])
        out.append(_record("region3d", label, drive, adv, ahead, fit.chi2, fit.rrms_percent,
                           fit.iterations, sel.size, t))
    return out


__all__ = ["coarse_mesh_settings", "Region3DSettings", "model_3d", "slab_scenario", "RegionFit",
           "gauss_newton_log", "RegionInverter", "run_region3d"]
