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
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import scipy.sparse as sp

from tbminv.forward.axisym.mesh import CylMesh, CylMeshSettings

_LOG = logging.getLogger(__name__)
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
        :meth:`AxisymSolver.fit_x_lines`).

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
    from scipy.sparse.linalg import splu  # late: the fallback when CHOLMOD is missing

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


__all__ = ["FOUR_PI", "harmonic_weight", "AxisymSettings", "AxElectrode", "element_matrices",
           "primary_harmonics", "point_potential"]
