"""Axisymmetric forward model with azimuthal harmonics (the 2.5D workhorse of tbminv).

Ground resistivity depends on (x, r) only (x ahead along the tunnel axis, r from the axis);
electrodes are 3D points ``(x, r, theta)``. The potential of a point current ``I`` at
``(x_s, r_s, theta_s)`` is expanded as ``u = sum_m u_m(x, r) cos(m (theta - theta_s))``.
Testing the 3D weak form ``int sigma grad u . grad w dV = I w(x_s)`` with
``w = v(x, r) cos(m (theta - theta_s))`` and integrating over theta (``int cos^2 = 2 pi`` for
m = 0, ``pi`` for m >= 1) gives, per harmonic, the 2D problem

    int sigma (du/dx dv/dx + du/dr dv/dr) r dA + m^2 int sigma u v / r dA = (I / c_m) v(x_s, r_s)

with ``c_0 = 2 pi`` and ``c_m = pi`` (m >= 1): a point load ``I/(2 pi)`` for m = 0 and
``I/pi`` for m >= 1; ``u_m = 0`` on the axis for m >= 1 (checked against ``rho I / (4 pi R)``
in the tests).

Singularity removal: the total field is ``u = u_p + w`` with the analytic primary field
``u_p = rho_s I / (4 pi R)`` (``rho_s`` the resistivity at the source; for an electrode just in
front of the steel face, minus its mirror image in the face plane so that the primary already
vanishes on the face) and a secondary field ``w`` solved on the mesh. The primary harmonics are
Fourier coefficients of ``1/R`` over the azimuth (FFT with a node-wise point count that resolves
the peak of ``1/R``). The primary is dropped on steel nodes (the steel potential is carried by
``w``), so the model is exact for the steel as a perfect conductor.

Steel: ``steel='perfect'`` (default) merges all steel nodes into one floating unknown for m = 0
and sets them to zero for m >= 1 (the exact perfect-conductor limit); ``steel='capped'`` gives
the steel cells a finite resistivity. Current into a bare (on-steel) electrode or into the
machine goes into the whole body.

Harmonic count: the primary is exact in 3D, so only the secondary field is summed over
harmonics. For a source s and a receiver k (radii r_s, r_k) the count is
``ceil(harmonic_factor * sqrt(r_s r_k) / S) + min_harmonics`` (capped by ``max_harmonics``),
``S = max(|p_s - p_k|, d_s + d_k)`` in the (x, r) plane, ``d`` the distance of an electrode
to the nearest interface its primary does not already mirror (steel edges, tunnel wall) or
``near_field_m`` for the ground. Electrodes on the axis need harmonic 0 only. Ground contrasts
nearer than ``near_field_m`` to ring electrodes need that setting lowered (and a larger
``harmonic_factor``).

Every harmonic is factorised once (CHOLMOD from scikit-sparse if importable, else scipy's
SuperLU; the symbolic analysis is reused) and solved for all current electrodes together.
The Jacobian of every reading with respect to the log-resistivity of every ground cell is the
exact derivative of the discrete model (adjoint fields of the potential electrodes, summed
over harmonics).
"""

from __future__ import annotations

import logging
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
import scipy.sparse as sp

from tbminv.cylmesh import CylGeometry, CylMesh, CylMeshSettings, build_cylmesh

_LOG = logging.getLogger("tbminv.axisym")
_WARNED: set[tuple] = set()


def _warn_once(key: tuple, msg: str, *args: Any) -> None:
    """Log a warning once per process and key (repeated per advance it is only noise)."""
    if key not in _WARNED:
        _WARNED.add(key)
        _LOG.warning(msg, *args)

try:  # CHOLMOD is optional: scipy's LU is the fallback
    from sksparse.cholmod import cholesky as _cholmod_cholesky

    HAVE_CHOLMOD = True
except Exception:  # pragma: no cover - depends on the installation
    _cholmod_cholesky = None
    HAVE_CHOLMOD = False

FOUR_PI = 4.0 * math.pi


def harmonic_weight(m: int) -> float:
    """Azimuthal integral ``c_m`` of the harmonic m: 2 pi for m = 0, pi for m >= 1."""
    return 2.0 * math.pi if m == 0 else math.pi


# --------------------------------------------------------------------------- settings
@dataclass(frozen=True)
class AxisymSettings:
    """Settings of the axisymmetric model.

    Attributes
    ----------
    mesh : CylMeshSettings
        Mesh grading.
    steel : str
        ``'perfect'`` (steel as a perfect conductor, exact limit) or ``'capped'`` (steel cells
        at ``steel_resistivity_ohmm``).
    steel_resistivity_ohmm : float or None
        Resistivity of the steel in ``'capped'`` mode, ohm-m (None: the layout's
        ``body_resistivity_ohmm``).
    harmonic_factor : float
        Harmonics for a pair of electrodes: ``ceil(harmonic_factor * sqrt(r_s r_k) / s) +
        min_harmonics`` with ``s`` the (x, r) length of the path via the nearest interface.
    min_harmonics : int
        Harmonics always added to the geometric count (pairs off the axis).
    max_harmonics : int
        Upper bound of the harmonic count.
    near_field_m : float
        Heterogeneity of the ground is assumed no nearer than this to an electrode when the
        harmonic count is chosen, m.
    face_image : bool
        Add the mirror image in the steel face to the primary of electrodes just ahead of it.
    singularity_removal : bool
        Analytic primary + computed secondary (default); False solves the plain total field
        with point loads (for checks of the source normalisation only).
    fill_subsample : int
        Sub-samples per cell side when a ground scenario fills the mesh.
    fill_average : str
        How the sub-samples are averaged: ``'resistivity'`` (series, suits contacts square to
        the axis), ``'geometric'`` or ``'conductivity'``.
    fit_contacts : bool
        Before a scenario fills the mesh, move the nearest free mesh line onto each contact
        square to the axis (cells then lie on one side; see
        :meth:`AxisymForward.fit_x_lines`).

    """

    mesh: CylMeshSettings = field(default_factory=CylMeshSettings)
    steel: str = "perfect"
    steel_resistivity_ohmm: float | None = None
    harmonic_factor: float = 2.5
    min_harmonics: int = 2
    max_harmonics: int = 100
    near_field_m: float = 1.0
    face_image: bool = True
    singularity_removal: bool = True
    fill_subsample: int = 4
    fill_average: str = "resistivity"
    fit_contacts: bool = True

    @classmethod
    def fast(cls, **kw: Any) -> AxisymSettings:
        """Settings with a coarser mesh and fewer harmonics.

        About 0.6 % from a fine reference on the demo layout and 2-3x faster than the
        defaults (bench/results/axisym.json).
        """
        kw.setdefault("mesh", CylMeshSettings(h_fine_m=0.1, growth=1.3))
        kw.setdefault("harmonic_factor", 1.5)
        return cls(**kw)

    def __post_init__(self) -> None:
        if self.steel not in ("perfect", "capped"):
            raise ValueError(f"AxisymSettings.steel = {self.steel!r}: expected 'perfect' or "
                             "'capped'")


