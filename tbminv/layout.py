"""Machine, tunnel and electrode layout: the layout file (TOML), validation, frame transforms.

Frames (SI units, metres and degrees):

* **World**: ``x`` = chainage along the tunnel axis, increasing in the drive direction; ``y``
  transverse, to the left looking ahead; ``z`` up, 0 on the tunnel axis.
* **Machine**: origin at the centre of the cutterhead face; ``ahead = x - face_chainage_m``.
* **On the machine**: ``axial_m`` (0 at the cutterhead face, negative behind it), ``radius_m``
  from the axis, ``angle_deg`` from the crown, clockwise looking ahead, so that
  ``y = -r sin(angle)`` and ``z = r cos(angle)``. A cutterhead electrode turns with the
  cutterhead: its angle at a reading is its mount angle plus the logged cutterhead angle.
"""

from __future__ import annotations

import dataclasses
import math
import re
import tomllib
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import tomli_w

from tbminv.cache import atomic_write_text
from tbminv.tomlfile import check_keys, number, read_toml

ELECTRODE_KINDS = ("cutterhead", "shield", "wall", "remote", "machine")
PROTOCOL_GENERATORS = ("pole-pole", "machine-pole", "cutterhead-dipole")


class LayoutError(ValueError):
    """A layout file or layout dictionary that is not valid; the message names where."""


def _where(source: str, table: str, key: str | None = None) -> str:
    loc = f"{source}: [{table}]"
    return f"{loc} {key}" if key else loc


def _num(tbl: Mapping[str, Any], key: str, source: str, table: str, *, default: Any = None,
         required: bool = True, positive: bool = False, allow_inf: bool = False,
         nonneg: bool = False) -> float | None:
    return number(tbl, key, _where(source, table, key), LayoutError, default=default,
                  required=required, positive=positive, nonneg=nonneg, allow_inf=allow_inf,
                  missing="expected a number in metres or ohm-m as the name says")


def _bool(tbl: Mapping[str, Any], key: str, source: str, table: str, default: bool) -> bool:
    raw = tbl.get(key, default)
    if not isinstance(raw, bool):
        raise LayoutError(f"{_where(source, table, key)} = {raw!r}: expected true or false")
    return raw


def _unknown_keys(tbl: Mapping[str, Any], allowed: Iterable[str], source: str, table: str) -> None:
    check_keys(tbl, allowed, _where(source, table), LayoutError)


@dataclass(frozen=True)
class Machine:
    """The steel machine: a cylinder of ``diameter_m`` from the face back ``shield_length_m``.

    Attributes
    ----------
    diameter_m : float
        Outer diameter of shield and cutterhead, m.
    shield_length_m : float
        Length from the cutterhead face to the shield tail, m.
    cutterhead_thickness_m : float
        Thickness of the steel cutterhead disc at the face, m.
    body_resistivity_ohmm : float
        Resistivity given to the steel in models that cap it, ohm-m (steel is about 1e-7).
    model_body : bool
        False leaves the steel out (for checks against closed forms).
    """

    diameter_m: float
    shield_length_m: float
    cutterhead_thickness_m: float = 1.0
    body_resistivity_ohmm: float = 1e-5
    model_body: bool = True

    @property
    def radius_m(self) -> float:
        """Outer radius, m."""
        return 0.5 * self.diameter_m


@dataclass(frozen=True)
class Tunnel:
    """The tunnel behind the shield: a resistive bore of the machine's diameter.

    Attributes
    ----------
    cover_m : float
        Crown to ground surface, m; ``math.inf`` for a deep tunnel (full space).
    lining_resistivity_ohmm : float
        Resistivity of the bore behind the shield (segments, grout, air lumped), ohm-m.
    model_cavity : bool
        False leaves the tunnel out of the model.
    length_m : float
        Length of the modelled bore behind the shield tail, m; ``math.inf``: to the model edge.
    """

    cover_m: float = math.inf
    lining_resistivity_ohmm: float = 300.0
    model_cavity: bool = True
    length_m: float = math.inf


