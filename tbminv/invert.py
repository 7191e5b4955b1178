"""Inversion along the drive: one image per advance with the machine fixed, warm-started.

For every advance the checked readings (:mod:`tbminv.qc`) become apparent resistivities with
numeric geometric factors (``k = rho_ref / R_hom`` from a homogeneous run of the same forward
model with the machine and tunnel in, so that homogeneous ground returns its resistivity; the
ratio method of Fox et al. 1980, Geophysics 45(1):75-93) and are inverted with pyGIMLi's
:class:`pygimli.Inversion` (log data, log-bounded model, smoothness regularisation on the
parameter mesh) through the axisymmetric forward operator (:mod:`tbminv.axisym`).

* The parameter mesh is a tensor grid of the ground in the machine frame, ``ahead`` x ``radius``,
  coarser than the forward mesh, built once per layout; its lines follow the machine and tunnel
  edges so the steel and the bore are left out (fixed regions, never inverted). It reaches the
  forward domain's edge with growing cells, so every forward ground cell belongs to one parameter.
* Data weights come from the QC error model only. ``err_ohm`` there estimates the standard
  deviation of the normal-reciprocal difference, so one reading has ``err / sqrt(2)`` and the
  mean of a pair ``err / 2``. Readings without an error model are not inverted.
* lambda rules (``InversionSettings.lambda_rule``): ``cooling`` (default: start at ``lam``,
  multiply by ``lambda_factor`` each iteration, stop at chi-squared 1 — an Occam-style descent,
  Constable et al. 1987, Geophysics 52(3):289-300), ``fixed`` and ``lcurve`` (the corner of
  misfit vs roughness over ``lcurve_lams``, Hansen 1992, SIAM Review 34(4):561-580).
* Every inversion records chi-squared history, rrms, lambda, iterations, stop reason and time;
  a non-converged fit or chi-squared above ``chi2_flag`` is flagged in the section store.
* Coverage: log10 of the error-weighted cumulative absolute log-sensitivity per unit volume;
  optional depth-of-investigation index from two more inversions with references at
  ``0.5`` and ``2`` times the start model (Oldenburg & Li 1999, Geophysics 64(2):403-416).
* Along the drive each advance starts from the previous model shifted by the advance (the ground
  moves towards the machine), interpolated in log resistivity; ``cold=True`` starts every advance
  from the homogeneous median apparent resistivity.
"""

from __future__ import annotations

import dataclasses
import hashlib
import logging
import math
import time
import tomllib
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import scipy.sparse as sp

from tbminv.contactfit import ContactFitSettings
from tbminv.layout import Layout, Measurement

_LOG = logging.getLogger("tbminv.invert")

LAMBDA_RULES = ("cooling", "fixed", "lcurve")


SCHEDULER_NEEDS_COLD = ("--scheduler runs independent inversions: add --cold (the warm start "
                        "makes each advance wait for the previous one)")


class InversionError(ValueError):
    """Inversion input that cannot be used (the message names what and where)."""


@dataclass(frozen=True)
class InversionSettings:
    """Settings of the drive inversion (TOML table ``[invert]``; lengths in m).

    Attributes
    ----------
    model : str
        Forward model for the images (``axisym``).
    forward_settings : str
        ``standard`` (about 0.3 % from a fine reference) or ``fast`` (about 0.6 %, 2-3x
        faster; :meth:`tbminv.axisym.AxisymSettings.fast`).
    lambda_rule : str
        ``cooling`` (default), ``fixed`` or ``lcurve`` (see the module docstring).
    lam : float
        Starting (cooling, lcurve fallback) or fixed regularisation strength.
    lambda_factor : float
        Factor applied to lambda after each iteration (``cooling``).
    lcurve_lams : tuple of float
        Lambdas tried by ``lcurve``.
    max_iter : int
        Gauss-Newton iterations per advance.
    min_dphi_percent : float
        Stop when an iteration improves the objective by less than this, percent.
    ahead_m, behind_m, radius_m : float or None
        Extent of the fine parameter grid ahead of the face, behind the face and from the axis;
        None: 5 D ahead, shield length + 1 D behind, 2.5 D radius.
    cell_m : float or None
        Size of the fine parameter cells; None: D / 8.
    growth : float
        Growth factor of the cells outside the fine grid.
    lower_ohmm, upper_ohmm : float
        Bounds of the log-bounded model transform, ohm-m.
    chi2_flag : float
        chi-squared above which a result is flagged. A result is also flagged when it did
        not converge: ``max_iter`` reached while chi-squared still moved by more than
        0.25 sqrt(2 / n) in the last iteration (n readings; sqrt(2 / n) is the scatter of
        chi-squared per datum between noise realisations).
    warm_start : bool
        Start each advance from the previous (shifted) model.
    surface_correction : bool
        With a finite cover, divide each reading by the ratio of homogeneous 3D responses with
        and without the ground surface (:mod:`tbminv.surface`) before the axisymmetric
        inversion and contact fit. Default on; it costs two 3D runs per advance (cached).
    time_lapse : bool
        Also regularise towards the previous (shifted) model: the smoothness acts on the
        change from that model (a difference-to-reference constraint in the spirit of
        LaBrecque & Yang 2001), so consecutive advances differ only where the data ask for
        it. Needs consecutive advances (not with ``--cold``). Default off.
    doi : bool
        Compute the depth-of-investigation index (three inversions per advance).
    contact_fit : bool
        Fit the parametric contact model per advance (running joint fit).
    contact : ContactFitSettings
        Settings of the contact fit.
    grid_ahead_step_m, grid_radius_step_m : float or None
        Steps of the regular output grid of the section; None: D / 12.
    """

    model: str = "axisym"
    forward_settings: str = "standard"
    lambda_rule: str = "cooling"
    lam: float = 100.0
    lambda_factor: float = 0.6
    lcurve_lams: tuple[float, ...] = (3.0, 10.0, 30.0, 100.0, 300.0)
    max_iter: int = 12
    min_dphi_percent: float = 1.0
    ahead_m: float | None = None
    behind_m: float | None = None
    radius_m: float | None = None
    cell_m: float | None = None
    growth: float = 1.35
    lower_ohmm: float = 0.1
    upper_ohmm: float = 1e5
    chi2_flag: float = 2.0
    warm_start: bool = True
    surface_correction: bool = True
    time_lapse: bool = False
    doi: bool = False
    contact_fit: bool = True
    contact: ContactFitSettings = field(default_factory=ContactFitSettings)
    grid_ahead_step_m: float | None = None
    grid_radius_step_m: float | None = None

    def __post_init__(self) -> None:
        if self.lambda_rule not in LAMBDA_RULES:
            raise InversionError(f"[invert] lambda_rule = {self.lambda_rule!r}: expected one of "
                                 f"{', '.join(LAMBDA_RULES)}")
        if not self.lam > 0 or not 0 < self.lambda_factor <= 1:
            raise InversionError("[invert] lam must be > 0 and 0 < lambda_factor <= 1")
        if not 0 < self.lower_ohmm < self.upper_ohmm:
            raise InversionError("[invert] expected 0 < lower_ohmm < upper_ohmm")

    def to_dict(self) -> dict[str, Any]:
        """Plain dictionary (for the store's provenance)."""
        d = dataclasses.asdict(self)
        d["contact"] = dataclasses.asdict(self.contact)
        return d


