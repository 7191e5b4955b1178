"""Ground scenarios: resistivity at any point of a synthetic drive.

A scenario (TOML; format in DEVELOPERS.md, "File formats") has a background resistivity,
planar contacts, spheres, ellipsoids and water-bearing zones. Contacts apply in file order (a
later one overrides beyond its plane); bodies (spheres, ellipsoids, water zones, in that order)
override contacts. Coordinates are world coordinates (chainage ``x``, ``y`` to the left, ``z``
up, m); resistivity in ohm-m.

Orientation of a contact: ``strike_deg`` is measured in the horizontal plane from the drive
direction, clockwise seen from above (towards the right-hand side, ``-y``); ``dip_deg`` from the
horizontal, down to the right of the strike direction. With ``strike_deg = 90`` and
``dip_deg = 90`` the plane is square to the drive. "Beyond" is the side of larger chainage on
the tunnel axis.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import tomli_w

from tbminv.cache import atomic_write_text
from tbminv.tomlfile import check_keys, number, read_toml


class ScenarioError(ValueError):
    """A scenario file or dictionary that is not valid; the message names where."""


class NotAxisymmetricError(ValueError):
    """The scenario cannot be represented by a ground model axisymmetric about the tunnel axis."""


def _num(tbl: Mapping[str, Any], key: str, where: str, *, default: float | None = None,
         positive: bool = False, allow_inf: bool = False) -> float:
    val = number(tbl, key, f"{where} {key}", ScenarioError, default=default, positive=positive,
                 allow_inf=allow_inf)
    assert val is not None  # required: number() raised when missing
    return val


def _check_keys(tbl: Mapping[str, Any], allowed: tuple[str, ...], where: str) -> None:
    check_keys(tbl, allowed, where, ScenarioError)


@dataclass(frozen=True)
class Contact:
    """A planar contact crossing the tunnel axis at ``chainage_m``; ``resistivity_ohmm`` beyond."""

    chainage_m: float
    resistivity_ohmm: float
    dip_deg: float = 90.0
    strike_deg: float = 90.0

    @property
    def normal(self) -> np.ndarray:
        """Unit normal of the plane pointing beyond (towards larger chainage on the axis)."""
        b, d = math.radians(self.strike_deg), math.radians(self.dip_deg)
        s = np.array([math.cos(b), -math.sin(b), 0.0])
        dip_h = np.array([-math.sin(b), -math.cos(b), 0.0])
        down = math.cos(d) * dip_h + math.sin(d) * np.array([0.0, 0.0, -1.0])
        n = np.cross(s, down)
        n /= np.linalg.norm(n)
        if n[0] < 0:
            n = -n
        return n

    def beyond(self, x: np.ndarray, y: np.ndarray, z: np.ndarray) -> np.ndarray:
        """Boolean mask of points beyond the plane (world frame, m)."""
        n = self.normal
        return (n[0] * (x - self.chainage_m) + n[1] * y + n[2] * z) > 0

    @property
    def square_to_axis(self) -> bool:
        """True if the plane is perpendicular to the tunnel axis."""
        return abs(self.normal[0] - 1.0) < 1e-9


@dataclass(frozen=True)
class Sphere:
    """A sphere (boulder, lens) of ``resistivity_ohmm`` centred at (chainage_m, y_m, z_m)."""

    chainage_m: float
    radius_m: float
    resistivity_ohmm: float
    y_m: float = 0.0
    z_m: float = 0.0

    def inside(self, x: np.ndarray, y: np.ndarray, z: np.ndarray) -> np.ndarray:
        """Boolean mask of points inside (world frame, m)."""
        return ((x - self.chainage_m) ** 2 + (y - self.y_m) ** 2 + (z - self.z_m) ** 2
                <= self.radius_m ** 2)


@dataclass(frozen=True)
class Ellipsoid:
    """An ellipsoid with semi-axes along (x, y, z) rotated by ``yaw_deg`` about the vertical.

    ``semi_axes_m`` = (along the drive, across, vertical) before the rotation, m.
    """

    chainage_m: float
    semi_axes_m: tuple[float, float, float]
    resistivity_ohmm: float
    y_m: float = 0.0
    z_m: float = 0.0
    yaw_deg: float = 0.0

    def inside(self, x: np.ndarray, y: np.ndarray, z: np.ndarray) -> np.ndarray:
        """Boolean mask of points inside (world frame, m)."""
        c, s = math.cos(math.radians(self.yaw_deg)), math.sin(math.radians(self.yaw_deg))
        dx, dy, dz = x - self.chainage_m, y - self.y_m, z - self.z_m
        u = c * dx - s * dy
        v = s * dx + c * dy
        a, b, cc = self.semi_axes_m
        return (u / a) ** 2 + (v / b) ** 2 + (dz / cc) ** 2 <= 1.0


@dataclass(frozen=True)
class WaterZone:
    """A water-bearing zone: chainage interval, optionally bounded above/below, of one resistivity.

    ``z_top_m`` / ``z_bottom_m`` are heights relative to the tunnel axis, m (infinite: unbounded,
    the zone then fills the whole cross-section between the chainages).
    """

    chainage_start_m: float
    chainage_end_m: float
    resistivity_ohmm: float
    z_top_m: float = math.inf
    z_bottom_m: float = -math.inf

    def inside(self, x: np.ndarray, y: np.ndarray, z: np.ndarray) -> np.ndarray:
        """Boolean mask of points inside (world frame, m)."""
        return ((x >= self.chainage_start_m) & (x <= self.chainage_end_m)
                & (z <= self.z_top_m) & (z >= self.z_bottom_m) & np.isfinite(y))


@dataclass(frozen=True)
class Scenario:
    """A synthetic ground: background, contacts, bodies. See the module docstring."""

    background_resistivity_ohmm: float
    contacts: tuple[Contact, ...] = ()
    spheres: tuple[Sphere, ...] = ()
    ellipsoids: tuple[Ellipsoid, ...] = ()
    water_zones: tuple[WaterZone, ...] = ()
    name: str = ""
    source: str = field(default="<dict>", compare=False)

    @classmethod
    def homogeneous(cls, resistivity_ohmm: float) -> Scenario:
        """Homogeneous ground of ``resistivity_ohmm``."""
        if not resistivity_ohmm > 0:
            raise ScenarioError(f"homogeneous ground: resistivity {resistivity_ohmm!r} must be > 0")
        return cls(background_resistivity_ohmm=float(resistivity_ohmm))

    def resistivity(self, x: Any, y: Any, z: Any) -> np.ndarray:
        """Resistivity at world points (broadcasting arrays), ohm-m."""
        x, y, z = np.broadcast_arrays(np.asarray(x, float), np.asarray(y, float),
                                      np.asarray(z, float))
        rho = np.full(x.shape, self.background_resistivity_ohmm, dtype=float)
        for c in self.contacts:
            rho[c.beyond(x, y, z)] = c.resistivity_ohmm
        for body in (*self.spheres, *self.ellipsoids, *self.water_zones):
            rho[body.inside(x, y, z)] = body.resistivity_ohmm
        return rho

    def resistivity_machine(self, ahead: Any, y: Any, z: Any, face_chainage_m: float) -> np.ndarray:
        """Resistivity at machine-frame points (ahead, y, z) for a face chainage, ohm-m."""
        return self.resistivity(np.asarray(ahead, float) + face_chainage_m, y, z)

    def axisymmetric_problems(self) -> list[str]:
        """Features that break symmetry about the tunnel axis (empty list: axisymmetric)."""
        out = []
        for i, c in enumerate(self.contacts):
            if not c.square_to_axis:
                out.append(f"contact #{i + 1} (dip {c.dip_deg} deg, strike {c.strike_deg} deg) "
                           "is not square to the tunnel axis")
        for i, s in enumerate(self.spheres):
            if abs(s.y_m) > 1e-9 or abs(s.z_m) > 1e-9:
                out.append(f"sphere #{i + 1} is off the axis (y = {s.y_m} m, z = {s.z_m} m)")
        for i, e in enumerate(self.ellipsoids):
            a, b, c = e.semi_axes_m
            off = abs(e.y_m) > 1e-9 or abs(e.z_m) > 1e-9
            if off or abs(b - c) > 1e-9 or (abs(e.yaw_deg % 180.0) > 1e-9 and abs(a - b) > 1e-9):
                out.append(f"ellipsoid #{i + 1} is not a body of revolution about the axis")
        for i, w in enumerate(self.water_zones):
            if math.isfinite(w.z_top_m) or math.isfinite(w.z_bottom_m):
                out.append(f"water zone #{i + 1} is bounded in height (z_top_m/z_bottom_m)")
        return out

    def resistivity_axisym(self, x: Any, r: Any) -> np.ndarray:
        """Resistivity at world chainage ``x`` and radius ``r`` from the axis, ohm-m.

        Raises
        ------
        NotAxisymmetricError
            If any feature is not symmetric about the tunnel axis (use the 3D model).
        """
        probs = self.axisymmetric_problems()
        if probs:
            raise NotAxisymmetricError(
                f"{self.source}: ground scenario is not axisymmetric about the tunnel axis: "
                + "; ".join(probs) + ". Use the 3D model (--model 3d) for this scenario.")
        x, r = np.broadcast_arrays(np.asarray(x, float), np.asarray(r, float))
        return self.resistivity(x, np.zeros_like(x), r)

    def to_dict(self) -> dict[str, Any]:
        """Plain dictionary in the scenario-file format."""
        def num(v: float) -> Any:
            return ("inf" if v > 0 else "-inf") if math.isinf(v) else v

        d: dict[str, Any] = {"background_resistivity_ohmm": self.background_resistivity_ohmm}
        if self.name:
            d["name"] = self.name
        for key, items in (("contact", self.contacts), ("sphere", self.spheres),
                           ("ellipsoid", self.ellipsoids), ("water_zone", self.water_zones)):
            if items:
                d[key] = [{k: (list(v) if isinstance(v, tuple) else num(v)) if not isinstance(
                    v, str) else v for k, v in dataclasses.asdict(it).items()} for it in items]
        return d

    def to_toml(self, path: str | Path) -> Path:
        """Write the scenario file atomically."""
        return atomic_write_text(path, tomli_w.dumps(self.to_dict()))

    @classmethod
    def from_dict(cls, d: Mapping[str, Any], source: str = "<dict>") -> Scenario:
        """Build and validate a scenario from a dictionary in the scenario-file format."""
        _check_keys(d, ("name", "background_resistivity_ohmm", "contact", "sphere", "ellipsoid",
                        "water_zone"), f"{source}: top level")
        bg = _num(d, "background_resistivity_ohmm", f"{source}:", positive=True)

        def items(key: str) -> list[tuple[str, Mapping[str, Any]]]:
            raw = d.get(key, [])
            if not isinstance(raw, list) or not all(isinstance(t, Mapping) for t in raw):
                raise ScenarioError(f"{source}: [[{key}]] must be an array of tables")
            return [(f"{source}: [{key}] #{i + 1}", t) for i, t in enumerate(raw)]

        contacts = []
        for w, t in items("contact"):
            _check_keys(t, ("chainage_m", "dip_deg", "strike_deg", "resistivity_ohmm"), w)
            dip = _num(t, "dip_deg", w, default=90.0)
            if not 0.0 < dip <= 90.0:
                raise ScenarioError(f"{w} dip_deg = {dip}: expected 0 < dip_deg <= 90 (a plane "
                                    "parallel to the axis has no chainage; use a water_zone)")
            c = Contact(chainage_m=_num(t, "chainage_m", w), dip_deg=dip,
                        strike_deg=_num(t, "strike_deg", w, default=90.0),
                        resistivity_ohmm=_num(t, "resistivity_ohmm", w, positive=True))
            if abs(c.normal[0]) < 1e-6:
                raise ScenarioError(f"{w}: the plane is parallel to the tunnel axis; expected a "
                                    "plane crossing it (strike not along the drive)")
            contacts.append(c)
        spheres = []
        for w, t in items("sphere"):
            _check_keys(t, ("chainage_m", "y_m", "z_m", "radius_m", "resistivity_ohmm"), w)
            spheres.append(Sphere(chainage_m=_num(t, "chainage_m", w),
                                  y_m=_num(t, "y_m", w, default=0.0),
                                  z_m=_num(t, "z_m", w, default=0.0),
                                  radius_m=_num(t, "radius_m", w, positive=True),
                                  resistivity_ohmm=_num(t, "resistivity_ohmm", w, positive=True)))
        ells = []
        for w, t in items("ellipsoid"):
            _check_keys(t, ("chainage_m", "y_m", "z_m", "semi_axes_m", "yaw_deg",
                            "resistivity_ohmm"), w)
            ax = t.get("semi_axes_m")
            if (not isinstance(ax, list) or len(ax) != 3
                    or not all(isinstance(v, (int, float)) and not isinstance(v, bool) and v > 0
                               for v in ax)):
                raise ScenarioError(f"{w} semi_axes_m = {ax!r}: expected three numbers > 0 "
                                    "(along, across, vertical), m")
            ells.append(Ellipsoid(chainage_m=_num(t, "chainage_m", w),
                                  y_m=_num(t, "y_m", w, default=0.0),
                                  z_m=_num(t, "z_m", w, default=0.0),
                                  semi_axes_m=tuple(float(v) for v in ax),
                                  yaw_deg=_num(t, "yaw_deg", w, default=0.0),
                                  resistivity_ohmm=_num(t, "resistivity_ohmm", w, positive=True)))
        zones = []
        for w, t in items("water_zone"):
            _check_keys(t, ("chainage_start_m", "chainage_end_m", "z_top_m", "z_bottom_m",
                            "resistivity_ohmm"), w)
            z0 = _num(t, "chainage_start_m", w)
            z1 = _num(t, "chainage_end_m", w)
            if not z1 > z0:
                raise ScenarioError(f"{w} chainage_end_m = {z1}: expected > chainage_start_m "
                                    f"= {z0}")
            top = _num(t, "z_top_m", w, default=math.inf, allow_inf=True)
            bot = _num(t, "z_bottom_m", w, default=-math.inf, allow_inf=True)
            if not top > bot:
                raise ScenarioError(f"{w} z_top_m = {top}: expected > z_bottom_m = {bot}")
            zones.append(WaterZone(chainage_start_m=z0, chainage_end_m=z1, z_top_m=top,
                                   z_bottom_m=bot,
                                   resistivity_ohmm=_num(t, "resistivity_ohmm", w, positive=True)))
        name = d.get("name", "")
        if not isinstance(name, str):
            raise ScenarioError(f"{source}: name = {name!r}: expected text")
        return cls(background_resistivity_ohmm=bg, contacts=tuple(contacts),
                   spheres=tuple(spheres), ellipsoids=tuple(ells), water_zones=tuple(zones),
                   name=name, source=source)


def load_scenario(path: str | Path) -> Scenario:
    """Read and validate a ground-scenario file (TOML).

    Raises
    ------
    ScenarioError
        If the file cannot be read or parsed or fails validation (names file, table, key).
    """
    p = Path(path)
    data = read_toml(p, ScenarioError, "ground scenario file")
    return Scenario.from_dict(data, source=str(p))


def demo_ground_path() -> Path:
    """Path of the bundled demo ground scenario."""
    return Path(__file__).parent / "data" / "demo_ground.toml"


__all__ = ["Scenario", "Contact", "Sphere", "Ellipsoid", "WaterZone", "ScenarioError",
           "NotAxisymmetricError", "load_scenario", "demo_ground_path"]