@dataclass(frozen=True)
class Electrode:
    """One electrode of the layout.

    Attributes
    ----------
    label : str
        Unique label used in the protocol and the readings log.
    kind : str
        ``cutterhead`` (turns with the cutterhead), ``shield`` (fixed to the machine),
        ``wall`` (fixed in the ground at ``chainage_m``), ``remote`` (far away or at infinity),
        ``machine`` (the steel body itself used as one electrode).
    axial_m, radius_m, angle_deg : float
        Position on the machine (cutterhead, shield, travelling remote), m and degrees.
    chainage_m : float or None
        Chainage of a wall electrode or of a remote fixed in the ground, m.
    y_m, z_m : float or None
        World position of a remote fixed in the ground, m.
    insulated : bool
        False: bare, shorted to the machine body (reads the machine's potential).
    """

    label: str
    kind: str
    axial_m: float | None = None
    chainage_m: float | None = None
    radius_m: float = 0.0
    angle_deg: float = 0.0
    insulated: bool = True
    y_m: float | None = None
    z_m: float | None = None

    @property
    def on_steel(self) -> bool:
        """True if the electrode is at the machine's potential (kind machine or bare on steel)."""
        bare = self.kind in ("cutterhead", "shield") and not self.insulated
        return self.kind == "machine" or bare

    @property
    def at_infinity(self) -> bool:
        """True for a remote electrode with no position (a pole at infinity)."""
        return self.kind == "remote" and self.axial_m is None and self.chainage_m is None

    @property
    def fixed_in_ground(self) -> bool:
        """True if the electrode stays at one chainage while the machine advances."""
        return self.kind == "wall" or (self.kind == "remote" and self.chainage_m is not None)


@dataclass(frozen=True)
class Measurement:
    """One quadrupole of the protocol, by electrode label (``b`` / ``n`` None for a pole)."""

    a: str
    b: str | None
    m: str
    n: str | None

    def labels(self) -> tuple[str | None, str | None, str | None, str | None]:
        """The four labels (a, b, m, n)."""
        return (self.a, self.b, self.m, self.n)

    def reciprocal(self) -> Measurement:
        """The reciprocal quadrupole (current and potential pairs swapped)."""
        return Measurement(a=self.m, b=self.n, m=self.a, n=self.b)


def _cyl_to_yz(radius_m: float, angle_deg: float) -> tuple[float, float]:
    t = math.radians(angle_deg)
    return -radius_m * math.sin(t), radius_m * math.cos(t)


def machine_to_world(points: np.ndarray, face_chainage_m: float) -> np.ndarray:
    """Machine-frame points (ahead, y, z) to world (x, y, z), m."""
    p = np.array(points, dtype=float, copy=True)
    p[..., 0] += face_chainage_m
    return p


def world_to_machine(points: np.ndarray, face_chainage_m: float) -> np.ndarray:
    """World points (x, y, z) to machine frame (ahead, y, z), m."""
    p = np.array(points, dtype=float, copy=True)
    p[..., 0] -= face_chainage_m
    return p