def load_settings(path: str | Path | None) -> tuple[InversionSettings, Any]:
    """Read a settings file: ``[invert]``, ``[contact]`` and ``[qc]`` tables.

    Returns
    -------
    (InversionSettings, QCSettings)
    """
    from tbminv.qc import QCSettings

    if path is None:
        return InversionSettings(), QCSettings()
    p = Path(path)
    try:
        data = tomllib.loads(p.read_text(encoding="utf-8-sig"))
    except FileNotFoundError:
        raise InversionError(f"{p}: settings file not found") from None
    except (UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise InversionError(f"{p}: not a valid TOML settings file ({exc})") from None
    unknown = set(data) - {"invert", "contact", "qc", "ahead", "section"}
    if unknown:
        raise InversionError(f"{p}: unknown table(s) {', '.join(sorted(unknown))}; expected "
                             "[invert], [contact], [qc], [ahead], [section]")
    inv = dict(data.get("invert", {}))
    names = {f.name for f in dataclasses.fields(InversionSettings)} - {"contact"}
    for k in inv:
        if k not in names:
            raise InversionError(f"{p}: [invert] {k}: unknown setting; expected one of "
                                 f"{', '.join(sorted(names))}")
    con = dict(data.get("contact", {}))
    cnames = {f.name for f in dataclasses.fields(ContactFitSettings)}
    for k in con:
        if k not in cnames:
            raise InversionError(f"{p}: [contact] {k}: unknown setting; expected one of "
                                 f"{', '.join(sorted(cnames))}")
    for k, v in list(con.items()):
        if isinstance(v, list):
            con[k] = tuple(float(x) for x in v)
    if "lcurve_lams" in inv:
        inv["lcurve_lams"] = tuple(float(x) for x in inv["lcurve_lams"])
    try:
        settings = InversionSettings(**inv, contact=ContactFitSettings(**con))
    except TypeError as exc:
        raise InversionError(f"{p}: [invert]/[contact]: {exc}") from None
    qc = QCSettings.from_dict(data.get("qc", {}), source=f"{p}: [qc]")
    return settings, qc


# ------------------------------------------------------------------------ parameter grid
def _graded(lo: float, hi: float, fine_lo: float, fine_hi: float, h: float,
            growth: float) -> np.ndarray:
    """Nodes from lo to hi: spacing h in [fine_lo, fine_hi], growing by ``growth`` outside."""
    inner = np.arange(fine_lo, fine_hi + 0.5 * h, h)
    inner[-1] = fine_hi
    right = [fine_hi]
    step = h
    while right[-1] < hi:
        step *= growth
        right.append(min(hi, right[-1] + step))
    left = [fine_lo]
    step = h
    while left[-1] > lo:
        step *= growth
        left.append(max(lo, left[-1] - step))
    nodes = np.concatenate([left[::-1], inner[1:-1], right])
    return np.unique(np.round(nodes, 9))


@dataclass
class ParameterGrid:
    """The ground as a tensor grid in (ahead, radius), with machine and bore cells removed.

    Attributes
    ----------
    x_nodes, r_nodes : ndarray
        Grid lines, m (machine frame).
    keep : ndarray of bool (n_cells of the full grid)
        True for ground cells (the parameters), in pyGIMLi cell order (x fastest).
    mesh : pygimli.Mesh
        The parameter mesh (ground cells only) for the regularisation.
    centers : ndarray (n_param, 2)
        (ahead, radius) of each parameter cell, m.
    volume_m3 : ndarray (n_param,)
        Volume of each cell's ring (2 pi r dA), m^3.
    """

    x_nodes: np.ndarray
    r_nodes: np.ndarray
    keep: np.ndarray
    mesh: Any
    centers: np.ndarray
    volume_m3: np.ndarray

    @property
    def n_param(self) -> int:
        """Number of parameters."""
        return int(self.keep.sum())

    def locate(self, x: np.ndarray, r: np.ndarray) -> np.ndarray:
        """Parameter index of points (-1 outside the ground grid)."""
        ix = np.clip(np.searchsorted(self.x_nodes, x, side="right") - 1, 0,
                     self.x_nodes.size - 2)
        ir = np.clip(np.searchsorted(self.r_nodes, r, side="right") - 1, 0,
                     self.r_nodes.size - 2)
        full = ir * (self.x_nodes.size - 1) + ix
        index = np.full(self.keep.size, -1)
        index[self.keep] = np.arange(self.n_param)
        out = index[full]
        outside = (x < self.x_nodes[0]) | (x > self.x_nodes[-1]) | (r > self.r_nodes[-1])
        out[outside] = -1
        return out


def build_parameter_grid(layout: Layout, settings: InversionSettings,
                         domain_m: float = 1500.0) -> ParameterGrid:
    """The parameter grid of a layout (see :class:`ParameterGrid`)."""
    from tbminv.gimli import pg

    d = layout.machine.diameter_m
    big_r = layout.machine.radius_m
    shield = layout.machine.shield_length_m
    h = settings.cell_m or d / 8.0
    ahead = settings.ahead_m or 5.0 * d
    behind = settings.behind_m or (shield + d)
    rmax = settings.radius_m or 2.5 * d
    x = _graded(-domain_m, domain_m, -behind, ahead, h, settings.growth)
    r = _graded(0.0, domain_m, 0.0, rmax, h, settings.growth)
    # follow the machine and bore edges exactly
    extra_x = [0.0]
    if layout.machine.model_body:
        extra_x.append(-shield)
    tl = layout.tunnel.length_m
    if layout.tunnel.model_cavity and math.isfinite(tl):
        extra_x.append(-shield - tl)
    x = np.unique(np.round(np.concatenate([x, extra_x]), 9))
    r = np.unique(np.round(np.concatenate([r, [big_r]]), 9))
    x = _merge_close(x, 0.3 * h, keep=extra_x)
    r = _merge_close(r, 0.3 * h, keep=[0.0, big_r])
    # keep grid lines off the electrodes that travel with the machine: the singularity removal
    # of the forward model needs one resistivity around each source
    cyl = [v for e, v in zip(layout.electrodes, _machine_positions(layout)) if v is not None]
    x = _avoid(x, [c[0] for c in cyl], 0.25 * h, required=extra_x)
    r = _avoid(r, [c[1] for c in cyl], 0.25 * h, required=[0.0, big_r])
    grid = pg.createGrid(x, r)
    xc = 0.5 * (x[:-1] + x[1:])
    rc = 0.5 * (r[:-1] + r[1:])
    cx, cr = np.meshgrid(xc, rc)          # (nr, nx): pyGIMLi cell order is x fastest
    cx, cr = cx.ravel(), cr.ravel()
    solid = np.zeros(cx.size, bool)
    if layout.machine.model_body:
        solid |= (cx > -shield) & (cx < 0.0) & (cr < big_r)
    if layout.tunnel.model_cavity:
        tail = -shield if layout.machine.model_body else 0.0
        end = tail - tl if math.isfinite(tl) else -np.inf
        solid |= (cx < tail) & (cx > end) & (cr < big_r)
    keep = ~solid
    idx = np.nonzero(keep)[0]
    mesh = grid.createSubMesh(grid.cells([int(i) for i in idx]))
    centers = np.column_stack([cx[keep], cr[keep]])
    dx = np.diff(x)[np.arange(cx.size) % xc.size]
    dr = np.diff(r)[np.arange(cx.size) // xc.size]
    vol = (2.0 * np.pi * cr * dx * dr)[keep]
    got = np.array(mesh.cellCenters())[:, :2]
    if not np.allclose(got, centers):
        raise RuntimeError("parameter mesh cell order differs from the grid order")
    return ParameterGrid(x, r, keep, mesh, centers, vol)


def _machine_positions(layout: Layout) -> list[tuple[float, float, float] | None]:
    out: list[tuple[float, float, float] | None] = []
    for e in layout.electrodes:
        if e.fixed_in_ground or e.at_infinity or e.kind == "machine" or e.on_steel:
            out.append(None)
        else:
            out.append(layout.positions_cylindrical(0.0, 0.0)[e.label])
    return out


def _avoid(nodes: np.ndarray, coords: Sequence[float], tol: float,
           required: Sequence[float]) -> np.ndarray:
    """Move grid lines that lie within ``tol`` of a coordinate to ``tol`` away from it."""
    req = set(np.round(required, 9))
    out = np.array(nodes, float)
    for c in coords:
        for i, v in enumerate(out):
            if abs(v - c) < tol and round(v, 9) not in req:
                out[i] = c - tol if v <= c else c + tol
    out = np.unique(np.round(out, 9))
    return out


def _merge_close(nodes: np.ndarray, tol: float, keep: Sequence[float]) -> np.ndarray:
    out: list[float] = []
    kept = set(np.round(keep, 9))
    for v in np.sort(nodes):
        if out and v - out[-1] < tol:
            if round(v, 9) in kept:
                out[-1] = v
            continue
        out.append(v)
    return np.array(out)


# ------------------------------------------------------------------------ advance data
@dataclass
class AdvanceData:
    """Readings of one advance ready for inversion (protocol order).

    Attributes
    ----------
    advance : int
    face_chainage_m : float
    cutterhead_deg : float
    r_ohm : ndarray (nq,)
        Mean transfer resistance per protocol quadrupole, ohm (NaN: not measured/invalid).
    rel_error : ndarray (nq,)
        Relative standard error of ``r_ohm`` (fraction).
    n_readings : int
        Readings of the advance in the log (valid or not).
    n_valid : int
        Valid readings that went into ``r_ohm``.
    time : str or None
    """

    advance: int
    face_chainage_m: float
    cutterhead_deg: float
    r_ohm: np.ndarray
    rel_error: np.ndarray
    n_readings: int
    n_valid: int
    time: str | None = None


def advance_data(qc_table: pd.DataFrame, layout: Layout) -> list[AdvanceData]:
    """Group QC'd readings by advance and protocol quadrupole (normal and reciprocal merged).

    Readings that are not in the layout's protocol (in either direction) are ignored with a
    log message; flagged readings and readings without an error model are left out.
    """
    quads = layout.measurements
    index: dict[tuple, tuple[int, bool]] = {}
    for i, q in enumerate(quads):
        index[_fix_key(q, layout)] = (i, False)
        index.setdefault(_fix_key(q.reciprocal(), layout), (i, True))
    out = []
    unknown = 0
    for adv, grp in qc_table.groupby("advance", sort=True):
        nq = len(quads)
        s = np.zeros(nq)
        w = np.zeros(nq)
        cnt = np.zeros(nq, int)
        valid = grp["valid"].to_numpy(bool) & np.isfinite(grp["err_ohm"].to_numpy(float))
        labels = [grp[c].astype(object).where(grp[c].notna(), None).to_numpy()
                  for c in "abmn"]
        r = grp["r_ohm"].to_numpy(float)
        err = grp["err_ohm"].to_numpy(float) / math.sqrt(2.0)   # one reading (see module doc)
        for j in range(len(grp)):
            if not valid[j]:
                continue
            key = tuple(_norm(labels[c][j], layout) for c in range(4))
            hit = index.get(key)
            if hit is None:
                unknown += 1
                continue
            i, _ = hit
            wt = 1.0 / err[j] ** 2
            s[i] += wt * r[j]
            w[i] += wt
            cnt[i] += 1
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = np.where(w > 0, s / w, np.nan)
            rel = np.where(w > 0, 1.0 / np.sqrt(w) / np.abs(mean), np.nan)
        face = float(np.median(grp["face_chainage_m"]))
        ch = grp["cutterhead_deg"].to_numpy(float) if "cutterhead_deg" in grp else np.zeros(1)
        ch = float(np.nanmedian(ch)) if np.isfinite(ch).any() else 0.0
        tcol = grp["time"] if "time" in grp else None
        t = None
        if tcol is not None and tcol.notna().any():
            t = pd.Timestamp(tcol.dropna().iloc[0]).isoformat()
        out.append(AdvanceData(int(adv), face, ch, mean, rel, len(grp), int(cnt.sum()), t))
    if unknown:
        _LOG.info("%d valid readings are not in the layout's protocol and were not inverted",
                  unknown)
    return out


def _norm(label: Any, layout: Layout) -> str | None:
    if label is None or (isinstance(label, float) and math.isnan(label)):
        return None
    lab = str(label)
    return None if lab == "" or layout.electrode(lab).at_infinity else lab


# ------------------------------------------------------------------------ operator
def _fix_key(q: Measurement, layout: Layout) -> tuple:
    return tuple(None if (x is None or layout.electrode(x).at_infinity) else x
                 for x in q.labels())


class DriveOperator:
    """Forward operator on the parameter grid for one set of electrode positions.

    Wraps the axisymmetric layout model: ``rho_fwd = P rho_param`` (each forward ground cell
    takes the value of the parameter cell that contains it), transfer resistances of the
    protocol, and their Jacobian mapped to the parameters.
    """

    def __init__(self, layout: Layout, grid: ParameterGrid, face_chainage_m: float,
                 cutterhead_deg: float, model: Any) -> None:
        self.layout = layout
        self.grid = grid
        self.face_chainage_m = face_chainage_m
        self.cutterhead_deg = cutterhead_deg
        from tbminv.axisym import LayoutAxisym

        # an instance of our own: filling a scenario moves grid lines of a shared model
        # the forward mesh carries every parameter-grid line (with the parameter cell size as
        # its local spacing), so that each parameter cell is a union of forward cells
        self.fwd = LayoutAxisym(layout, cutterhead_deg, face_chainage_m,
                                getattr(model, "settings", None),
                                extra_x=_keypoints(grid.x_nodes),
                                extra_r=_keypoints(grid.r_nodes)[1:])
        c = self.fwd.forward.ground_centers()
        p = grid.locate(c[:, 0], c[:, 1])
        if np.any(p < 0):
            raise InversionError(f"{int((p < 0).sum())} forward ground cells lie outside the "
                                 "parameter grid: enlarge the parameter domain")
        self.P = sp.csr_matrix((np.ones(p.size), (np.arange(p.size), p)),
                               shape=(p.size, grid.n_param))
        empty = np.asarray(self.P.sum(axis=0)).ravel() == 0
        if empty.any():
            raise InversionError(f"{int(empty.sum())} parameter cells hold no forward cell; "
                                 "the forward mesh must follow the parameter grid")
        self.n_calls = 0

    def response(self, rho_param: np.ndarray, cutterhead_deg: float | None = None) -> np.ndarray:
        """Transfer resistances of the protocol, ohm."""
        self.n_calls += 1
        return self.fwd.response(self.P @ np.asarray(rho_param, float),
                                 self.cutterhead_deg if cutterhead_deg is None
                                 else cutterhead_deg)

    def jacobian(self, rho_param: np.ndarray, cutterhead_deg: float | None = None
                 ) -> tuple[np.ndarray, np.ndarray]:
        """R (nq,) in ohm and dR/d ln(rho_param) (nq, n_param)."""
        r, j = self.fwd.jacobian(self.P @ np.asarray(rho_param, float),
                                 self.cutterhead_deg if cutterhead_deg is None
                                 else cutterhead_deg)
        return r, np.asarray(sp.csr_matrix(j).dot(self.P).toarray()
                             if sp.issparse(j) else j @ self.P)


def _keypoints(nodes: np.ndarray) -> list[tuple[float, float]]:
    """Grid lines as mesh key points (coordinate, local spacing = smaller adjacent cell)."""
    d = np.diff(nodes)
    h = np.minimum(np.r_[d[0], d], np.r_[d, d[-1]])
    return [(float(x), float(hh)) for x, hh in zip(nodes, h)]


def make_pg_modelling(op: DriveOperator, sel: np.ndarray, k: np.ndarray,
                      cutterhead_deg: float) -> Any:
    """A :class:`pygimli.Modelling` of apparent resistivities ``k R`` of readings ``sel``."""
    from tbminv.axisym_modelling import AxisymModelling, AxisymParameterGrid

    grid = AxisymParameterGrid(op.grid.x_nodes, op.grid.r_nodes, op.grid.keep, op.grid.mesh,
                               op.P)
    return AxisymModelling(op.fwd, grid, cutterhead_deg=cutterhead_deg, scale=k, select=sel)


# ------------------------------------------------------------------------ one advance
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


def invert_image(op: DriveOperator, data: AdvanceData, k: np.ndarray,
                 settings: InversionSettings, start_model: np.ndarray | None = None,
                 reference_model: np.ndarray | None = None) -> ImageResult:
    """Invert one advance's apparent resistivities on the parameter grid.

    Parameters
    ----------
    op : DriveOperator
    data : AdvanceData
    k : ndarray
        Geometric factors per protocol quadrupole, m.
    settings : InversionSettings
    start_model : ndarray, optional
        Starting resistivity per parameter cell, ohm-m (default: median apparent resistivity).
    reference_model : ndarray, optional
        Regularise the change from this model (time-lapse mode); it is also the start.
    """
    from tbminv.gimli import pg

    t0 = time.perf_counter()
    rhoa = k * data.r_ohm
    sel = np.nonzero(np.isfinite(rhoa) & (rhoa > 0) & np.isfinite(data.rel_error)
                     & (data.rel_error > 0))[0]
    if sel.size < 3:
        raise InversionError(f"advance {data.advance}: {sel.size} usable readings; at least 3 "
                             "are needed")
    y = rhoa[sel]
    err = data.rel_error[sel]
    med = float(np.median(y))
    if start_model is None:
        start_model = np.full(op.grid.n_param, med)
    start_model = np.clip(start_model, settings.lower_ohmm * 1.01, settings.upper_ohmm * 0.99)

    def run(lam: float, factor: float, start: np.ndarray, max_iter: int,
            reference: np.ndarray | None = None) -> tuple[Any, np.ndarray]:
        fop = make_pg_modelling(op, sel, k[sel], data.cutterhead_deg)
        inv = pg.Inversion(fop=fop, verbose=False)
        inv.dataTrans = pg.trans.TransLog()
        inv.modelTrans = pg.trans.TransLogLU(settings.lower_ohmm, settings.upper_ohmm)
        kw: dict[str, Any] = {}
        if reference is not None:
            kw["isReference"] = True
            start = reference
        model = inv.run(pg.Vector(y), pg.Vector(err), lam=lam, lambdaFactor=factor,
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
    if response is None or response.size != y.size:
        response = k[sel] * op.response(model, data.cutterhead_deg)[sel]
    # coverage from the Jacobian at the final model
    _, jac = op.jacobian(model, data.cutterhead_deg)
    js = jac[sel] / (data.r_ohm[sel][:, None] * err[:, None])   # d ln R / d ln rho / sigma_ln
    cov = np.log10(np.maximum(np.abs(js).sum(axis=0) / op.grid.volume_m3, 1e-300))
    doi = None
    if settings.doi:
        _, m_lo = run(settings.lam, 1.0, model, 4, reference=np.full_like(model, 0.5 * med))
        _, m_hi = run(settings.lam, 1.0, model, 4, reference=np.full_like(model, 2.0 * med))
        doi = np.abs(np.log(m_lo) - np.log(m_hi)) / abs(math.log(0.5) - math.log(2.0))
    return ImageResult(model, chi2, float(inv.relrms()), iters, lam_used, reason,
                       converged and chi2 <= settings.chi2_flag, time.perf_counter() - t0,
                       hist, cov, doi, int(sel.size), response, y, err)


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
    from scipy.interpolate import NearestNDInterpolator, RegularGridInterpolator

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


# ------------------------------------------------------------------------ drive
class DriveInverter:
    """Invert a drive advance by advance (mesh and operator built once per electrode set).

    Parameters
    ----------
    layout : Layout
    settings : InversionSettings, optional
    model : ForwardModel, optional
        An ``axisym`` model built for ``layout`` (default: built here).
    """

    def __init__(self, layout: Layout, settings: InversionSettings | None = None,
                 model: Any | None = None) -> None:
        from tbminv.models import make_model

        self.layout = layout
        self.settings = settings or InversionSettings()
        if self.settings.model != "axisym" and model is None:
            raise InversionError(f"image inversion needs the axisym model, not "
                                 f"{self.settings.model!r}")
        if model is None:
            from tbminv.reach import model_options_for

            model = make_model("axisym", layout,
                               **model_options_for("axisym", self.settings.forward_settings))
        self.model = model
        self.grid = build_parameter_grid(layout, self.settings)
        self._ops: dict[tuple, DriveOperator] = {}
        self._k: dict[tuple, np.ndarray] = {}
        self.rho_ref_ohmm: float | None = None
        self._fitter = None

    def _op_key(self, face: float, ch: float) -> tuple:
        cyl = self.layout.positions_cylindrical(ch, face)
        return tuple(sorted((k, round(v[0], 6), round(v[1], 6)) for k, v in cyl.items()
                            if v is not None))

    def operator(self, face: float, ch: float) -> DriveOperator:
        """The (cached) operator for a face chainage and cutterhead angle."""
        key = self._op_key(face, ch)
        if key not in self._ops:
            if len(self._ops) > 6:
                self._ops.clear()
            self._ops[key] = DriveOperator(self.layout, self.grid, face, ch, self.model)
        return self._ops[key]

    def geometric_factors(self, face: float, ch: float, rho_ref: float) -> np.ndarray:
        """Numeric geometric factors k = rho_ref / R_hom per protocol quadrupole, m."""
        key = (*self._op_key(face, ch), round(ch, 6), rho_ref)
        if key not in self._k:
            op = self.operator(face, ch)
            r = op.response(np.full(self.grid.n_param, rho_ref), ch)
            with np.errstate(divide="ignore"):
                self._k[key] = np.where(np.abs(r) > 0, rho_ref / r, np.nan)
        return self._k[key]

    def contact_fitter(self, rho_ref: float) -> Any:
        """Contact fitter with a response table of this layout (built once, cached on disk)."""
        from tbminv.contactfit import ContactFitter, build_response_table

        if self._fitter is None:
            from tbminv.models import make_model

            sub = self._machine_only_layout()
            model = make_model("axisym", sub, settings=getattr(self.model, "settings", None))
            table = build_response_table(sub, model, rho_ref_ohmm=rho_ref,
                                         settings=self.settings.contact, model_name="axisym")
            self._fitter = ContactFitter(table, self.settings.contact)
        return self._fitter

    def _machine_only_layout(self) -> Layout:
        """The layout restricted to readings between electrodes that travel with the machine."""
        moving = {e.label for e in self.layout.electrodes
                  if not e.fixed_in_ground}
        keep = tuple(q for q in self.layout.measurements
                     if all(x is None or x in moving for x in q.labels()))
        return dataclasses.replace(self.layout, explicit_measurements=keep, generators=())

    def reference_resistivity(self, adv: AdvanceData) -> float:
        """Reference resistivity of the drive (set once, from the first advance), ohm-m.

        The median apparent resistivity of the advance with factors for 100 ohm-m, rounded to
        two significant digits; the numeric geometric factors are computed for it.
        """
        if self.rho_ref_ohmm is None:
            k0 = self.geometric_factors(adv.face_chainage_m, adv.cutterhead_deg, 100.0)
            ra = k0 * adv.r_ohm
            ok = np.isfinite(ra) & (ra > 0)
            if not ok.any():
                raise InversionError(f"advance {adv.advance}: no reading gives a positive "
                                     "apparent resistivity")
            self.rho_ref_ohmm = float(_round_sig(np.median(ra[ok])))
        return self.rho_ref_ohmm

    def surface_corrected(self, adv: AdvanceData) -> AdvanceData:
        """The advance's readings as the same ground would give them without the surface.

        Unchanged for a deep tunnel (infinite cover) or with ``surface_correction`` off; else
        divided by :func:`tbminv.surface.surface_factors` at the reference resistivity.
        """
        from tbminv.surface import needs_correction, surface_factors

        if not (self.settings.surface_correction and needs_correction(self.layout)):
            return adv
        f = surface_factors(self.layout, adv.face_chainage_m, adv.cutterhead_deg,
                            rho_ohmm=self.reference_resistivity(adv))
        return dataclasses.replace(adv, r_ohm=adv.r_ohm / f)

    def invert_advance(self, adv: AdvanceData, start: np.ndarray | None = None,
                       reference: np.ndarray | None = None) -> ImageResult:
        """Image inversion of one advance (operator and factors from the caches)."""
        op = self.operator(adv.face_chainage_m, adv.cutterhead_deg)
        k = self.geometric_factors(adv.face_chainage_m, adv.cutterhead_deg,
                                   self.reference_resistivity(adv))
        img = invert_image(op, adv, k, self.settings, start, reference)
        _LOG.info("advance %d at %.2f m: chi2 %.2f after %d iterations (%s), %.1f s",
                  adv.advance, adv.face_chainage_m, img.chi2, img.iterations,
                  img.stop_reason, img.time_s)
        return img

    def run(self, data: Sequence[AdvanceData], *, cold: bool = False,
            progress: bool = False, client: Any | None = None,
            scheduler: str | None = None) -> list[Any]:
        """Invert every advance; return :class:`tbminv.section.AdvanceResult` objects.

        Parameters
        ----------
        data : sequence of AdvanceData
            Advances in drive order.
        cold : bool
            Start every advance from a homogeneous model (advances become independent).
        progress : bool
            Show a progress bar per advance.
        client : dask.distributed.Client, optional
            Run the (cold, independent) image inversions on this client's workers.
        scheduler : str, optional
            Address of a dask scheduler to connect to instead of ``client``.
        """
        if not data:
            return []
        if self.settings.time_lapse and cold:
            raise InversionError("[invert] time_lapse = true regularises each advance towards "
                                 "the previous one: it cannot be combined with a cold start "
                                 "(--cold)")
        distributed = client is not None or bool(scheduler)
        if distributed and not cold:
            raise InversionError(SCHEDULER_NEEDS_COLD)
        from tqdm.auto import tqdm

        from tbminv.surface import needs_correction

        self.reference_resistivity(data[0])
        if self.settings.surface_correction and needs_correction(self.layout):
            data = [self.surface_corrected(adv) for adv in
                    tqdm(data, disable=not progress, desc="surface correction (3D)",
                         unit="advance")]
        if distributed:
            imgs = self._run_distributed(data, client, scheduler, progress)
        else:
            imgs = []
            prev_model = prev_face = None
            for adv in tqdm(data, disable=not progress, desc="advances", unit="advance"):
                start = ref = None
                if not cold and prev_model is not None and (self.settings.warm_start
                                                            or self.settings.time_lapse):
                    start = shift_model(self.grid, prev_model, adv.face_chainage_m - prev_face)
                    ref = start if self.settings.time_lapse else None
                img = self.invert_advance(adv, start, ref)
                prev_model, prev_face = img.model_ohmm, adv.face_chainage_m
                imgs.append(img)
        contacts = self._contacts(data) if self.settings.contact_fit else [None] * len(data)
        return [self._advance_result(adv, img, con)
                for adv, img, con in zip(data, imgs, contacts)]

    def _run_distributed(self, data: Sequence[AdvanceData], client: Any | None,
                         scheduler: str | None, progress: bool) -> list[ImageResult]:
        """Cold image inversions on dask workers (one inverter per worker process)."""
        from dask.distributed import Client, as_completed
        from tqdm.auto import tqdm

        own = None
        if client is None:
            try:
                client = own = Client(scheduler, timeout="30s")
            except OSError as exc:
                raise InversionError(f"--scheduler {scheduler}: cannot connect ({exc})") from None
        try:
            futures = [client.submit(_remote_image, self.layout, self.settings,
                                     self.rho_ref_ohmm, adv, pure=False) for adv in data]
            index = {f.key: i for i, f in enumerate(futures)}
            out: list[Any] = [None] * len(data)
            for fut in tqdm(as_completed(futures), total=len(futures), disable=not progress,
                            desc="advances", unit="advance"):
                out[index[fut.key]] = fut.result()
            return out
        finally:
            if own is not None:
                own.close()

    def _contacts(self, data: Sequence[AdvanceData]) -> list[Any]:
        from tbminv.section import ContactFit

        fitter = self.contact_fitter(self.rho_ref_ohmm or 100.0)
        full = {q: i for i, q in enumerate(self.layout.measurements)}
        sub = [full[q] for q in self._machine_only_layout().measurements]
        r = np.array([d.r_ohm[sub] for d in data])
        e = np.array([d.rel_error[sub] for d in data])
        faces = [d.face_chainage_m for d in data]
        out = []
        try:
            est = fitter.fit_drive(r, e, faces)
        except ValueError as exc:
            _LOG.warning("contact fit skipped: %s", exc)
            return [None] * len(data)
        level = self.settings.contact.confidence
        for es in est:
            out.append(ContactFit.from_estimate(es, interval_level=level))
        return out

    def _advance_result(self, adv: AdvanceData, img: ImageResult, contact: Any) -> Any:
        from tbminv.section import AdvanceResult

        ahead, radius, rho, cov, doi = self.resample(img)
        return AdvanceResult(
            advance=adv.advance, face_chainage_m=adv.face_chainage_m, ahead_m=ahead,
            radius_m=radius, resistivity_ohmm=rho, coverage=cov, doi_index=doi,
            chi2=img.chi2, rrms_percent=img.rrms_percent, iterations=img.iterations,
            lambda_=img.lam, stop_reason=img.stop_reason, converged=img.converged,
            time_s=img.time_s, chi2_history=img.chi2_history, n_data=adv.n_readings,
            n_used=img.n_used, contact=contact, time=adv.time)

    def output_grid(self) -> tuple[np.ndarray, np.ndarray]:
        """Cell centres (ahead, radius) of the regular output grid, m."""
        s = self.settings
        d = self.layout.machine.diameter_m
        ha = s.grid_ahead_step_m or d / 12.0
        hr = s.grid_radius_step_m or d / 12.0
        ahead = s.ahead_m or 5.0 * d
        behind = s.behind_m or (self.layout.machine.shield_length_m + d)
        rmax = s.radius_m or 2.5 * d
        na = int(round((ahead + behind) / ha))
        nr = int(round(rmax / hr))
        a = -behind + (np.arange(na) + 0.5) * (ahead + behind) / na
        r = (np.arange(nr) + 0.5) * rmax / nr
        return a, r

    def resample(self, img: ImageResult) -> tuple[np.ndarray, ...]:
        """Parameter model -> regular (ahead, radius) grid; NaN in the machine and bore."""
        a, r = self.output_grid()
        aa, rr = np.meshgrid(a, r, indexing="ij")
        idx = self.grid.locate(aa.ravel(), rr.ravel()).reshape(aa.shape)
        inside = self._solid(aa, rr)
        idx = np.where(inside, -1, idx)

        def take(v: np.ndarray | None) -> np.ndarray | None:
            if v is None:
                return None
            out = np.where(idx >= 0, np.asarray(v)[np.maximum(idx, 0)], np.nan)
            return out

        return a, r, take(img.model_ohmm), take(img.coverage), take(img.doi_index)

    def _solid(self, a: np.ndarray, r: np.ndarray) -> np.ndarray:
        lay = self.layout
        big_r, shield = lay.machine.radius_m, lay.machine.shield_length_m
        solid = np.zeros(a.shape, bool)
        if lay.machine.model_body:
            solid |= (a > -shield) & (a < 0) & (r < big_r)
        if lay.tunnel.model_cavity:
            tail = -shield if lay.machine.model_body else 0.0
            tl = lay.tunnel.length_m
            solid |= (a < tail) & ((a > tail - tl) if math.isfinite(tl) else True) & (r < big_r)
        return solid


_WORKER_INVERTERS: dict[str, DriveInverter] = {}


def _remote_image(layout: Layout, settings: InversionSettings, rho_ref_ohmm: float,
                  adv: AdvanceData) -> ImageResult:
    """Cold image inversion of one advance on a dask worker.

    The worker keeps one :class:`DriveInverter` per layout and settings, so its mesh, operator
    and factors are built once per worker, not once per advance.
    """
    from tbminv.cache import cache_key

    key = cache_key({"layout": layout.to_dict(), "settings": settings.to_dict()})
    inv = _WORKER_INVERTERS.get(key)
    if inv is None:
        _WORKER_INVERTERS.clear()
        inv = _WORKER_INVERTERS[key] = DriveInverter(layout, settings)
    inv.rho_ref_ohmm = rho_ref_ohmm
    return inv.invert_advance(adv)


def _round_sig(v: float, sig: int = 2) -> float:
    if v <= 0 or not math.isfinite(v):
        return 100.0
    e = math.floor(math.log10(v)) - sig + 1
    return round(v / 10 ** e) * 10 ** e


# ------------------------------------------------------------------------ files, CLI
def file_sha256(path: str | Path) -> str:
    """SHA-256 of a file's bytes."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def run_drive(readings_path: str | Path, layout: Layout, store_path: str | Path, *,
              settings: InversionSettings | None = None, qc_settings: Any | None = None,
              out_dir: str | Path | None = None, cold: bool = False, shift: str | None = None,
              layout_path: str | Path | None = None, progress: bool = False,
              scheduler: str | None = None, client: Any | None = None) -> Any:
    """Check, invert and store a readings log (one shift) in the section store.

    ``scheduler`` (a dask scheduler address) or ``client`` run the cold-started advances on
    dask workers (``cold`` must be set).

    Returns
    -------
    xarray.Dataset
        The section of this run (also appended to ``store_path``).
    """
    from tbminv.qc import QCSettings, run_qc
    from tbminv.readings import read_readings
    from tbminv.section import append_shift, build_section

    settings = settings or InversionSettings()
    readings = read_readings(readings_path, layout)
    if out_dir is not None:
        readings.write_quarantine(out_dir)
    qc = run_qc(readings, qc_settings or QCSettings())
    data = advance_data(qc.table, layout)
    data = [d for d in data if np.isfinite(d.r_ohm).sum() >= 3]
    if not data:
        raise InversionError(f"{readings_path}: no advance has three or more valid readings "
                             "with an error model (see `tbminv check`)")
    inverter = DriveInverter(layout, settings)
    results = inverter.run(data, cold=cold, progress=progress, scheduler=scheduler,
                           client=client)
    layout_text = (Path(layout_path).read_text(encoding="utf-8") if layout_path
                   else _layout_text(layout))
    settings_text = repr(settings.to_dict())
    ds = build_section(results, layout_text, settings_text, file_sha256(readings_path))
    label = shift or _shift_label(data)
    append_shift(store_path, ds, shift=label)
    return ds


def _layout_text(layout: Layout) -> str:
    import tomli_w

    return tomli_w.dumps(layout.to_dict())


def _shift_label(data: Sequence[AdvanceData]) -> str:
    t = next((d.time for d in data if d.time), None)
    if t:
        return f"shift-{pd.Timestamp(t).strftime('%Y%m%dT%H%M')}"
    return f"advances-{data[0].advance}-{data[-1].advance}"


def run_invert_cli(args: Any, echo: Callable[[str], None] | None = None) -> int:
    """``tbminv invert READINGS --layout L --store STORE [--settings S] [--cold]``."""
    echo = echo or _LOG.info
    from tbminv.layout import load_layout

    if getattr(args, "scheduler", None) and not args.cold:
        raise InversionError(SCHEDULER_NEEDS_COLD)
    layout = load_layout(args.layout)
    settings, qc = load_settings(args.settings)
    ds = run_drive(args.readings, layout, args.store, settings=settings, qc_settings=qc,
                   cold=args.cold, layout_path=args.layout, progress=True,
                   scheduler=getattr(args, "scheduler", None))
    n = ds.sizes["advance"]
    flagged = int((ds["fit_flag"].values != 0).sum()) if "fit_flag" in ds else 0
    echo(f"inverted {n} advances ({flagged} flagged) -> {args.store}")
    if "contact_ahead_m" in ds:
        last = ds.isel(advance=-1)
        d = float(last["contact_ahead_m"])
        if math.isfinite(d):
            echo(f"last advance: contact fitted {d:.1f} m ahead "
                  f"[{float(last['contact_ahead_lo_m']):.1f}, "
                  f"{float(last['contact_ahead_hi_m']):.1f}] m")
        else:
            echo("last advance: no contact found within reach")
    return 0


__all__ = ["InversionSettings", "load_settings", "ParameterGrid", "build_parameter_grid",
           "AdvanceData", "advance_data", "DriveOperator", "invert_image", "ImageResult",
           "shift_model", "DriveInverter", "run_drive", "run_invert_cli", "InversionError"]
