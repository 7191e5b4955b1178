"""Settings of the drive inversion (TOML table ``[invert]``) and the settings file reader."""

from __future__ import annotations

import dataclasses
import logging
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from tbminv.inversion.contactfit import ContactFitSettings
from tbminv.readings.qc import QCSettings
from tbminv.tomlfile import check_keys, read_toml

_LOG = logging.getLogger(__name__)

LAMBDA_RULES = ("cooling", "fixed", "lcurve")


SCHEDULER_NEEDS_COLD = ("--scheduler runs independent inversions: add --cold (the warm start "
                        "makes each advance wait for the previous one)")


DEFAULT_MODEL_ERROR_FLOOR = 0.006
"""Default relative modelling-error floor: the axisymmetric model's RMS difference from
pyGIMLi's 3D model (``fast`` preset, the worse) with what the surface correction leaves at 2 and
5 D cover beyond a common scale, in quadrature, rounded up to 0.1 %; measured with this
project's models (``bench/results/error_floor.json``; DEVELOPERS.md, "Error model")."""


class InversionError(ValueError):
    """Inversion input that cannot be used (the message names what and where)."""


SURFACE_METHODS = ("auto", "table", "direct")
"""Values of ``[invert] surface_method``."""

TABLE_MIN_POSITIONS = 16
"""``auto`` surface factors use the block table from this many distinct (face, cutterhead
angle) positions per block on. On the demo layout the table's mesh (every angle and face node
in it) is 3.3 times the size of a one-position mesh and took about as long as 15-40 direct
positions on a loaded 2-core machine (``bench/results/surface_table.json``); with one angle per
face the direct runs are cheaper for a 10-advance log."""


@dataclass(frozen=True)
class InversionSettings:
    """Settings of the drive inversion (TOML table ``[invert]``; lengths in m).

    Attributes
    ----------
    model : str
        Forward model for the images (``axisym``).
    forward_settings : str
        ``standard`` (about 0.3 % from a fine reference) or ``fast`` (about 0.6 %, 2-3x
        faster; :meth:`tbminv.forward.axisym.fields.AxisymSettings.fast`).
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
    model_error_floor : float
        Relative modelling-error floor (fraction) added in quadrature to every reading's QC
        error, ``e = sqrt(e_qc^2 + floor^2)``, before the images and the contact fit
        (:mod:`tbminv.readings.errorfloor`). Default :data:`DEFAULT_MODEL_ERROR_FLOOR`. It
        covers per-reading model error only; the common scale the surface correction leaves on
        all readings of an advance (3-5 % at 2-5 D cover) is not in it. 0: the QC error
        alone.
    chi2_flag : float
        chi-squared above which a result is flagged. A result is also flagged when it did
        not converge: ``max_iter`` reached while chi-squared still moved by more than
        0.25 sqrt(2 / n) in the last iteration (n readings; sqrt(2 / n) is the scatter of
        chi-squared per datum between noise realisations).
    warm_start : bool
        Start each advance from the previous (shifted) model.
    surface_correction : bool
        With a finite cover, divide each reading by the ratio of homogeneous 3D responses with
        and without the ground surface (:mod:`tbminv.forward.ratio`) before the axisymmetric
        inversion and contact fit. Default on; it costs two 3D runs per advance (cached).
    surface_method : str
        How the surface factors are computed: ``direct`` (two 3D runs per face and cutterhead
        angle), ``table`` (two 3D runs per 32 m block of faces holding every angle and face
        node, :mod:`tbminv.forward.surfacetable`) or ``auto`` (default: the table when the
        drive has at least ``TABLE_MIN_POSITIONS`` face/angle positions per block, where it
        is measured to pay, ``bench/results/surface_table.json``).
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
    model_error_floor: float = DEFAULT_MODEL_ERROR_FLOOR
    chi2_flag: float = 2.0
    warm_start: bool = True
    surface_correction: bool = True
    surface_method: str = "auto"
    time_lapse: bool = False
    doi: bool = False
    contact_fit: bool = True
    contact: ContactFitSettings = field(default_factory=ContactFitSettings)
    grid_ahead_step_m: float | None = None
    grid_radius_step_m: float | None = None

    def __post_init__(self) -> None:
        if self.surface_method not in SURFACE_METHODS:
            raise InversionError(f"[invert] surface_method = {self.surface_method!r}: expected "
                                 f"one of {', '.join(SURFACE_METHODS)}")
        if self.lambda_rule not in LAMBDA_RULES:
            raise InversionError(f"[invert] lambda_rule = {self.lambda_rule!r}: expected one of "
                                 f"{', '.join(LAMBDA_RULES)}")
        if not self.lam > 0 or not 0 < self.lambda_factor <= 1:
            raise InversionError("[invert] lam must be > 0 and 0 < lambda_factor <= 1")
        if not 0 < self.lower_ohmm < self.upper_ohmm:
            raise InversionError("[invert] expected 0 < lower_ohmm < upper_ohmm")
        v = self.model_error_floor
        if (isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v)
                or not 0 <= v < 1):
            raise InversionError(f"[invert] model_error_floor = {v!r}: expected a fraction "
                                 "0 <= floor < 1 (0.01 = 1 %)")

    def to_dict(self) -> dict[str, Any]:
        """Plain dictionary (for the store's provenance)."""
        d = dataclasses.asdict(self)
        d["contact"] = dataclasses.asdict(self.contact)
        return d


def load_settings(path: str | Path | None) -> tuple[InversionSettings, QCSettings]:
    """Read a settings file: ``[invert]``, ``[contact]`` and ``[qc]`` tables.

    Returns
    -------
    (InversionSettings, QCSettings)
    """
    if path is None:
        return InversionSettings(), QCSettings()
    p = Path(path)
    data = read_toml(p, InversionError, "settings file")
    check_keys(data, ("invert", "contact", "qc", "ahead", "section"), f"{p}", InversionError)
    inv = dict(data.get("invert", {}))
    check_keys(inv, {f.name for f in dataclasses.fields(InversionSettings)} - {"contact"},
               f"{p}: [invert]", InversionError)
    con = dict(data.get("contact", {}))
    check_keys(con, {f.name for f in dataclasses.fields(ContactFitSettings)},
               f"{p}: [contact]", InversionError)
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


__all__ = ["DEFAULT_MODEL_ERROR_FLOOR", "LAMBDA_RULES", "SCHEDULER_NEEDS_COLD", "InversionError",
           "InversionSettings", "load_settings"]