@dataclass(frozen=True)
class Layout:
    """Machine, tunnel, electrodes and measurement protocol of one drive.

    ``measurements`` is the full protocol: the explicit ``[[measurement]]`` entries followed by
    those of the named ``generators`` (duplicates removed, order kept). ``explicit_measurements``
    and ``generators`` are kept so that the layout writes back to the same file.
    """

    machine: Machine
    tunnel: Tunnel
    electrodes: tuple[Electrode, ...]
    explicit_measurements: tuple[Measurement, ...] = ()
    generators: tuple[str, ...] = ()
    protocol_remote: str | None = None
    name: str = ""
    source: str = field(default="<dict>", compare=False)

    # ----------------------------------------------------------------- lookups
    @property
    def labels(self) -> tuple[str, ...]:
        """Electrode labels in file order."""
        return tuple(e.label for e in self.electrodes)

    def electrode(self, label: str) -> Electrode:
        """The electrode with ``label`` (KeyError naming the layout if unknown)."""
        for e in self.electrodes:
            if e.label == label:
                return e
        raise KeyError(f"{self.source}: no electrode labelled {label!r}")

    @property
    def measurements(self) -> tuple[Measurement, ...]:
        """The full protocol (explicit, then generated; duplicates removed)."""
        seen: dict[Measurement, None] = {}
        for q in self.explicit_measurements:
            seen.setdefault(q, None)
        for g in self.generators:
            for q in generate_protocol(self, g):
                seen.setdefault(q, None)
        return tuple(seen)

    # --------------------------------------------------------------- positions
    def positions_cylindrical(self, face_chainage_m: float | None = None,
                              cutterhead_deg: float = 0.0
                              ) -> dict[str, tuple[float, float, float] | None]:
        """Electrode positions as (axial_m, radius_m, angle_deg) in the machine frame.

        Parameters
        ----------
        face_chainage_m : float, optional
            Face chainage, m; needed for electrodes fixed in the ground.
        cutterhead_deg : float
            Logged cutterhead angle, degrees; turns cutterhead electrodes.

        Returns
        -------
        dict
            label -> (axial_m, radius_m, angle_deg), or None for a remote at infinity and for
            kind ``machine`` (the whole body).
        """
        out: dict[str, tuple[float, float, float] | None] = {}
        for e in self.electrodes:
            if e.kind == "machine" or e.at_infinity:
                out[e.label] = None
            elif e.kind == "cutterhead":
                out[e.label] = (float(e.axial_m), e.radius_m,
                                (e.angle_deg + cutterhead_deg) % 360.0)
            elif e.kind == "shield" or (e.kind == "remote" and e.axial_m is not None):
                out[e.label] = (float(e.axial_m), e.radius_m, e.angle_deg % 360.0)
            else:  # fixed in the ground
                if face_chainage_m is None:
                    raise ValueError(f"electrode {e.label!r} is fixed in the ground: "
                                     "face_chainage_m is needed for its machine-frame position")
                if e.kind == "wall":
                    out[e.label] = (float(e.chainage_m) - face_chainage_m, e.radius_m,
                                    e.angle_deg % 360.0)
                else:
                    y, z = float(e.y_m), float(e.z_m)
                    r = math.hypot(y, z)
                    ang = math.degrees(math.atan2(-y, z)) % 360.0 if r > 0 else 0.0
                    out[e.label] = (float(e.chainage_m) - face_chainage_m, r, ang)
        return out

    def positions_machine(self, face_chainage_m: float | None = None,
                          cutterhead_deg: float = 0.0) -> dict[str, np.ndarray | None]:
        """Electrode positions (ahead, y, z) in the machine frame, m (None: no point position).

        The arguments are those of :meth:`positions_cylindrical`, in the same order.
        """
        out: dict[str, np.ndarray | None] = {}
        for label, cyl in self.positions_cylindrical(face_chainage_m, cutterhead_deg).items():
            if cyl is None:
                out[label] = None
                continue
            e = self.electrode(label)
            if e.kind == "remote" and e.chainage_m is not None:
                out[label] = np.array([cyl[0], float(e.y_m), float(e.z_m)])
            else:
                y, z = _cyl_to_yz(cyl[1], cyl[2])
                out[label] = np.array([cyl[0], y, z])
        return out

    def positions_world(self, face_chainage_m: float,
                        cutterhead_deg: float = 0.0) -> dict[str, np.ndarray | None]:
        """Electrode positions (x, y, z) in the world frame for a face chainage, m.

        The arguments are those of :meth:`positions_cylindrical`, in the same order
        (``face_chainage_m`` required); None where an electrode has no point position.
        """
        return {k: (None if v is None else machine_to_world(v, face_chainage_m))
                for k, v in self.positions_machine(face_chainage_m, cutterhead_deg).items()}

    # -------------------------------------------------------------------- I/O
    def to_dict(self) -> dict[str, Any]:
        """Plain dictionary in the layout-file format (round-trips through :meth:`from_dict`)."""
        def num(v: float) -> Any:
            return "inf" if math.isinf(v) else v

        d: dict[str, Any] = {}
        if self.name:
            d["name"] = self.name
        m = self.machine
        d["machine"] = {"diameter_m": m.diameter_m, "shield_length_m": m.shield_length_m,
                        "cutterhead_thickness_m": m.cutterhead_thickness_m,
                        "body_resistivity_ohmm": m.body_resistivity_ohmm,
                        "model_body": m.model_body}
        t = self.tunnel
        d["tunnel"] = {"cover_m": num(t.cover_m),
                       "lining_resistivity_ohmm": t.lining_resistivity_ohmm,
                       "model_cavity": t.model_cavity, "length_m": num(t.length_m)}
        els = []
        for e in self.electrodes:
            row: dict[str, Any] = {"label": e.label, "kind": e.kind}
            if e.kind == "machine" or e.at_infinity:
                pass
            elif e.kind == "remote" and e.chainage_m is not None:
                row.update(chainage_m=e.chainage_m, y_m=e.y_m, z_m=e.z_m)
            elif e.kind == "wall":
                row.update(chainage_m=e.chainage_m, radius_m=e.radius_m, angle_deg=e.angle_deg)
            else:
                row.update(axial_m=e.axial_m, radius_m=e.radius_m, angle_deg=e.angle_deg)
            if e.kind in ("cutterhead", "shield"):
                row["insulated"] = e.insulated
            els.append(row)
        d["electrode"] = els
        if self.generators or self.protocol_remote:
            p: dict[str, Any] = {"generate": list(self.generators)}
            if self.protocol_remote:
                p["remote"] = self.protocol_remote
            d["protocol"] = p
        if self.explicit_measurements:
            d["measurement"] = [{k: (v or "") for k, v in zip("abmn", q.labels())}
                                for q in self.explicit_measurements]
        return d

    def to_toml(self, path: str | Path) -> Path:
        """Write the layout file (atomically) and return its path."""
        return atomic_write_text(path, tomli_w.dumps(self.to_dict()))

    @classmethod
    def from_dict(cls, d: Mapping[str, Any], source: str = "<dict>") -> Layout:
        """Build and validate a layout from a dictionary in the layout-file format.

        Raises
        ------
        LayoutError
            Naming the source, the table/key and what was expected.
        """
        _unknown_keys(d, ("name", "machine", "tunnel", "electrode", "measurement", "protocol"),
                      source, "top level")
        if "machine" not in d or not isinstance(d["machine"], Mapping):
            raise LayoutError(f"{source}: [machine] table missing; expected diameter_m, "
                              "shield_length_m, cutterhead_thickness_m")
        mt = d["machine"]
        _unknown_keys(mt, [f.name for f in dataclasses.fields(Machine)], source, "machine")
        machine = Machine(
            diameter_m=_num(mt, "diameter_m", source, "machine", positive=True),
            shield_length_m=_num(mt, "shield_length_m", source, "machine", positive=True),
            cutterhead_thickness_m=_num(mt, "cutterhead_thickness_m", source, "machine",
                                        default=1.0, positive=True),
            body_resistivity_ohmm=_num(mt, "body_resistivity_ohmm", source, "machine",
                                       default=1e-5, positive=True),
            model_body=_bool(mt, "model_body", source, "machine", True),
        )
        if machine.cutterhead_thickness_m >= machine.shield_length_m:
            raise LayoutError(f"{_where(source, 'machine', 'cutterhead_thickness_m')} = "
                              f"{machine.cutterhead_thickness_m}: expected less than "
                              f"shield_length_m = {machine.shield_length_m}")
        tt = d.get("tunnel", {})
        if not isinstance(tt, Mapping):
            raise LayoutError(f"{source}: [tunnel] must be a table")
        _unknown_keys(tt, [f.name for f in dataclasses.fields(Tunnel)], source, "tunnel")
        tunnel = Tunnel(
            cover_m=_num(tt, "cover_m", source, "tunnel", default=math.inf, allow_inf=True,
                         positive=True),
            lining_resistivity_ohmm=_num(tt, "lining_resistivity_ohmm", source, "tunnel",
                                         default=300.0, positive=True),
            model_cavity=_bool(tt, "model_cavity", source, "tunnel", True),
            length_m=_num(tt, "length_m", source, "tunnel", default=math.inf, allow_inf=True,
                          positive=True),
        )
        raw_els = d.get("electrode", [])
        if not isinstance(raw_els, list) or not raw_els:
            raise LayoutError(f"{source}: [[electrode]] missing; expected at least one electrode")
        electrodes = tuple(_electrode(e, i, source, machine) for i, e in enumerate(raw_els))
        seen: set[str] = set()
        for i, e in enumerate(electrodes):
            if e.label in seen:
                raise LayoutError(f"{source}: [[electrode]] #{i + 1} label = {e.label!r}: "
                                  "duplicate label; expected every label once")
            seen.add(e.label)
        gens: tuple[str, ...] = ()
        remote = None
        if "protocol" in d:
            pt = d["protocol"]
            if not isinstance(pt, Mapping):
                raise LayoutError(f"{source}: [protocol] must be a table")
            _unknown_keys(pt, ("generate", "remote"), source, "protocol")
            g = pt.get("generate", [])
            if isinstance(g, str):
                g = [g]
            if not isinstance(g, list) or not all(isinstance(x, str) for x in g):
                raise LayoutError(f"{_where(source, 'protocol', 'generate')}: expected a list of "
                                  f"generator names from {', '.join(PROTOCOL_GENERATORS)}")
            for name in g:
                if name not in PROTOCOL_GENERATORS:
                    raise LayoutError(f"{_where(source, 'protocol', 'generate')}: unknown "
                                      f"generator {name!r}; expected one of "
                                      f"{', '.join(PROTOCOL_GENERATORS)}")
            gens = tuple(g)
            remote = pt.get("remote")
            if remote is not None:
                if remote not in seen or next(e for e in electrodes
                                              if e.label == remote).kind != "remote":
                    raise LayoutError(f"{_where(source, 'protocol', 'remote')} = {remote!r}: "
                                      "expected the label of a remote electrode")
        raw_q = d.get("measurement", [])
        if not isinstance(raw_q, list):
            raise LayoutError(f"{source}: [[measurement]] must be an array of tables")
        by_label = {e.label: e for e in electrodes}
        quads = tuple(_measurement(q, i, source, by_label) for i, q in enumerate(raw_q))
        name = d.get("name", "")
        if not isinstance(name, str):
            raise LayoutError(f"{source}: name = {name!r}: expected text")
        layout = cls(machine=machine, tunnel=tunnel, electrodes=electrodes,
                     explicit_measurements=quads, generators=gens, protocol_remote=remote,
                     name=name, source=source)
        if not layout.measurements:
            raise LayoutError(f"{source}: no measurements; expected [[measurement]] entries or "
                              "[protocol] generate = [...]")
        return layout


