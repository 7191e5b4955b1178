"""Several cutterhead angles and face chainages in one mesh: copies of the moving electrodes.

A turning cutterhead puts its insulated electrodes at other places at each angle, and an
advancing face puts the electrodes fixed in the ground at other machine-frame places at each
face; the machine, the bore and every other electrode stay where they are. A mesh that holds
the moving electrodes at all those places at once (extra nodes, no extra material) therefore
gives the readings at every angle and face node from **one** solve, by superposition of the
unit-current potentials (:class:`tbminv.forward.fem3d.model.Forward3D`): each extra current
electrode costs one more back-substitution, not another mesh and factorisation.

:func:`node_layout` builds that layout and :func:`node_quadrupoles` the readings of each
(angle, face) node on it. Used by the 3D model's ``response_angles`` and by the surface-factor
table (:mod:`tbminv.forward.surfacetable`).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence

from tbminv.layout import Electrode, Layout

Quad = tuple[str | None, str | None, str | None, str | None]


def turns(e: Electrode) -> bool:
    """True for an electrode that turns with the cutterhead (insulated, on the cutterhead)."""
    return e.kind == "cutterhead" and e.insulated


def roles(layout: Layout) -> tuple[set[str], set[str]]:
    """Labels of the turning electrodes and of those fixed in the ground."""
    return ({e.label for e in layout.electrodes if turns(e)},
            {e.label for e in layout.electrodes if e.fixed_in_ground})


def copy_label(label: str, k: int, j: int) -> str:
    """Label of electrode ``label`` at angle node ``k`` and face node ``j``.

    ``~`` is not a character of layout labels, so a copy never clashes with an electrode.
    """
    return f"{label}~a{k}~f{j}"


def node_layout(layout: Layout, angles_deg: Sequence[float] = (0.0,),
                face_offsets_m: Sequence[float] = (0.0,)) -> Layout:
    """The layout plus its turning electrodes at each angle and fixed ones at each face offset.

    Parameters
    ----------
    layout : Layout
    angles_deg : sequence of float
        Cutterhead angles, degrees, relative to the cutterhead angle the mesh is built at; node
        ``k = 0`` is the electrode itself, so give 0 first when it is one of them.
    face_offsets_m : sequence of float
        Face positions ``F_j - F_0``, m, relative to the face the mesh is built at (node 0 the
        electrode itself): a fixed electrode sits ``offset`` further behind the face there.

    Returns
    -------
    Layout
        Without a protocol (give the readings explicitly, :func:`node_quadrupoles`).
    """
    turning, fixed = roles(layout)
    a0, f0 = float(angles_deg[0]), float(face_offsets_m[0])
    extra: list[Electrode] = []
    originals: list[Electrode] = []
    for e in layout.electrodes:
        if e.label in turning:
            originals.append(dataclasses.replace(e, angle_deg=e.angle_deg + a0))
            extra += [dataclasses.replace(e, label=copy_label(e.label, k, 0),
                                          angle_deg=e.angle_deg + float(a))
                      for k, a in enumerate(angles_deg) if k]
        elif e.label in fixed:
            originals.append(dataclasses.replace(e, chainage_m=float(e.chainage_m) - f0))
            extra += [dataclasses.replace(e, label=copy_label(e.label, 0, j),
                                          chainage_m=float(e.chainage_m) - float(off))
                      for j, off in enumerate(face_offsets_m) if j]
        else:
            originals.append(e)
    return dataclasses.replace(layout, electrodes=tuple(originals) + tuple(extra),
                               explicit_measurements=(), generators=())


def node_quadrupole(q: Quad, turning: set[str], fixed: set[str], k: int, j: int) -> Quad:
    """Quadrupole ``q`` with its moving electrodes at angle node ``k`` and face node ``j``."""
    def name(v: str | None) -> str | None:
        if v is None:
            return None
        if v in turning and k:
            return copy_label(v, k, 0)
        if v in fixed and j:
            return copy_label(v, 0, j)
        return v
    a, b, m, n = (name(v) for v in q)
    return (a, b, m, n)


__all__ = ["roles", "turns", "copy_label", "node_layout", "node_quadrupole"]
