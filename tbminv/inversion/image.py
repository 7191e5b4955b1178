"""One image inversion of one advance (pyGIMLi Inversion on the axisymmetric operator).

Every reading is modelled at its own logged cutterhead angle (:class:`AngleRows` of the
advance: readings of a quadrupole with a turning electrode per angle, the others stacked); the
axisymmetric model serves all angles from one solve per harmonic.
"""

from __future__ import annotations

import logging
import math
import time
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.interpolate import NearestNDInterpolator, RegularGridInterpolator

from tbminv.gimli import pg
from tbminv.inversion.grid import ParameterGrid
from tbminv.inversion.operator import DriveOperator, ReferencedModelling, make_pg_modelling
from tbminv.inversion.outcome import POSTPROCESS_DOI_FAILED
from tbminv.inversion.settings import InversionError, InversionSettings
from tbminv.readings.advance import AdvanceData, AngleRows

_LOG = logging.getLogger(__name__)


# ------------------------------------------------------------------------ one advance
@dataclass(frozen=True)
class CellReference:
    """Reference values of parameter cells: ``index`` (int), ``values_ohmm``, ``rel_error``."""

    index: np.ndarray
    values_ohmm: np.ndarray
    rel_error: np.ndarray


@dataclass
class ImageResult:
    """Outcome of one image inversion (parameter space)."""

    model_ohmm: np.ndarray
    chi2: float
    rrms_percent: float
    iterations: int
    lam: float
    stop_reason: str
    converged: bool
    time_s: float
    chi2_history: list[float]
    coverage: np.ndarray
    doi_index: np.ndarray | None
    n_used: int
    response_ohmm: np.ndarray
    data_ohmm: np.ndarray
    rel_error: np.ndarray
    postprocess_flag: int = 0
    """``POSTPROCESS_*`` bits (:mod:`tbminv.inversion.outcome`) of steps that failed here."""