def _electrode(raw: Any, i: int, source: str, machine: Machine) -> Electrode:
    table = f"[electrode] #{i + 1}"
    if not isinstance(raw, Mapping):
        raise LayoutError(f"{source}: {table}: expected a table")
    label = raw.get("label")
    if not isinstance(label, str) or not label.strip():
        raise LayoutError(f"{source}: {table} label = {label!r}: expected non-empty text")
    table = f"electrode {label!r}"
    kind = raw.get("kind")
    if kind not in ELECTRODE_KINDS:
        raise LayoutError(f"{_where(source, table, 'kind')} = {kind!r}: expected one of "
                          f"{', '.join(ELECTRODE_KINDS)}")
    allowed = {"label", "kind"}
    if kind in ("cutterhead", "shield"):
        allowed |= {"axial_m", "radius_m", "angle_deg", "insulated"}
    elif kind == "wall":
        allowed |= {"chainage_m", "radius_m", "angle_deg"}
    elif kind == "remote":
        allowed |= {"axial_m", "radius_m", "angle_deg", "chainage_m", "y_m", "z_m"}
    _unknown_keys(raw, allowed, source, table)
    radius = machine.radius_m
    ang = _num(raw, "angle_deg", source, table, default=0.0) or 0.0
    if kind == "machine":
        return Electrode(label=label, kind=kind, insulated=False)
    if kind == "remote":
        has_ground = any(k in raw for k in ("chainage_m", "y_m", "z_m"))
        has_machine = any(k in raw for k in ("axial_m", "radius_m", "angle_deg"))
        if has_ground and has_machine:
            raise LayoutError(f"{source}: [{table}]: give either chainage_m, y_m, z_m (fixed in "
                              "the ground) or axial_m, radius_m, angle_deg (travels with the "
                              "machine), not both")
        if has_ground:
            return Electrode(label=label, kind=kind,
                             chainage_m=_num(raw, "chainage_m", source, table),
                             y_m=_num(raw, "y_m", source, table),
                             z_m=_num(raw, "z_m", source, table))
        if has_machine:
            return Electrode(label=label, kind=kind, axial_m=_num(raw, "axial_m", source, table),
                             radius_m=_num(raw, "radius_m", source, table, nonneg=True),
                             angle_deg=ang)
        return Electrode(label=label, kind=kind)
    r = _num(raw, "radius_m", source, table, default=0.0, nonneg=True) or 0.0
    if kind == "wall":
        if r < radius - 1e-9:
            raise LayoutError(f"{_where(source, table, 'radius_m')} = {r}: a wall electrode must "
                              f"be on or behind the tunnel wall; expected >= {radius} m "
                              "(machine radius)")
        return Electrode(label=label, kind=kind, chainage_m=_num(raw, "chainage_m", source, table),
                         radius_m=r, angle_deg=ang)
    axial = _num(raw, "axial_m", source, table)
    insulated = _bool(raw, "insulated", source, table, True)
    if kind == "cutterhead":
        if r > radius + 1e-9:
            raise LayoutError(f"{_where(source, table, 'radius_m')} = {r}: a cutterhead electrode "
                              f"must be inside the machine radius; expected <= {radius} m")
        if axial > 0.5 or axial < (0.0 if insulated else -machine.cutterhead_thickness_m):
            lo = "0" if insulated else f"-{machine.cutterhead_thickness_m}"
            why = ("an insulated cutterhead electrode sits in the ground just ahead of the steel"
                   if insulated else "a bare cutterhead electrode is on the cutterhead steel")
            raise LayoutError(f"{_where(source, table, 'axial_m')} = {axial}: {why}; expected "
                              f"{lo} <= axial_m <= 0.5 m")
    else:  # shield
        if not (-machine.shield_length_m - 1e-9 <= axial <= 1e-9):
            raise LayoutError(f"{_where(source, table, 'axial_m')} = {axial}: a shield electrode "
                              f"must be on the shield; expected -{machine.shield_length_m} <= "
                              "axial_m <= 0")
        if r < radius - 1e-9 or r > radius + 0.5:
            raise LayoutError(f"{_where(source, table, 'radius_m')} = {r}: a shield electrode "
                              f"sits on or just outside the shield skin; expected {radius} <= "
                              f"radius_m <= {radius + 0.5} m")
    return Electrode(label=label, kind=kind, axial_m=axial, radius_m=r, angle_deg=ang,
                     insulated=insulated)