@dataclass(frozen=True)
class AxElectrode:
    """An electrode of the axisymmetric model.

    Attributes
    ----------
    label : str
    x_m, r_m : float
        Position in the machine frame (ahead, radius), m.
    theta_deg : float
        Azimuth, degrees (from the crown, clockwise looking ahead).
    on_steel : bool
        At the machine's potential (bare on steel, or the machine itself); current goes into
        the whole body.
    at_infinity : bool
        A pole at infinity (potential 0, no current in the model).
    """

    label: str
    x_m: float = 0.0
    r_m: float = 0.0
    theta_deg: float = 0.0
    on_steel: bool = False
    at_infinity: bool = False

    @property
    def is_point(self) -> bool:
        """True for a point electrode in the ground."""
        return not (self.on_steel or self.at_infinity)

    def xyz(self) -> np.ndarray:
        """Cartesian (ahead, y, z) with y = -r sin(theta), z = r cos(theta), m."""
        t = math.radians(self.theta_deg)
        return np.array([self.x_m, -self.r_m * math.sin(t), self.r_m * math.cos(t)])


# --------------------------------------------------------------------------- 1D integrals
def _x_interval_matrices(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Stiffness and mass matrices of linear elements on every x interval, (n, 2, 2)."""
    h = np.diff(x)
    k = np.array([[1.0, -1.0], [-1.0, 1.0]])
    mm = np.array([[2.0, 1.0], [1.0, 2.0]]) / 6.0
    return k[None] / h[:, None, None], mm[None] * h[:, None, None]


def _r_interval_matrices(r: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """r-weighted integrals on every r interval [a, b], each (n, 2, 2).

    Returns ``B = int M_i M_j r dr``, ``D = int M_i' M_j' r dr`` and ``E = int M_i M_j / r dr``
    (``E`` terms of a node on the axis diverge; they are set to 0 and never used because
    those unknowns are zero for m >= 1).
    """
    a, b = r[:-1], r[1:]
    h = b - a
    n = len(h)
    bm = np.empty((n, 2, 2))
    bm[:, 0, 0] = h / 12.0 * (3 * a + b)
    bm[:, 1, 1] = h / 12.0 * (a + 3 * b)
    bm[:, 0, 1] = bm[:, 1, 0] = h / 12.0 * (a + b)
    dm = np.empty((n, 2, 2))
    c = (a + b) / (2.0 * h)
    dm[:, 0, 0] = dm[:, 1, 1] = c
    dm[:, 0, 1] = dm[:, 1, 0] = -c
    em = np.zeros((n, 2, 2))
    on_axis = a <= 0.0
    em[on_axis, 1, 1] = 0.5
    em[on_axis, 0, 1] = em[on_axis, 1, 0] = 0.5
    em[on_axis, 0, 0] = 0.0
    near = (~on_axis) & (a / h < 4.0)
    if np.any(near):
        aa, bb, hh = a[near], b[near], h[near]
        lg = np.log(bb / aa)
        em[near, 0, 0] = (bb**2 * lg - 2 * bb * hh + 0.5 * (bb**2 - aa**2)) / hh**2
        em[near, 1, 1] = (0.5 * (bb**2 - aa**2) - 2 * aa * hh + aa**2 * lg) / hh**2
        em[near, 0, 1] = em[near, 1, 0] = (-0.5 * (bb**2 - aa**2) + (aa + bb) * hh
                                           - aa * bb * lg) / hh**2
    far = (~on_axis) & ~near
    if np.any(far):
        t, wq = np.polynomial.legendre.leggauss(8)
        t = 0.5 * (t + 1.0)
        wq = 0.5 * wq
        aa, hh = a[far][:, None], h[far][:, None]
        rr = aa + hh * t[None]
        m1, m2 = 1.0 - t[None], t[None]
        f = hh * wq[None] / rr
        em[far, 0, 0] = np.sum(m1 * m1 * f, axis=1)
        em[far, 1, 1] = np.sum(m2 * m2 * f, axis=1)
        em[far, 0, 1] = em[far, 1, 0] = np.sum(m1 * m2 * f, axis=1)
    return bm, dm, em


def element_matrices(cm: CylMesh) -> tuple[np.ndarray, np.ndarray]:
    """Unit-conductivity element matrices of every cell, (n_cells, 4, 4) each.

    The element matrix of harmonic m is ``K0 + m**2 K1``; ``K0`` includes the Robin
    far-field term ``int alpha u v r dl`` (``alpha = cos(beta) / R`` about the face centre)
    on outer boundaries. Local node order: (i, j), (i+1, j), (i, j+1), (i+1, j+1).
    """
    kx, mx = _x_interval_matrices(cm.x)
    br, dr, er = _r_interval_matrices(cm.r)
    i, j = cm.cell_ij()
    # kron(A_r, B_x)[2 ar + ax, 2 br + bx] = A_r[ar, br] B_x[ax, bx]
    k0 = (np.einsum("eab,ecd->eacbd", br[j], kx[i]) + np.einsum("eab,ecd->eacbd", dr[j], mx[i]))
    k1 = np.einsum("eab,ecd->eacbd", er[j], mx[i])
    k0 = k0.reshape(-1, 4, 4)
    k1 = k1.reshape(-1, 4, 4)
    _add_robin(cm, k0)
    return k0, k1


def _add_robin(cm: CylMesh, k0: np.ndarray) -> None:
    """Add the mixed far-field term on the front, back and outer boundaries (in place)."""
    t, wq = np.polynomial.legendre.leggauss(3)
    t = 0.5 * (t + 1.0)
    wq = 0.5 * wq
    nxc = cm.nx - 1
    x, r = cm.x, cm.r
    # front (x = x_max) and back (x = x_min): edges along r
    for ix_cell, x0, loc in ((0, x[0], (0, 2)), (nxc - 1, x[-1], (1, 3))):
        a, b = r[:-1], r[1:]
        h = b - a
        rr = a[:, None] + h[:, None] * t[None]
        dist2 = x0**2 + rr**2
        alpha = abs(x0) / dist2
        f = alpha * rr * h[:, None] * wq[None]
        m1, m2 = 1.0 - t[None], t[None]
        cells = np.arange(cm.nr - 1) * nxc + ix_cell
        p, q = loc
        k0[cells, p, p] += np.sum(m1 * m1 * f, axis=1)
        k0[cells, q, q] += np.sum(m2 * m2 * f, axis=1)
        k0[cells, p, q] += np.sum(m1 * m2 * f, axis=1)
        k0[cells, q, p] += np.sum(m1 * m2 * f, axis=1)
    # outer radius: edges along x
    r0 = r[-1]
    a, b = x[:-1], x[1:]
    h = b - a
    xx = a[:, None] + h[:, None] * t[None]
    alpha = r0 / (xx**2 + r0**2)
    f = alpha * r0 * h[:, None] * wq[None]
    m1, m2 = 1.0 - t[None], t[None]
    cells = (cm.nr - 2) * nxc + np.arange(nxc)
    k0[cells, 2, 2] += np.sum(m1 * m1 * f, axis=1)
    k0[cells, 3, 3] += np.sum(m2 * m2 * f, axis=1)
    k0[cells, 2, 3] += np.sum(m1 * m2 * f, axis=1)
    k0[cells, 3, 2] += np.sum(m1 * m2 * f, axis=1)


class _Assembler:
    """Fast assembly of ``sum_e s_e K_e`` on a fixed sparsity pattern (CSR)."""

    def __init__(self, cell_nodes: np.ndarray, n_nodes: int) -> None:
        rows = np.repeat(cell_nodes, 4, axis=1).ravel()
        cols = np.tile(cell_nodes, (1, 4)).ravel()
        key = rows.astype(np.int64) * n_nodes + cols
        uniq, self.inverse = np.unique(key, return_inverse=True)
        self.nnz = len(uniq)
        r_u, c_u = np.divmod(uniq, n_nodes)
        self.indices = c_u.astype(np.int32)
        self.indptr = np.searchsorted(r_u, np.arange(n_nodes + 1)).astype(np.int32)
        self.n = n_nodes

    def __call__(self, elem: np.ndarray, scale: np.ndarray) -> sp.csr_matrix:
        vals = (elem * scale[:, None, None]).ravel()
        data = np.bincount(self.inverse, weights=vals, minlength=self.nnz)
        return sp.csr_matrix((data, self.indices.copy(), self.indptr.copy()),
                             shape=(self.n, self.n))


def _factorize(a: sp.spmatrix) -> Any:
    """Factorise a symmetric positive definite matrix; returns ``solve(b)``."""
    a = sp.csc_matrix(a)
    if HAVE_CHOLMOD:
        return _cholmod_cholesky(a)
    from scipy.sparse.linalg import splu

    lu = splu(a, permc_spec="MMD_AT_PLUS_A")
    return lu.solve


# --------------------------------------------------------------------------- primary field
def primary_harmonics(xs: float, rs: float, x: np.ndarray, r: np.ndarray, m_max: int
                      ) -> np.ndarray:
    """Azimuthal harmonics of ``1/(4 pi R)`` of a unit point at (xs, rs) on the grid nodes.

    ``1/(4 pi R) = sum_m a_m(x, r) cos(m phi)``, phi the azimuth relative to the source.

    Parameters
    ----------
    xs, rs : float
        Source position (ahead, radius), m.
    x, r : numpy.ndarray
        Grid node coordinates, m (nodes ordered x fastest).
    m_max : int
        Highest harmonic.

    Returns
    -------
    numpy.ndarray
        (m_max + 1, len(r) * len(x)), 1/m. The node at the source itself gets 0.
    """
    xx, rr = np.meshgrid(x, r)
    dx = (xx - xs).ravel()
    rn = rr.ravel()
    n = dx.size
    out = np.zeros((m_max + 1, n))
    if rs == 0.0:
        d = np.hypot(dx, rn)
        ok = d > 1e-9
        out[0] = np.where(ok, 1.0 / (FOUR_PI * np.where(ok, d, 1.0)), 0.0)
        return out
    axis = rn == 0.0
    d_ax = np.hypot(dx[axis], rs)
    out[0, axis] = 1.0 / (FOUR_PI * d_ax)
    off = ~axis
    base = dx**2 + (rn - rs) ** 2
    prod = rn * rs
    is_src = off & (base <= 1e-18)
    work = off & ~is_src
    idx = np.nonzero(work)[0]
    chi = 1.0 + base[idx] / (2.0 * prod[idx])
    alpha = np.arccosh(np.maximum(chi, 1.0 + 1e-300))
    need = m_max + 30.0 / np.maximum(alpha, 1e-12)
    need = np.maximum(need, 2 * m_max + 4)
    n_pts = 2 ** np.ceil(np.log2(np.minimum(need, 2**17))).astype(int)
    for npt in np.unique(n_pts):
        sel = idx[n_pts == npt]
        half = np.sin(np.pi * np.arange(npt) / npt) ** 2  # sin^2(phi/2)
        chunk = max(1, int(4_000_000 // npt))
        for k0 in range(0, len(sel), chunk):
            s = sel[k0:k0 + chunk]
            d2 = base[s][:, None] + 4.0 * prod[s][:, None] * half[None]
            val = 1.0 / (FOUR_PI * np.sqrt(d2))
            f = np.fft.rfft(val, axis=1)[:, : m_max + 1].real / npt
            f[:, 1:] *= 2.0
            out[: f.shape[1], s] = f.T
    return out


def point_potential(src: np.ndarray, rec: np.ndarray) -> float:
    """``1 / (4 pi |src - rec|)``, 1/m."""
    return 1.0 / (FOUR_PI * float(np.linalg.norm(np.asarray(src) - np.asarray(rec))))


# --------------------------------------------------------------------------- solution
@dataclass
class AxisymSolution:
    """Harmonic fields of all current electrodes at all potential electrodes.

    ``potentials(theta)`` sums them for any azimuths: the fields do not depend on them.
    """

    forward: AxisymForward
    secondary: np.ndarray  # (M + 1, n_rec, n_src), V/A
    rho_source: np.ndarray  # (n_src,), ohm-m (nan: no primary)
    rho_ground: np.ndarray

    def potentials(self, theta_deg: Mapping[str, float] | None = None) -> np.ndarray:
        """Potential (V/A) at every receiver of a unit current at every source.

        Parameters
        ----------
        theta_deg : mapping label -> azimuth in degrees, optional
            Azimuths overriding the electrodes' own (e.g. a turned cutterhead).

        Returns
        -------
        numpy.ndarray
            (n_rec, n_src), V/A.
        """
        fw = self.forward
        th_s = fw._angles(fw.sources, theta_deg)
        th_k = fw._angles(fw.receivers, theta_deg)
        dth = th_k[:, None] - th_s[None, :]
        m = np.arange(self.secondary.shape[0])[:, None, None]
        w = np.cos(m * dth[None]) * (m <= fw.pair_harmonics[None])
        out = np.sum(w * self.secondary, axis=0)
        out += fw._primary_at_receivers(self.rho_source, theta_deg)
        return out


class AxisymForward:
    """Axisymmetric harmonic forward model on a graded (x, r) mesh.

    Parameters
    ----------
    electrodes : sequence of AxElectrode
        All electrodes (point electrodes become mesh nodes).
    sources, receivers : sequence of str
        Labels of the current electrodes and the potential electrodes.
    geometry : CylGeometry
        Machine and tunnel.
    settings : AxisymSettings, optional
    steel_resistivity_ohmm : float
        Steel resistivity in ``'capped'`` mode when the settings give none, ohm-m.
    tunnel_resistivity_ohmm : float
        Resistivity of the tunnel bore behind the shield, ohm-m.
    extra_x, extra_r : sequence of float
        More mesh lines (e.g. a contact), m.
    """

    def __init__(self, electrodes: Sequence[AxElectrode], sources: Sequence[str],
                 receivers: Sequence[str], geometry: CylGeometry | None = None,
                 settings: AxisymSettings | None = None, steel_resistivity_ohmm: float = 1e-5,
                 tunnel_resistivity_ohmm: float = 300.0, extra_x: Sequence[float] = (),
                 extra_r: Sequence[float] = ()) -> None:
        self.settings = settings or AxisymSettings()
        self.geometry = geometry or CylGeometry()
        self.electrodes = {e.label: e for e in electrodes}
        self.sources = [self.electrodes[s] for s in sources if not self.electrodes[s].at_infinity]
        self.receivers = [self.electrodes[k] for k in receivers
                          if not self.electrodes[k].at_infinity]
        self.source_index = {e.label: i for i, e in enumerate(self.sources)}
        self.receiver_index = {e.label: i for i, e in enumerate(self.receivers)}
        self.tunnel_resistivity_ohmm = float(tunnel_resistivity_ohmm)
        s = self.settings
        self.steel_resistivity_ohmm = float(s.steel_resistivity_ohmm
                                            if s.steel_resistivity_ohmm is not None
                                            else steel_resistivity_ohmm)
        has_steel = self.geometry.has_machine
        if not has_steel and any(e.on_steel for e in electrodes):
            raise ValueError("an electrode is on the steel but the model has no machine body")
        pts = sorted({(e.x_m, e.r_m) for e in electrodes if e.is_point})
        self.mesh = build_cylmesh(pts, self.geometry, s.mesh, extra_x=extra_x, extra_r=extra_r)
        self._x0 = self.mesh.x.copy()
        kx = ([p[0] for p in pts] + [e[0] if isinstance(e, tuple) else e for e in extra_x]
              + [0.0, self._x0[0], self._x0[-1]])
        if self.geometry.has_machine:
            kx += [-self.geometry.shield_length_m, -0.5 * self.geometry.shield_length_m]
        if self.geometry.bore_radius_m is not None:
            kx.append(-self.geometry.shield_length_m - self.geometry.tunnel_length_m)
        key = np.asarray(kx, float)
        self._x_free = np.array([np.min(np.abs(key - x)) > 1e-9 for x in self._x0])
        cm = self.mesh
        self.cell_nodes = cm.cell_nodes()
        self.k0, self.k1 = element_matrices(cm)
        self._assemble = _Assembler(self.cell_nodes, cm.n_nodes)
        self.region = cm.region
        self.ground_cells = np.nonzero(self.region == "ground")[0]
        steel_cells = self.region == "machine"
        self.steel_cells = steel_cells
        steel_nodes = np.zeros(cm.n_nodes, bool)
        steel_nodes[self.cell_nodes[steel_cells].ravel()] = True
        self.steel_nodes = steel_nodes
        self.perfect = has_steel and s.steel == "perfect"
        axis_nodes = np.zeros(cm.n_nodes, bool)
        axis_nodes[cm.node_id(np.arange(cm.nx), 0)] = True
        self.axis_nodes = axis_nodes
        # steel reference node (capped mode): on the axis, half-way along the shield
        if has_steel:
            self.steel_ref = cm.locate(-0.5 * self.geometry.shield_length_m, 0.0)
        else:
            self.steel_ref = -1
        # node of each point electrode and the cells around it
        self.node_of: dict[str, int] = {}
        for e in electrodes:
            if e.is_point:
                nid = cm.locate(e.x_m, e.r_m)
                if steel_nodes[nid]:
                    raise ValueError(f"electrode {e.label!r} at (x={e.x_m} m, r={e.r_m} m) lies "
                                     "on the steel: declare it on_steel (bare) or move it "
                                     "into the ground")
                self.node_of[e.label] = nid
        self._node_cells = self._cells_of_nodes()
        # reduction maps
        self._p0 = self._reduction(m=0)
        self._p1 = self._reduction(m=1)
        self._choose_harmonics()
        # primary harmonics (geometry only), per source
        self._primary: dict[str, np.ndarray] = {}
        for e in self.sources:
            if e.is_point and s.singularity_removal:
                self._primary[e.label] = self._primary_of(e, int(self.source_harmonics[
                    self.source_index[e.label]]))
        self._unit_nonsteel: dict[int, sp.csr_matrix] = {}
        self._symbolic: dict[int, Any] = {}
        _LOG.info("axisym: %d nodes, %d sources, %d receivers, harmonics up to %d (%s)",
                  cm.n_nodes, len(self.sources), len(self.receivers), self.m_max,
                  "CHOLMOD" if HAVE_CHOLMOD else "SuperLU")

    # ------------------------------------------------------------------ set-up helpers
    def _cells_of_nodes(self) -> dict[int, np.ndarray]:
        out = {}
        for nid in self.node_of.values():
            out[nid] = np.nonzero(np.any(self.cell_nodes == nid, axis=1))[0]
        return out

    def _reduction(self, m: int) -> tuple[sp.csr_matrix, np.ndarray, int]:
        """Map from reduced unknowns to nodes: (P, dof of each node or -1, steel dof or -1)."""
        n = self.mesh.n_nodes
        drop = self.axis_nodes.copy() if m >= 1 else np.zeros(n, bool)
        if self.perfect:
            drop |= self.steel_nodes
        keep = np.nonzero(~drop)[0]
        dof = np.full(n, -1, dtype=np.int64)
        dof[keep] = np.arange(len(keep))
        steel_dof = -1
        rows, cols = list(keep), list(range(len(keep)))
        n_dof = len(keep)
        if self.perfect and m == 0:
            st = np.nonzero(self.steel_nodes)[0]
            steel_dof = n_dof
            dof[st] = steel_dof
            rows += list(st)
            cols += [steel_dof] * len(st)
            n_dof += 1
        p = sp.csr_matrix((np.ones(len(rows)), (rows, cols)), shape=(n, n_dof))
        return p, dof, steel_dof

    def _interface_distance(self, e: AxElectrode) -> float:
        """Distance in (x, r) from an electrode to the nearest interface not in its primary, m."""
        geo = self.geometry
        d = self.settings.near_field_m
        if geo.has_machine:
            rad, length = float(geo.machine_radius_m), geo.shield_length_m
            px, pr = e.x_m, e.r_m
            img = self._image_of(e)
            if img is None:  # distance to the rectangle [-length, 0] x [0, rad]
                ddx = max(-length - px, 0.0, px)
                d = min(d, math.hypot(ddx, max(pr - rad, 0.0)))
            else:  # the mirrored surface is in the primary: its edges count
                corners = [(0.0, rad), (-length, rad)]
                d = min(d, min(math.hypot(px - cx, pr - cr) for cx, cr in corners))
        bore = geo.bore_radius_m
        if bore is not None:
            back = -geo.shield_length_m - geo.tunnel_length_m
            ddx = max(back - e.x_m, 0.0, e.x_m + geo.shield_length_m)
            d = min(d, math.hypot(ddx, max(e.r_m - bore, 0.0)))
        return max(d, 1e-3)

    def _image_of(self, e: AxElectrode) -> tuple[float, float] | None:
        """Mirror point of a point electrode in the nearest steel surface, or None.

        A perfect conductor's image (opposite sign) in the face plane ``x = 0``, the skin
        ``r = R`` or the tail plane ``x = -L``, for electrodes within ``R/2`` of that surface.
        It makes the primary vanish on the surface next to the electrode, so the computed
        secondary field is smooth there.
        """
        geo = self.geometry
        if not (self.settings.face_image and self.perfect and e.is_point):
            return None
        rad, length = float(geo.machine_radius_m), geo.shield_length_m
        px, pr = e.x_m, e.r_m
        cands = []
        if px > 0.0 and pr < rad:
            cands.append((px, (-px, pr)))
        if -length < px < 0.0 and pr > rad:
            cands.append((pr - rad, (px, 2.0 * rad - pr)))
        if px < -length and pr < rad:
            cands.append((-length - px, (-2.0 * length - px, pr)))
        if not cands:
            return None
        dist, img = min(cands)
        return img if dist < 0.5 * rad else None

    def _choose_harmonics(self) -> None:
        """Harmonic count per (receiver, source) pair from the geometry."""
        s = self.settings
        ns, nk = len(self.sources), len(self.receivers)
        pair = np.zeros((nk, ns), dtype=int)
        for js, es in enumerate(self.sources):
            for jk, ek in enumerate(self.receivers):
                if es.r_m == 0.0 or ek.r_m == 0.0 or es.on_steel or ek.on_steel:
                    continue
                ds, dk = self._interface_distance(es), self._interface_distance(ek)
                sep = math.hypot(es.x_m - ek.x_m, es.r_m - ek.r_m)
                s_eff = max(sep, ds + dk)
                m = math.ceil(s.harmonic_factor * math.sqrt(es.r_m * ek.r_m) / s_eff)
                pair[jk, js] = min(s.max_harmonics, m + s.min_harmonics)
        self.pair_harmonics = pair
        self.source_harmonics = pair.max(axis=0) if nk else np.zeros(ns, int)
        self.receiver_harmonics = pair.max(axis=1) if ns else np.zeros(nk, int)
        self.m_max = int(pair.max()) if pair.size else 0

    def _primary_of(self, e: AxElectrode, m_max: int, x: np.ndarray | None = None
                    ) -> np.ndarray:
        cm = self.mesh
        xs = cm.x if x is None else x
        u = primary_harmonics(e.x_m, e.r_m, xs, cm.r, m_max)
        img = self._image_of(e)
        if img is not None:
            u -= primary_harmonics(img[0], img[1], xs, cm.r, m_max)
        u[~np.isfinite(u)] = 0.0  # an image point on a steel node (never used)
        if x is None:
            u[:, self.node_of[e.label]] = 0.0  # placeholder at the singular node (cancels)
        return u

    def fit_x_lines(self, positions: Sequence[float]) -> int:
        """Move free mesh lines across the axis onto given axial positions (e.g. contacts).

        Lines through electrodes and structure edges never move; every other line starts
        from its original place, so repeated calls do not drift. Element matrices and the
        primary fields of the moved columns are recomputed (the sparsity pattern stays).

        Parameters
        ----------
        positions : sequence of float
            Axial positions in the machine frame, m (outside the mesh: ignored).

        Returns
        -------
        int
            Number of positions that now lie on a mesh line.
        """
        x0 = self._x0
        target = x0.copy()
        hit = 0
        for c in positions:
            if not (x0[0] < c < x0[-1]):
                continue
            i = int(np.searchsorted(x0, c)) - 1  # x0[i] <= c < x0[i + 1]
            if abs(x0[i] - c) < 1e-9 or abs(x0[i + 1] - c) < 1e-9:
                hit += 1
                continue
            cand = [j for j in (i, i + 1) if self._x_free[j] and target[j] == x0[j]]
            if not cand:
                _LOG.info("no free mesh line next to x = %.3f m; cells there are averaged", c)
                continue
            j = min(cand, key=lambda k: abs(x0[k] - c))
            target[j] = c
            hit += 1
        cm = self.mesh
        moved = np.nonzero(target != cm.x)[0]
        if moved.size == 0:
            return hit
        cm.x = target
        self.k0, self.k1 = element_matrices(cm)
        self._unit_nonsteel.clear()
        nx = cm.nx
        for e in self.sources:
            if e.label not in self._primary:
                continue
            m_max = self._primary[e.label].shape[0] - 1
            cols = self._primary_of(e, m_max, x=target[moved])  # (M+1, nr * n_moved)
            ids = (np.arange(cm.nr)[:, None] * nx + moved[None, :]).ravel()
            self._primary[e.label][:, ids] = cols
        pgm = cm.mesh
        from tbminv.gimli import pg

        for ix in moved:
            for ir in range(cm.nr):
                pgm.node(int(ir * nx + ix)).setPos(pg.Pos(float(target[ix]), float(cm.r[ir])))
        return hit

    def _angles(self, els: Sequence[AxElectrode], theta: Mapping[str, float] | None
                ) -> np.ndarray:
        th = np.array([(theta or {}).get(e.label, e.theta_deg) for e in els], float)
        return np.radians(th)

    def _primary_at_receivers(self, rho_src: np.ndarray, theta: Mapping[str, float] | None
                              ) -> np.ndarray:
        out = np.zeros((len(self.receivers), len(self.sources)))
        if not self.settings.singularity_removal:
            return out
        for js, es in enumerate(self.sources):
            if not es.is_point:
                continue
            th = (theta or {}).get(es.label, es.theta_deg)
            ps = replace(es, theta_deg=th).xyz()
            im = self._image_of(es)
            img = None if im is None else replace(es, x_m=im[0], r_m=im[1], theta_deg=th).xyz()
            for jk, ek in enumerate(self.receivers):
                if ek.on_steel and not self.perfect:  # read at the steel reference node
                    pk = np.array([-0.5 * self.geometry.shield_length_m, 0.0, 0.0])
                    v = point_potential(ps, pk)
                    out[jk, js] = rho_src[js] * v
                    continue
                if not ek.is_point:
                    continue
                if ek.label == es.label:
                    out[jk, js] = np.nan
                    continue
                pk = replace(ek, theta_deg=(theta or {}).get(ek.label, ek.theta_deg)).xyz()
                v = point_potential(ps, pk)
                if img is not None:
                    v -= point_potential(img, pk)
                out[jk, js] = rho_src[js] * v
        return out

    # ------------------------------------------------------------------ model helpers
    def cell_conductivity(self, rho_ground: np.ndarray) -> np.ndarray:
        """Conductivity of every cell (S/m) from ground-cell resistivities (ohm-m)."""
        rho_ground = np.asarray(rho_ground, float)
        if rho_ground.shape != (len(self.ground_cells),):
            raise ValueError(f"expected {len(self.ground_cells)} ground-cell resistivities, got "
                             f"shape {rho_ground.shape}")
        if np.any(~(rho_ground > 0)):
            raise ValueError("ground resistivities must be positive and finite")
        sig = np.empty(self.mesh.n_cells)
        sig[self.ground_cells] = 1.0 / rho_ground
        sig[self.region == "tunnel"] = 1.0 / self.tunnel_resistivity_ohmm
        sig[self.steel_cells] = 0.0 if self.perfect else 1.0 / self.steel_resistivity_ohmm
        return sig

    def ground_centers(self) -> np.ndarray:
        """Centres (x, r) of the ground cells, m (machine frame)."""
        return self.mesh.cell_centers()[self.ground_cells]

    def _source_rho(self, sig: np.ndarray) -> np.ndarray:
        rho = np.full(len(self.sources), np.nan)
        for js, es in enumerate(self.sources):
            if not es.is_point:
                continue
            cells = self._node_cells[self.node_of[es.label]]
            s = sig[cells]
            if np.ptp(s) > 1e-9 * np.max(s):
                _warn_once(("mixed-source", es.label),
                           "electrode %s: the cells around it differ in resistivity; the "
                           "singularity removal assumes them equal (mean used)", es.label)
            rho[js] = 1.0 / float(np.mean(s))
        return rho

    def _apply_unit(self, m: int, u: np.ndarray) -> np.ndarray:
        """Unit-conductivity matrix of harmonic m (steel cells left out if perfect) times u."""
        if not self._unit_nonsteel:
            scale = (~self.steel_cells).astype(float) if self.perfect else \
                np.ones(self.mesh.n_cells)
            self._unit_nonsteel[0] = self._assemble(self.k0, scale)
            self._unit_nonsteel[1] = self._assemble(self.k1, scale)
        out = self._unit_nonsteel[0] @ u
        if m:
            out += (m * m) * (self._unit_nonsteel[1] @ u)
        return out

    def _factor(self, m: int, a_red: sp.csc_matrix) -> Any:
        """Factorise, reusing the symbolic analysis of the pattern (m = 0 or m >= 1)."""
        if not HAVE_CHOLMOD:
            return _factorize(a_red)
        key = min(m, 1)
        sym = self._symbolic.get(key)
        if sym is None:
            from sksparse.cholmod import analyze

            sym = self._symbolic[key] = analyze(a_red)
        return sym.cholesky(a_red)

    # ------------------------------------------------------------------ solving
    def _harmonic(self, m: int, sig: np.ndarray, rho_src: np.ndarray,
                  want_adjoint: bool = False) -> dict[str, Any]:
        """Solve harmonic m for all active sources (and receivers' adjoint fields)."""
        p, dof, steel_dof = self._p0 if m == 0 else self._p1
        a = self._assemble(self.k0 + m * m * self.k1, sig)
        a_red = (p.T @ a @ p).tocsc()
        solve = self._factor(m, a_red)
        cm_w = harmonic_weight(m)
        act = [js for js in range(len(self.sources)) if self.source_harmonics[js] >= m]
        n = self.mesh.n_nodes
        rhs = np.zeros((n, len(act)))
        extra = np.zeros((p.shape[1], len(act)))
        up_t = np.zeros((n, len(act)))
        # perfect conductor: the primary is dropped on steel nodes (w carries the steel
        # potential); capped steel: the classic splitting over all cells
        keep_p = (~self.steel_nodes).astype(float) if self.perfect else np.ones(n)
        pcols = []
        for c, js in enumerate(act):
            es = self.sources[js]
            if es.is_point and not self.settings.singularity_removal:
                extra[dof[self.node_of[es.label]], c] = 1.0 / cm_w
            elif es.is_point:
                u1 = self._primary[es.label][m]
                pcols.append(c)
                rhs[:, c] = u1
                up_t[:, c] = rho_src[js] * u1 * keep_p
                if m == 0 and self._image_of(es) is not None:
                    # the image (-I) inside the steel: its flux must not charge the body
                    extra[steel_dof, c] += 1.0 / cm_w
            elif m == 0:  # current into the steel body
                if self.perfect:
                    extra[steel_dof, c] = 1.0 / cm_w
                else:
                    extra[dof[self.steel_ref], c] = 1.0 / cm_w
        if pcols:
            # identity f = A_s u_p on every row (for the merged steel row of a perfect
            # conductor the steel cells add nothing: stiffness row sums vanish)
            rhs[:, pcols] = self._apply_unit(m, rhs[:, pcols])
        a_up = a @ up_t
        rhs -= a_up
        w = p @ solve(p.T @ rhs + extra) if act else np.zeros((n, 0))
        out: dict[str, Any] = {"act": act, "w": w, "up": up_t, "a_up": a_up}
        if want_adjoint:
            ract = [jk for jk in range(len(self.receivers)) if self.receiver_harmonics[jk] >= m]
            load = np.zeros((p.shape[1], len(ract)))
            for c, jk in enumerate(ract):
                ek = self.receivers[jk]
                if ek.is_point:
                    d = dof[self.node_of[ek.label]]
                elif self.perfect:
                    d = steel_dof
                else:
                    d = dof[self.steel_ref]
                if d >= 0:
                    load[d, c] = 1.0 / cm_w
            out["ract"] = ract
            out["v"] = p @ solve(load) if ract else np.zeros((n, 0))
        return out

    def _receiver_node(self, ek: AxElectrode) -> int:
        if ek.is_point:
            return self.node_of[ek.label]
        if self.perfect:
            return int(np.nonzero(self.steel_nodes)[0][0])
        return self.steel_ref

    def _solve_range(self, ms: Sequence[int], sig: np.ndarray, rho_src: np.ndarray
                     ) -> np.ndarray:
        """Receiver values of the secondary fields of harmonics ``ms``."""
        rec_nodes = np.array([self._receiver_node(e) for e in self.receivers], dtype=int)
        sec = np.zeros((self.m_max + 1, len(self.receivers), len(self.sources)))
        for m in ms:
            h = self._harmonic(m, sig, rho_src)
            if h["act"]:
                sec[m][:, h["act"]] = h["w"][rec_nodes]
        return sec

    def _jacobian_range(self, ms: Sequence[int], sig: np.ndarray, rho_src: np.ndarray,
                        pj: Sequence[tuple[int, int]], th_s: np.ndarray, th_k: np.ndarray
                        ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Secondary receiver values, d V / d sigma (ground cells) and source terms of ``ms``."""
        rec_nodes = np.array([self._receiver_node(e) for e in self.receivers], dtype=int)
        sec = np.zeros((self.m_max + 1, len(self.receivers), len(self.sources)))
        cs = np.zeros(len(pj))  # source-resistivity term
        gc = self.ground_cells
        cn = self.cell_nodes[gc]
        dvds = np.zeros((len(pj), gc.size))  # d V / d sigma_e on ground cells
        by_rec: dict[int, list[int]] = {}
        for q, (_js, jk) in enumerate(pj):
            by_rec.setdefault(jk, []).append(q)
        for m in ms:
            h = self._harmonic(m, sig, rho_src, want_adjoint=True)
            act, ract = h["act"], h["ract"]
            if act:
                sec[m][:, act] = h["w"][rec_nodes]
            if not act or not ract:
                continue
            cw = harmonic_weight(m)
            ke = (self.k0 + m * m * self.k1)[gc]
            col_s = {js: c for c, js in enumerate(act)}
            col_k = {jk: c for c, jk in enumerate(ract)}
            live = [q for q, (js, jk) in enumerate(pj)
                    if m <= self.pair_harmonics[jk, js] and js in col_s and jk in col_k]
            if not live:
                continue
            live_set = set(live)
            used_s = sorted({pj[q][0] for q in live})
            cols = [col_s[js] for js in used_s]
            utot = h["w"][:, cols] + h["up"][:, cols]  # (n, n_used)
            ku = np.einsum("eab,ebs->eas", ke, utot[cn])  # (n_g, 4, n_used)
            s_pos = {js: i for i, js in enumerate(used_s)}
            for jk, qs in by_rec.items():
                qs = [q for q in qs if q in live_set]
                if not qs:
                    continue
                v = h["v"][:, col_k[jk]]
                vl = v[cn]  # (n_g, 4)
                idx = [s_pos[pj[q][0]] for q in qs]
                bil = np.einsum("ea,eas->es", vl, ku[:, :, idx])  # (n_g, n_q)
                for c, q in enumerate(qs):
                    js = pj[q][0]
                    wgt = cw * math.cos(m * (th_k[jk] - th_s[js]))
                    dvds[q] -= wgt * bil[:, c]
                    if self.sources[js].is_point:
                        cs[q] += wgt * float(v @ h["a_up"][:, col_s[js]]) * rho_src[js]
        return sec, dvds, cs

    def _map_harmonics(self, fn_name: str, *args: Any) -> list[Any]:
        """Run a harmonic-range method over all harmonics in this process.

        A forked worker pool deadlocked next to pyGIMLi's threads, so it is not offered.
        """
        return [getattr(self, fn_name)(list(range(self.m_max + 1)), *args)]

    def solve(self, rho_ground: np.ndarray) -> AxisymSolution:
        """Solve all harmonics for all sources.

        Parameters
        ----------
        rho_ground : numpy.ndarray
            Resistivity of every ground cell (order of :attr:`ground_cells`), ohm-m.

        Returns
        -------
        AxisymSolution
        """
        sig = self.cell_conductivity(rho_ground)
        rho_src = self._source_rho(sig)
        sec = sum(self._map_harmonics("_solve_range", sig, rho_src))
        return AxisymSolution(self, sec, rho_src, np.asarray(rho_ground, float))

    def jacobian(self, rho_ground: np.ndarray, pairs: Sequence[tuple[str, str]],
                 theta_deg: Mapping[str, float] | None = None
                 ) -> tuple[np.ndarray, AxisymSolution]:
        """Sensitivity of pair potentials to the log-resistivity of every ground cell.

        Parameters
        ----------
        rho_ground : numpy.ndarray
            Ground-cell resistivities, ohm-m.
        pairs : sequence of (source label, receiver label)
        theta_deg : mapping, optional
            Azimuth overrides, degrees.

        Returns
        -------
        (numpy.ndarray, AxisymSolution)
            ``d V / d ln(rho_e)`` (n_pairs, n_ground_cells) in V/A, and the forward solution.
            The share of the cells around a current electrode is exact only summed over
            them (they must share one resistivity).
        """
        sig = self.cell_conductivity(rho_ground)
        rho_src = self._source_rho(sig)
        th_s = self._angles(self.sources, theta_deg)
        th_k = self._angles(self.receivers, theta_deg)
        pj = [(self.source_index[a], self.receiver_index[b]) for a, b in pairs]
        parts = self._map_harmonics("_jacobian_range", sig, rho_src, pj, th_s, th_k)
        sec = sum(p[0] for p in parts)
        dvds = sum(p[1] for p in parts)
        cs = sum(p[2] for p in parts)
        gc = self.ground_cells
        pos = np.full(self.mesh.n_cells, -1)
        pos[gc] = np.arange(gc.size)
        sol = AxisymSolution(self, sec, rho_src, np.asarray(rho_ground, float))
        prim = self._primary_at_receivers(rho_src, theta_deg)
        for q, (js, jk) in enumerate(pj):
            es = self.sources[js]
            if not es.is_point:
                continue
            # the primary read at the receiver: u_p1 / sigma_s -> - u_p1 / sigma_s^2
            if self.receivers[jk].is_point:
                cs[q] -= prim[jk, js] * rho_src[js]
            cells = pos[self._node_cells[self.node_of[es.label]]]
            if np.any(cells < 0):
                raise ValueError(f"electrode {es.label!r} touches a cell outside the ground")
            dvds[q, cells] += cs[q] / len(cells)
        jac = -dvds * sig[None, gc]
        return jac, sol

    # ------------------------------------------------------------------ layouts
    @classmethod
    def from_layout(cls, layout: Any, cutterhead_deg: float = 0.0,
                    face_chainage_m: float | None = None,
                    settings: AxisymSettings | None = None,
                    extra_x: Sequence[float] = ()) -> LayoutAxisym:
        """Axisymmetric model of a layout's protocol (see :class:`LayoutAxisym`)."""
        return LayoutAxisym(layout, cutterhead_deg=cutterhead_deg,
                            face_chainage_m=face_chainage_m, settings=settings, extra_x=extra_x)


# --------------------------------------------------------------------------- quadrupoles
def quadrupole_terms(measurements: Sequence[Any], infinity: set[str]) -> list[list[tuple]]:
    """Signed (source, receiver) pairs of every quadrupole ``R = (V_M - V_N) / I``.

    Parameters
    ----------
    measurements : sequence of objects with ``a, b, m, n`` labels (b / n may be None)
    infinity : set of str
        Labels at infinity (their terms vanish).

    Returns
    -------
    list of list of (sign, source, receiver)
    """
    out = []
    for q in measurements:
        terms = []
        for cur, sc in ((q.a, 1.0), (q.b, -1.0)):
            if cur is None or cur in infinity:
                continue
            for pot, sp_ in ((q.m, 1.0), (q.n, -1.0)):
                if pot is None or pot in infinity:
                    continue
                terms.append((sc * sp_, cur, pot))
        out.append(terms)
    return out


def _as_measurements(items: Sequence[Any]) -> list[Any]:
    from tbminv.layout import Measurement

    out = []
    for q in items:
        if isinstance(q, Measurement):
            out.append(q)
        else:
            a, b, m, n = (None if (x is None or x == "") else str(x) for x in tuple(q)[:4])
            out.append(Measurement(a=a, b=b, m=m, n=n))
    return out


class LayoutAxisym:
    """The axisymmetric model of a layout: mesh, protocol and ground filling.

    Parameters
    ----------
    layout : tbminv.layout.Layout
    cutterhead_deg : float
        Default cutterhead angle, degrees.
    face_chainage_m : float, optional
        Face chainage (needed for electrodes fixed in the ground), m.
    settings : AxisymSettings, optional
    extra_x : sequence of float
        More mesh lines across the axis (machine frame), m.

    Notes
    -----
    Bare electrodes and kind ``machine`` read the machine's potential; current into them goes
    into the whole body. A finite tunnel cover (ground surface) cannot be axisymmetric: it is
    left out (full space) with a warning.
    """

    def __init__(self, layout: Any, cutterhead_deg: float = 0.0,
                 face_chainage_m: float | None = None, settings: AxisymSettings | None = None,
                 extra_x: Sequence[Any] = (), measurements: Sequence[Any] | None = None,
                 extra_r: Sequence[Any] = ()) -> None:
        self.layout = layout
        self.cutterhead_deg = float(cutterhead_deg)
        self.face_chainage_m = face_chainage_m
        mach, tun = layout.machine, layout.tunnel
        if math.isfinite(tun.cover_m):
            _warn_once(("cover", layout.source, tun.cover_m),
                       "%s: the ground surface (cover %.1f m) is not axisymmetric; the "
                       "axisymmetric model treats the ground as a full space (the drive "
                       "inversion divides readings by a 3D surface factor, tbminv.surface)",
                       layout.source, tun.cover_m)
        geo = CylGeometry(
            machine_radius_m=mach.radius_m if mach.model_body else None,
            shield_length_m=mach.shield_length_m if mach.model_body else 0.0,
            tunnel_length_m=(tun.length_m if tun.model_cavity else 0.0),
            tunnel_radius_m=mach.radius_m)
        if not mach.model_body and tun.model_cavity:
            geo = replace(geo, shield_length_m=0.0)
        self.measurements = list(layout.measurements if measurements is None
                                 else _as_measurements(measurements))
        used = {lab for q in self.measurements for lab in q.labels() if lab is not None}
        cyl = layout.positions_cylindrical(cutterhead_deg, face_chainage_m)
        els = []
        for lab in layout.labels:
            if lab not in used:
                continue
            e = layout.electrode(lab)
            if e.at_infinity:
                els.append(AxElectrode(lab, at_infinity=True))
            elif e.on_steel:
                if not mach.model_body:
                    raise ValueError(f"{layout.source}: electrode {lab!r} is on the steel but "
                                     "the layout leaves the machine out (model_body = false)")
                els.append(AxElectrode(lab, on_steel=True))
            else:
                x, r, th = cyl[lab]
                els.append(AxElectrode(lab, float(x), float(r), float(th)))
        infinity = {e.label for e in els if e.at_infinity}
        self.terms = quadrupole_terms(self.measurements, infinity)
        srcs = sorted({s for t in self.terms for _, s, _ in t})
        recs = sorted({k for t in self.terms for _, _, k in t})
        for t, q in zip(self.terms, self.measurements):
            for _, s_, k in t:
                if s_ == k:
                    raise ValueError(f"{layout.source}: measurement {q} uses {s_!r} for current "
                                     "and potential")
        self.settings = settings or AxisymSettings()
        self.forward = AxisymForward(
            els, srcs, recs, geo, self.settings,
            steel_resistivity_ohmm=mach.body_resistivity_ohmm,
            tunnel_resistivity_ohmm=tun.lining_resistivity_ohmm, extra_x=extra_x,
            extra_r=extra_r)
        self.pairs = sorted({(s_, k) for t in self.terms for _, s_, k in t})
        self._pair_index = {p: i for i, p in enumerate(self.pairs)}

    @property
    def mesh(self) -> CylMesh:
        """The forward mesh."""
        return self.forward.mesh

    def _thetas(self, cutterhead_deg: float | None) -> dict[str, float] | None:
        if cutterhead_deg is None or cutterhead_deg == self.cutterhead_deg:
            return None
        cyl = self.layout.positions_cylindrical(cutterhead_deg, self.face_chainage_m)
        return {lab: v[2] for lab, v in cyl.items() if v is not None}

    def ground_resistivity(self, scenario: Any, face_chainage_m: float,
                           subsample: int | None = None, average: str | None = None
                           ) -> np.ndarray:
        """Ground-cell resistivities of a scenario for a face chainage, ohm-m.

        With ``fit_contacts`` (default) free mesh lines first move onto the contacts (the
        mesh changes state). Each cell is sampled at ``subsample`` x ``subsample`` points and
        averaged
        (``average``: ``'geometric'`` mean of resistivity, ``'resistivity'`` arithmetic
        mean (series), ``'conductivity'`` arithmetic mean of conductivity (parallel); with
        ``subsample = 1`` the cell centre). Defaults from the settings.

        Raises
        ------
        tbminv.ground.NotAxisymmetricError
            If the scenario is not symmetric about the tunnel axis.
        """
        n = self.settings.fill_subsample if subsample is None else int(subsample)
        avg = self.settings.fill_average if average is None else average
        fw = self.forward
        if self.settings.fit_contacts:
            if scenario.axisymmetric_problems():
                scenario.resistivity_axisym(0.0, 0.0)  # raises NotAxisymmetricError
            fw.fit_x_lines([c.chainage_m - face_chainage_m for c in scenario.contacts])
        cm = fw.mesh
        i, j = cm.cell_ij()
        i, j = i[fw.ground_cells], j[fw.ground_cells]
        t = (np.arange(n) + 0.5) / n
        xs = cm.x[i, None, None] + np.diff(cm.x)[i, None, None] * t[None, :, None]
        rs = cm.r[j, None, None] + np.diff(cm.r)[j, None, None] * t[None, None, :]
        xs, rs = np.broadcast_arrays(xs, rs)
        rho = np.asarray(scenario.resistivity_axisym(xs + face_chainage_m, rs), float)
        wgt = rs / np.sum(rs, axis=(1, 2), keepdims=True)  # ring volume weights
        if avg == "geometric":
            return np.exp(np.sum(wgt * np.log(rho), axis=(1, 2)))
        if avg == "resistivity":
            return np.sum(wgt * rho, axis=(1, 2))
        if avg == "conductivity":
            return 1.0 / np.sum(wgt / rho, axis=(1, 2))
        raise ValueError(f"average = {avg!r}: expected 'geometric', 'resistivity' or "
                         "'conductivity'")

    def transfer(self, pot: np.ndarray) -> np.ndarray:
        """Transfer resistances of the protocol from receiver x source potentials, ohm."""
        f = self.forward
        out = np.zeros(len(self.terms))
        for i, t in enumerate(self.terms):
            out[i] = sum(sg * pot[f.receiver_index[k], f.source_index[s_]] for sg, s_, k in t)
        return out

    def response(self, rho_ground: np.ndarray, cutterhead_deg: float | None = None
                 ) -> np.ndarray:
        """Transfer resistances of the protocol for ground-cell resistivities, ohm."""
        sol = self.forward.solve(rho_ground)
        return self.transfer(sol.potentials(self._thetas(cutterhead_deg)))

    def response_scenario(self, scenario: Any, face_chainage_m: float,
                          cutterhead_deg: float | None = None) -> np.ndarray:
        """Transfer resistances for a ground scenario at a face chainage, ohm."""
        return self.response(self.ground_resistivity(scenario, face_chainage_m), cutterhead_deg)

    def jacobian(self, rho_ground: np.ndarray, cutterhead_deg: float | None = None
                 ) -> tuple[np.ndarray, np.ndarray]:
        """Transfer resistances and their Jacobian w.r.t. ln(resistivity) of ground cells.

        Returns
        -------
        (numpy.ndarray, numpy.ndarray)
            R (n_meas,) in ohm and dR/d ln(rho) (n_meas, n_ground_cells) in ohm.
        """
        th = self._thetas(cutterhead_deg)
        jp, sol = self.forward.jacobian(rho_ground, self.pairs, th)
        jac = np.zeros((len(self.terms), jp.shape[1]))
        for i, t in enumerate(self.terms):
            for sg, s_, k in t:
                jac[i] += sg * jp[self._pair_index[(s_, k)]]
        return self.transfer(sol.potentials(th)), jac


class AxisymModel:
    """Forward model ``axisym`` for the model registry (:mod:`tbminv.models`).

    Builds one :class:`LayoutAxisym` per set of electrode positions in the machine frame
    (the same for every advance unless electrodes are fixed in the ground) and caches it.
    """

    def __init__(self, layout: Any, settings: AxisymSettings | None = None, **_: Any) -> None:
        self.layout = layout
        self.settings = settings or AxisymSettings()
        self._cache: dict[tuple, LayoutAxisym] = {}

    def model_for(self, face_chainage_m: float, cutterhead_deg: float = 0.0) -> LayoutAxisym:
        """The (cached) axisymmetric model for a face chainage."""
        cyl = self.layout.positions_cylindrical(cutterhead_deg, face_chainage_m)
        key = tuple(sorted((k, round(v[0], 9), round(v[1], 9)) for k, v in cyl.items()
                           if v is not None))
        if key not in self._cache:
            if len(self._cache) > 8:
                self._cache.clear()
            self._cache[key] = LayoutAxisym(self.layout, cutterhead_deg, face_chainage_m,
                                            self.settings)
        return self._cache[key]

    def response(self, scenario: Any, face_chainage_m: float,
                 cutterhead_deg: float = 0.0) -> np.ndarray:
        """Transfer resistances of the layout's protocol, ohm."""
        model = self.model_for(face_chainage_m, cutterhead_deg)
        return model.response_scenario(scenario, face_chainage_m, cutterhead_deg)


_SIM_CACHE: dict[tuple, LayoutAxisym] = {}


def simulate_model(layout: Any, scenario: Any, face_chainage_m: float, cutterhead_deg: float,
                   measurements: Sequence[Any]) -> np.ndarray:
    """Transfer resistances (ohm) of quadrupoles ``(a, b, m, n)`` for one face chainage.

    The signature of :data:`tbminv.simulate.MODELS` entries; models are cached per layout,
    electrode positions and quadrupole list.
    """
    quads = _as_measurements(measurements)
    cyl = layout.positions_cylindrical(cutterhead_deg, face_chainage_m)
    key = (id(layout), tuple(sorted((k, round(v[0], 9), round(v[1], 9))
                                    for k, v in cyl.items() if v is not None)),
           tuple(q.labels() for q in quads))
    model = _SIM_CACHE.get(key)
    if model is None:
        if len(_SIM_CACHE) > 8:
            _SIM_CACHE.clear()
        model = _SIM_CACHE[key] = LayoutAxisym(layout, cutterhead_deg, face_chainage_m,
                                               measurements=quads)
    return model.response_scenario(scenario, face_chainage_m, cutterhead_deg)


__all__ = ["AxisymSettings", "simulate_model", "AxElectrode", "AxisymForward", "AxisymSolution",
           "LayoutAxisym", "AxisymModel", "primary_harmonics", "element_matrices",
           "harmonic_weight", "quadrupole_terms", "HAVE_CHOLMOD"]