def invert_image(op: DriveOperator, data: AdvanceData, k: np.ndarray,
                 settings: InversionSettings, start_model: np.ndarray | None = None,
                 reference_model: np.ndarray | None = None,
                 cell_reference: CellReference | None = None) -> ImageResult:
    """Invert one advance's apparent resistivities on the parameter grid.

    Parameters
    ----------
    op : DriveOperator
    data : AdvanceData
    k : ndarray
        Geometric factors per row of ``data.angle_rows()`` (a protocol quadrupole at a
        cutterhead angle), m.
    settings : InversionSettings
    start_model : ndarray, optional
        Starting resistivity per parameter cell, ohm-m (default: median apparent resistivity).
    reference_model : ndarray, optional
        Regularise the change from this model (time-lapse mode); it is also the start.
    cell_reference : CellReference, optional
        Reference values of some parameter cells with their relative errors (probed
        stretches, :func:`tbminv.inversion.probefit.probe_reference`), appended to the data
        (:class:`tbminv.inversion.operator.ReferencedModelling`); ``chi2`` and ``rrms_percent``
        then count them as data.
    """
    t0 = time.perf_counter()
    rows = data.angle_rows()
    k = np.asarray(k, float)
    if k.shape != (rows.size,):
        raise ValueError(f"advance {data.advance}: {k.size} geometric factors for "
                         f"{rows.size} readings")
    rhoa = k * rows.r_ohm
    usable = np.isfinite(rhoa) & np.isfinite(rows.rel_error) & (rows.rel_error > 0)
    negative = usable & ~(rhoa > 0)
    if negative.any():   # log data: a negative apparent resistivity cannot be inverted
        _LOG.warning("advance %d: %d readings with a negative apparent resistivity are left "
                     "out of the image (quadrupoles %s)", data.advance, int(negative.sum()),
                     ", ".join(str(i) for i in rows.quad[negative][:10]))
    sel = np.nonzero(usable & (rhoa > 0))[0]
    if sel.size < 3:
        raise InversionError(f"advance {data.advance}: {sel.size} usable readings; at least 3 "
                             "are needed")
    y = rhoa[sel]
    err = rows.rel_error[sel]
    quad = rows.quad[sel]
    angles, angle_index = row_angles(rows.take(sel))
    med = float(np.median(y))
    y_all, err_all = y, err
    if cell_reference is not None:
        y_all = np.concatenate([y, cell_reference.values_ohmm])
        err_all = np.concatenate([err, cell_reference.rel_error])
    if start_model is None:
        start_model = np.full(op.grid.n_param, med)
    start_model = np.clip(start_model, settings.lower_ohmm * 1.01, settings.upper_ohmm * 0.99)

    def run(lam: float, factor: float, start: np.ndarray, max_iter: int,
            reference: np.ndarray | None = None) -> tuple[Any, np.ndarray]:
        fop = make_pg_modelling(op, quad, k[sel], data.cutterhead_deg, angles, angle_index)
        if cell_reference is not None:
            fop = ReferencedModelling(fop, cell_reference.index)
        inv = pg.Inversion(fop=fop, verbose=False)
        inv.dataTrans = pg.trans.TransLog()
        inv.modelTrans = pg.trans.TransLogLU(settings.lower_ohmm, settings.upper_ohmm)
        kw: dict[str, Any] = {}
        if reference is not None:
            kw["isReference"] = True
            start = reference
        model = inv.run(pg.Vector(y_all), pg.Vector(err_all), lam=lam, lambdaFactor=factor,
                        startModel=pg.Vector(start), maxIter=max_iter,
                        dPhi=settings.min_dphi_percent, stopAtChi1=True, verbose=False, **kw)
        return inv, np.asarray(model, float)

    ref = None
    if reference_model is not None:
        ref = np.clip(np.asarray(reference_model, float), settings.lower_ohmm * 1.01,
                      settings.upper_ohmm * 0.99)
    if settings.lambda_rule == "lcurve":
        best = None
        pts = []
        for lam in settings.lcurve_lams:
            inv, model = run(lam, 1.0, start_model, settings.max_iter, ref)
            rough = float(np.linalg.norm(np.asarray(inv.fop.constraints() *
                                                    pg.Vector(np.log(model)))))
            pts.append((lam, float(inv.chi2()), rough, inv, model))
        lam_pick = _lcurve_corner([(p[1], p[2]) for p in pts])
        _, _, _, inv, model = pts[lam_pick]
        lam_used = settings.lcurve_lams[lam_pick]
        best = inv
        inv = best
    else:
        factor = settings.lambda_factor if settings.lambda_rule == "cooling" else 1.0
        inv, model = run(settings.lam, factor, start_model, settings.max_iter, ref)
        lam_used = float(inv.lam)
    chi2 = float(inv.chi2())
    hist = [float(v) for v in inv.chi2History]
    iters = max(0, len(hist) - 1)
    # chi-squared per datum of n readings scatters by sqrt(2 / n) between noise realisations;
    # a last step far below that cannot change the fit detectably: the fit has stagnated
    step = abs(hist[-1] - hist[-2]) if len(hist) >= 2 else math.inf
    still = 0.25 * math.sqrt(2.0 / max(int(sel.size), 1))
    if chi2 <= 1.0 + 1e-9:
        reason, converged = "chi-squared reached 1", True
    elif iters >= settings.max_iter and step < still:
        reason, converged = (f"chi-squared stagnated (last change {step:.3f} < {still:.3f})",
                             chi2 <= settings.chi2_flag)
    elif iters >= settings.max_iter:
        reason, converged = f"iteration limit ({settings.max_iter})", False
    else:
        reason, converged = (f"objective improved by less than {settings.min_dphi_percent} %",
                             chi2 <= settings.chi2_flag)
    response = np.asarray(inv.response, float) if hasattr(inv, "response") else None
    if response is not None and response.size == y_all.size:
        response = response[: y.size]     # readings first, then the cell references
    if response is None or response.size != y.size:
        response = k[sel] * op.responses(model, angles)[angle_index, quad]
    # coverage from the Jacobian at the final model
    if len(angles) == 1:
        jac = op.jacobian(model, angles[0])[1][quad]
    else:
        jac = op.jacobians(model, angles)[1][angle_index, quad]
    js = jac / (rows.r_ohm[sel][:, None] * err[:, None])   # d ln R / d ln rho / sigma_ln
    cov = np.log10(np.maximum(np.abs(js).sum(axis=0) / op.grid.volume_m3, 1e-300))
    doi = None
    flag = 0
    if settings.doi:
        try:
            _, m_lo = run(settings.lam, 1.0, model, 4, reference=np.full_like(model, 0.5 * med))
            _, m_hi = run(settings.lam, 1.0, model, 4, reference=np.full_like(model, 2.0 * med))
            doi = np.abs(np.log(m_lo) - np.log(m_hi)) / abs(math.log(0.5) - math.log(2.0))
        except Exception as exc:  # noqa: BLE001 - degrade: the image stands without its DOI
            _LOG.warning("advance %d: depth-of-investigation index failed, image kept without "
                         "it: %s: %s", data.advance, type(exc).__name__, exc)
            doi, flag = None, POSTPROCESS_DOI_FAILED
    return ImageResult(model, chi2, float(inv.relrms()), iters, lam_used, reason,
                       converged and chi2 <= settings.chi2_flag, time.perf_counter() - t0,
                       hist, cov, doi, int(sel.size), response, y, err, flag)