def _measurement(raw: Any, i: int, source: str, by_label: Mapping[str, Electrode]) -> Measurement:
    table = f"[measurement] #{i + 1}"
    if not isinstance(raw, Mapping):
        raise LayoutError(f"{source}: {table}: expected a table with a, b, m, n")
    _unknown_keys(raw, ("a", "b", "m", "n"), source, f"measurement #{i + 1}")
    vals: dict[str, str | None] = {}
    for k in "abmn":
        v = raw.get(k)
        if v is None or (isinstance(v, str) and not v.strip()):
            if k in "am":
                raise LayoutError(f"{source}: {table} {k}: missing; expected an electrode label")
            vals[k] = None
            continue
        if not isinstance(v, str):
            raise LayoutError(f"{source}: {table} {k} = {v!r}: expected an electrode label")
        if v not in by_label:
            raise LayoutError(f"{source}: {table} {k} = {v!r}: unknown electrode label; expected "
                              f"one of {', '.join(by_label)}")
        vals[k] = v
    q = Measurement(**vals)
    _check_quadrupole(q, source, table, by_label)
    return q


def _check_quadrupole(q: Measurement, source: str, table: str,
                      by_label: Mapping[str, Electrode]) -> None:
    pairs = (("a", "m"), ("a", "b"), ("m", "n"), ("a", "n"), ("b", "m"), ("b", "n"))
    for x, y in pairs:
        lx, ly = getattr(q, x), getattr(q, y)
        if lx is None or ly is None or lx != ly:
            continue
        if by_label[lx].at_infinity and (x, y) == ("b", "n"):
            continue  # one pole at infinity serves as both returns
        raise LayoutError(f"{source}: {table}: {x.upper()} = {y.upper()} = {lx!r}; expected "
                          "different electrodes")


