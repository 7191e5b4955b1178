"""The axisymmetric harmonic solver: assembly, factorisation, forward and adjoint Jacobian."""

from __future__ import annotations

import logging
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
import scipy.sparse as sp

from tbminv.forward.axisym.fields import (
    HAVE_CHOLMOD,
    AxElectrode,
    AxisymSettings,
    _Assembler,
    _factorize,
    _warn_once,
    element_matrices,
    harmonic_weight,
    point_potential,
    primary_harmonics,
)
from tbminv.forward.axisym.mesh import CylGeometry, build_cylmesh
from tbminv.gimli import pg

_LOG = logging.getLogger(__name__)
_WARNED: set[tuple] = set()



# --------------------------------------------------------------------------- solution
@dataclass
class AxisymSolution:
    """Harmonic fields of all current electrodes at all potential electrodes.

    ``potentials(theta)`` sums them for any azimuths: the fields do not depend on them.
    """

    forward: AxisymSolver
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


class AxisymSolver:
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
            from sksparse.cholmod import analyze  # optional: HAVE_CHOLMOD checked above

            sym = self._symbolic[key] = analyze(a_red)
        return sym.cholesky(a_red)

    # ------------------------------------------------------------------ solving
    def _harmonic(self, m: int, sig: np.ndarray, rho_src: np.ndarray,
                  want_adjoint: bool = False, every: bool = False) -> dict[str, Any]:
        """Solve harmonic m for all active sources (and receivers' adjoint fields).

        ``every``: all sources and receivers, whatever their harmonic count.
        """
        p, dof, steel_dof = self._p0 if m == 0 else self._p1
        a = self._assemble(self.k0 + m * m * self.k1, sig)
        a_red = (p.T @ a @ p).tocsc()
        solve = self._factor(m, a_red)
        cm_w = harmonic_weight(m)
        act = [js for js in range(len(self.sources))
               if every or self.source_harmonics[js] >= m]
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
            ract = [jk for jk in range(len(self.receivers))
                    if every or self.receiver_harmonics[jk] >= m]
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
        """Secondary receiver values, d V / d sigma (ground cells) and source terms of ``ms``.

        ``th_s`` (n_sets, n_src) and ``th_k`` (n_sets, n_rec) are azimuth sets, radians: the
        harmonic fields are solved once and summed for every set (the last two outputs carry
        a leading set axis).
        """
        rec_nodes = np.array([self._receiver_node(e) for e in self.receivers], dtype=int)
        sec = np.zeros((self.m_max + 1, len(self.receivers), len(self.sources)))
        n_sets = th_s.shape[0]
        cs = np.zeros((n_sets, len(pj)))  # source-resistivity term
        gc = self.ground_cells
        cn = self.cell_nodes[gc]
        dvds = np.zeros((n_sets, len(pj), gc.size))  # d V / d sigma_e on ground cells
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
                    wgt = cw * np.cos(m * (th_k[:, jk] - th_s[:, js]))   # (n_sets,)
                    if n_sets == 1:
                        dvds[0, q] -= wgt[0] * bil[:, c]
                    else:
                        dvds[:, q] -= wgt[:, None] * bil[None, :, c]
                    if self.sources[js].is_point:
                        cs[:, q] += wgt * float(v @ h["a_up"][:, col_s[js]]) * rho_src[js]
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

    def harmonic_fields(self, rho_ground: np.ndarray, m_max: int, nodes: np.ndarray
                        ) -> tuple[np.ndarray, np.ndarray]:
        """Harmonics of every source field and every receiver's adjoint field at some nodes.

        The total field of a unit current at source ``s`` is
        ``u(x, r, phi) = sum_m u[m, :, s] cos(m (phi - theta_s))`` and the adjoint field of
        receiver ``k`` (a unit current there, solved with the same floating steel)
        ``v = sum_m v[m, :, k] cos(m (phi - theta_k))``, whatever harmonic count the
        readings themselves need. Current into the steel (or read on it) has ``m = 0`` only.

        Parameters
        ----------
        rho_ground : numpy.ndarray
            Ground-cell resistivities, ohm-m.
        m_max : int
            Highest harmonic.
        nodes : numpy.ndarray of int
            Mesh nodes to return.

        Returns
        -------
        (numpy.ndarray, numpy.ndarray)
            ``u`` (m_max + 1, n_nodes, n_sources) and ``v`` (m_max + 1, n_nodes,
            n_receivers), V/A.
        """
        sig = self.cell_conductivity(rho_ground)
        rho_src = self._source_rho(sig)
        for e in self.sources:
            prim = self._primary.get(e.label)
            if prim is not None and prim.shape[0] <= m_max:
                self._primary[e.label] = self._primary_of(e, int(m_max))
        nodes = np.asarray(nodes, dtype=int)
        u = np.zeros((m_max + 1, nodes.size, len(self.sources)))
        v = np.zeros((m_max + 1, nodes.size, len(self.receivers)))
        for m in range(m_max + 1):
            h = self._harmonic(m, sig, rho_src, want_adjoint=True, every=True)
            u[m] = (h["w"] + h["up"])[nodes]
            v[m] = h["v"][nodes]
        return u, v

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
        jac, sol = self.jacobian_sets(rho_ground, pairs, [theta_deg])
        return jac[0], sol

    def jacobian_sets(self, rho_ground: np.ndarray, pairs: Sequence[tuple[str, str]],
                      theta_sets: Sequence[Mapping[str, float] | None]
                      ) -> tuple[np.ndarray, AxisymSolution]:
        """:meth:`jacobian` for several azimuth sets from one solve per harmonic.

        The harmonic source and adjoint fields do not depend on the azimuths; only their sum
        over harmonics (the ``cos m (theta_k - theta_s)`` weights) does. A turned cutterhead
        is one set (its electrodes' azimuths overridden).

        Parameters
        ----------
        rho_ground : numpy.ndarray
            Ground-cell resistivities, ohm-m.
        pairs : sequence of (source label, receiver label)
        theta_sets : sequence of mapping or None
            Azimuth overrides per set, degrees (None: the electrodes' own).

        Returns
        -------
        (numpy.ndarray, AxisymSolution)
            ``d V / d ln(rho_e)`` (n_sets, n_pairs, n_ground_cells) in V/A, and the forward
            solution (``potentials(theta)`` gives any set's potentials).
        """
        sig = self.cell_conductivity(rho_ground)
        rho_src = self._source_rho(sig)
        sets = list(theta_sets) or [None]
        th_s = np.array([self._angles(self.sources, t) for t in sets]).reshape(
            len(sets), len(self.sources))
        th_k = np.array([self._angles(self.receivers, t) for t in sets]).reshape(
            len(sets), len(self.receivers))
        pj = [(self.source_index[a], self.receiver_index[b]) for a, b in pairs]
        parts = self._map_harmonics("_jacobian_range", sig, rho_src, pj, th_s, th_k)
        sec = sum(p[0] for p in parts)
        dvds = sum(p[1] for p in parts)
        cs = sum(p[2] for p in parts)
        gc = self.ground_cells
        pos = np.full(self.mesh.n_cells, -1)
        pos[gc] = np.arange(gc.size)
        sol = AxisymSolution(self, sec, rho_src, np.asarray(rho_ground, float))
        for i_set, theta in enumerate(sets):
            prim = self._primary_at_receivers(rho_src, theta)
            for q, (js, jk) in enumerate(pj):
                es = self.sources[js]
                if not es.is_point:
                    continue
                # the primary read at the receiver: u_p1 / sigma_s -> - u_p1 / sigma_s^2
                if self.receivers[jk].is_point:
                    cs[i_set, q] -= prim[jk, js] * rho_src[js]
                cells = pos[self._node_cells[self.node_of[es.label]]]
                if np.any(cells < 0):
                    raise ValueError(f"electrode {es.label!r} touches a cell outside the "
                                     "ground")
                dvds[i_set, q, cells] += cs[i_set, q] / len(cells)
        jac = -dvds * sig[None, None, gc]
        return jac, sol


__all__ = ["AxisymSolution", "AxisymSolver"]