def row_angles(rows: AngleRows) -> tuple[list[float], np.ndarray]:
    """Distinct cutterhead angles to model, degrees, and each row's index into them.

    Rows that do not turn with the cutterhead take the first angle of a turning row (their
    geometry is the same at any angle), so they add no angle of their own.
    """
    ang = np.asarray(rows.angle_deg, float).copy()
    turns = np.asarray(rows.turns, bool)
    if turns.any() and (~turns).any():
        ang[~turns] = ang[turns][0]
    uniq, index = np.unique(ang, return_inverse=True)
    return [float(a) for a in uniq], index.reshape(-1)


def _lcurve_corner(points: Sequence[tuple[float, float]]) -> int:
    """Index of the point of largest curvature of (log chi2, log roughness)."""
    if len(points) < 3:
        return int(np.argmin([p[0] for p in points]))
    x = np.log(np.maximum([p[0] for p in points], 1e-12))
    y = np.log(np.maximum([p[1] for p in points], 1e-12))
    best, kmax = 1, -np.inf
    for i in range(1, len(points) - 1):
        a = np.array([x[i - 1] - x[i], y[i - 1] - y[i]])
        b = np.array([x[i + 1] - x[i], y[i + 1] - y[i]])
        ang = abs(np.arctan2(a[0] * b[1] - a[1] * b[0], a @ b))
        curv = np.pi - ang
        if curv > kmax:
            best, kmax = i, curv
    return best


def shift_model(grid: ParameterGrid, model: np.ndarray, advance_m: float) -> np.ndarray:
    """The previous advance's model moved by ``advance_m`` towards the machine.

    A ground point now ``a`` ahead of the face was ``a + advance_m`` ahead before; values are
    interpolated in log resistivity (nearest ground cell where the old grid has a hole or ends).
    """
    xc = 0.5 * (grid.x_nodes[:-1] + grid.x_nodes[1:])
    rc = 0.5 * (grid.r_nodes[:-1] + grid.r_nodes[1:])
    full = np.full(grid.keep.size, np.nan)
    full[grid.keep] = np.log(model)
    near = NearestNDInterpolator(grid.centers, np.log(model))
    holes = ~grid.keep
    cx, cr = np.meshgrid(xc, rc)
    full[holes] = near(cx.ravel()[holes], cr.ravel()[holes])
    interp = RegularGridInterpolator((rc, xc), full.reshape(rc.size, xc.size),
                                     bounds_error=False, fill_value=None)
    pts = np.column_stack([grid.centers[:, 1], np.clip(grid.centers[:, 0] + advance_m,
                                                       xc[0], xc[-1])])
    return np.exp(interp(pts))


__all__ = ["CellReference", "ImageResult", "invert_image", "row_angles", "shift_model"]