def generate_protocol(layout: Layout, name: str) -> list[Measurement]:
    """Quadrupoles of one named protocol generator.

    Generators (our own names):

    ``pole-pole``
        Every insulated electrode on the machine or wall as A, every other one after it (in file
        order) as M; B and N the protocol's remote (``[protocol] remote``, else the first remote
        electrode, else a pole at infinity).
    ``machine-pole``
        Current into the steel (the ``machine`` electrode, else the first bare electrode) with the
        remote return; potential at every insulated electrode against the remote.
    ``cutterhead-dipole``
        Dipole-dipole among insulated cutterhead electrodes in file order: A,B and M,N consecutive,
        non-overlapping.
    """
    remotes = [e for e in layout.electrodes if e.kind == "remote"]
    remote = layout.protocol_remote or (remotes[0].label if remotes else None)
    ins = [e.label for e in layout.electrodes
           if e.kind in ("cutterhead", "shield", "wall") and e.insulated]
    out: list[Measurement] = []
    if name == "pole-pole":
        for i, a in enumerate(ins):
            for m in ins[i + 1:]:
                out.append(Measurement(a=a, b=remote, m=m, n=remote))
    elif name == "machine-pole":
        steel = [e.label for e in layout.electrodes if e.kind == "machine"] or \
                [e.label for e in layout.electrodes if e.on_steel]
        if not steel:
            raise LayoutError(f"{layout.source}: [protocol] generate 'machine-pole' needs an "
                              "electrode of kind 'machine' or a bare electrode on the steel")
        for m in ins:
            out.append(Measurement(a=steel[0], b=remote, m=m, n=remote))
    elif name == "cutterhead-dipole":
        ch = [e.label for e in layout.electrodes if e.kind == "cutterhead" and e.insulated]
        for i in range(len(ch) - 1):
            for j in range(i + 2, len(ch) - 1):
                out.append(Measurement(a=ch[i], b=ch[i + 1], m=ch[j], n=ch[j + 1]))
    else:
        raise LayoutError(f"{layout.source}: unknown protocol generator {name!r}; expected one of "
                          f"{', '.join(PROTOCOL_GENERATORS)}")
    if remote is not None and layout.electrode(remote).at_infinity:
        pass  # a remote at infinity as B and N is a pole: kept by label, forward models know
    return out


def load_layout(path: str | Path) -> Layout:
    """Read and validate a layout file (TOML).

    Parameters
    ----------
    path : str or Path
        The layout file.

    Raises
    ------
    LayoutError
        If the file cannot be read or parsed, or fails validation (names file, table, key).
    """
    p = Path(path)
    data = read_toml(p, LayoutError, "layout file", relaxed=_split_semicolon_pairs)
    return Layout.from_dict(data, source=str(p))


_PAIR = re.compile(r'^\s*[A-Za-z_][\w-]*\s*=\s*("[^"]*"|\'[^\']*\'|[^"\';#]+)\s*$')


def layout_document(text: str) -> dict[str, Any]:
    """Parse layout text (as a layout file holds it, e.g. the store's ``layout_text``).

    Several ``key = value`` pairs on one line, separated by ``;``, are accepted as in
    :func:`load_layout`.

    Raises
    ------
    tomllib.TOMLDecodeError
        If the text is not TOML even with that allowance.
    """
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError:
        return tomllib.loads(_split_semicolon_pairs(text))


def _split_semicolon_pairs(text: str) -> str:
    """Put several ``key = value`` pairs separated by ``;`` on one line each.

    The layout examples write a quadrupole as ``a = "BODY"; b = "R1"; m = "T1"; n = "R2"``, which
    strict TOML does not allow; such lines are accepted. Other lines are left as they are.
    """
    out = []
    for line in text.splitlines():
        parts = _split_outside_quotes(line)
        if len(parts) > 1 and all(_PAIR.match(x) for x in parts):
            out.extend(x.strip() for x in parts)
        else:
            out.append(line)
    return "\n".join(out) + "\n"


def _split_outside_quotes(s: str) -> list[str]:
    parts, cur, quote = [], [], ""
    for ch in s:
        if quote:
            cur.append(ch)
            if ch == quote:
                quote = ""
        elif ch in "\"'":
            quote = ch
            cur.append(ch)
        elif ch == ";":
            parts.append("".join(cur))
            cur = []
        elif ch == "#":
            break
        else:
            cur.append(ch)
    parts.append("".join(cur))
    return [x for x in parts if x.strip()]


def demo_layout_path() -> Path:
    """Path of the bundled demo layout file."""
    return Path(__file__).parent / "data" / "demo_layout.toml"


__all__ = ["Machine", "Tunnel", "Electrode", "Measurement", "Layout", "LayoutError",
           "layout_document",
           "load_layout", "generate_protocol", "machine_to_world", "world_to_machine",
           "demo_layout_path", "ELECTRODE_KINDS", "PROTOCOL_GENERATORS"]
