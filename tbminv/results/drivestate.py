"""The drive's state in the section store: what the next shift's run continues from.

Per advance the store keeps, beside the image on the output grid, what a run of the next shift
needs to continue the drive exactly as one long run would (:class:`DriveHistory`):

* ``parameter_resistivity`` (``advance`` x ``parameter``, ohm m): the image on the inversion's
  parameter grid, the warm start of the next advance; ``parameter_grid_sha256`` names the grid;
* ``contact_transfer_resistance`` (``advance`` x ``contact_reading``, ohm) and
  ``contact_rel_error`` (same, 1): the machine-only readings as the contact fit used them
  (surface-corrected where the run corrects; NaN: not measured or not valid), named by
  ``contact_reading_label`` (``a/b/m/n``);
* ``reference_resistivity`` (``advance``, ohm m): the drive's reference resistivity.

:func:`add_history` puts a run's :class:`DriveHistory` into its section; :func:`read_history`
takes the stored advances before a new shift back out; :func:`repeated_advances` finds the
advances of a new log the store already holds (skipped) and fails on true conflicts (an advance
number stored at another face chainage).
"""

from __future__ import annotations

import logging
import math

import numpy as np
import xarray as xr

from tbminv.inversion.history import DriveHistory
from tbminv.inversion.outcome import SectionError
from tbminv.results.section import _attrs

_LOG = logging.getLogger(__name__)

#: Variables of the drive's state (all optional in a store: older stores lack them).
STATE_VARIABLES = ("parameter_resistivity", "parameter_grid_sha256",
                   "contact_transfer_resistance", "contact_rel_error", "contact_reading_label",
                   "reference_resistivity")

#: Two face chainages of one advance number closer than this are the same advance, m.
FACE_TOLERANCE_M = 1e-3


def add_history(ds: xr.Dataset, history: DriveHistory | None) -> xr.Dataset:
    """The section with the run's per-advance state added (unchanged for ``None``).

    Parameters
    ----------
    ds : xarray.Dataset
        The run's section (:func:`tbminv.results.section.build_section`).
    history : DriveHistory or None
        The run's evidence (:attr:`tbminv.inversion.drive.DriveInverter.last_run`), one row per
        advance of ``ds``.

    Returns
    -------
    xarray.Dataset

    Raises
    ------
    SectionError
        The history's advances are not the section's.
    """
    if history is None:
        return ds
    adv = np.asarray(ds["advance"].values, int)
    order = {int(a): i for i, a in enumerate(history.advances)}
    if sorted(order) != sorted(int(a) for a in adv):
        raise SectionError("drive state: its advances differ from the section's")
    rows = [order[int(a)] for a in adv]
    da = ("advance",)
    out = ds.copy()
    if history.models_ohmm is not None:
        out["parameter_resistivity"] = (
            ("advance", "parameter"), np.asarray(history.models_ohmm, float)[rows],
            _attrs("electrical resistivity of the inversion's parameter cells", "ohm m",
                   comment="the image before resampling; the warm start of the next advance"))
        out["parameter_grid_sha256"] = (da, np.array([history.grid_sha256] * adv.size,
                                                     dtype=object),
                                        _attrs("SHA-256 of the parameter grid"))
    out["contact_transfer_resistance"] = (
        ("advance", "contact_reading"), np.asarray(history.contact_r_ohm, float)[rows],
        _attrs("transfer resistance of a machine-only reading as the contact fit used it",
               "ohm", comment="mean of the valid readings of the advance, surface-corrected "
                              "where the run corrects; NaN: not measured or not valid"))
    out["contact_rel_error"] = (
        ("advance", "contact_reading"), np.asarray(history.contact_rel_error, float)[rows],
        _attrs("relative standard error of contact_transfer_resistance", "1"))
    out["reference_resistivity"] = (da, np.full(adv.size, history.reference_resistivity_ohmm),
                                    _attrs("reference resistivity of the drive", "ohm m",
                                           comment="geometric factors and contact table"))
    # CF 1.8 section 1.3: a coordinate variable is numeric and monotonic, so the labels are an
    # auxiliary variable beside an index
    nq = len(history.contact_labels)
    out = out.assign_coords(contact_reading=("contact_reading", np.arange(nq, dtype=np.int32),
                                             _attrs("machine-only reading index", "1")))
    out["contact_reading_label"] = (
        ("contact_reading",), np.array(history.contact_labels, dtype=object),
        _attrs("reading a/b/m/n by electrode labels (-: pole at infinity)"))
    if "parameter" in out.dims:
        out = out.assign_coords(parameter=("parameter",
                                           np.arange(out.sizes["parameter"], dtype=np.int32),
                                           _attrs("parameter cell index", "1")))
    return out


def repeated_advances(stored: xr.Dataset | None, *, advances: np.ndarray,
                      faces_m: np.ndarray, source: str = "the log") -> np.ndarray:
    """Advances of a new log that the store already holds.

    An advance number stored (under any shift) at the same face chainage (within
    :data:`FACE_TOLERANCE_M`) is the same advance logged again: it is returned, to be skipped.

    Parameters
    ----------
    stored : xarray.Dataset or None
        The store's section (None: no store yet).
    advances, faces_m : ndarray
        Advance numbers and face chainages (m) of the new log.
    source : str
        The log's name, for messages.

    Returns
    -------
    ndarray of int
        The repeated advance numbers (sorted).

    Raises
    ------
    SectionError
        An advance number is stored at another face chainage (a true conflict: renumbered
        or misassigned advances); nothing is changed.
    """
    if stored is None or not stored.sizes.get("advance", 0):
        return np.array([], int)
    held = {int(a): (float(f), str(s)) for a, f, s in zip(
        stored["advance"].values, stored["face_chainage_m"].values,
        stored["shift"].values.astype(str))}
    repeated = []
    for a, f in zip(np.asarray(advances, int), np.asarray(faces_m, float)):
        if int(a) not in held:
            continue
        face, owner = held[int(a)]
        if not (math.isfinite(face) and abs(face - f) <= FACE_TOLERANCE_M):
            raise SectionError(f"{source}: advance {int(a)} at face chainage {f:.3f} m is "
                               f"stored under shift {owner!r} at {face:.3f} m; renumber the "
                               "advances or start a new store")
        repeated.append(int(a))
    return np.array(sorted(repeated), int)


def read_history(stored: xr.Dataset | None, *, before_advance: int
                 ) -> DriveHistory | None:
    """The stored advances before a new shift, as a :class:`DriveHistory`.

    Parameters
    ----------
    stored : xarray.Dataset or None
        The store's section (None: no store yet).
    before_advance : int
        The new shift's first advance number; stored advances numbered below it count.

    Returns
    -------
    DriveHistory or None
        None when the store holds no advance before the new shift. A store without the state
        variables (written by an older version) gives a history without readings or models
        (logged): the new shift then starts cold and its contact window starts again.
    """
    if stored is None or not stored.sizes.get("advance", 0):
        return None
    adv = np.asarray(stored["advance"].values, int)
    sel = adv < int(before_advance)
    if not sel.any():
        return None
    later = adv >= int(before_advance)
    if later.any():
        _LOG.warning("the store holds %d advances numbered %d or higher (the first: %d); their "
                     "contact fits are kept as stored, without this shift's readings",
                     int(later.sum()), int(before_advance), int(adv[later].min()))
    part = stored.isel(advance=np.flatnonzero(sel)).sortby("advance")
    n = part.sizes["advance"]
    faces = np.asarray(part["face_chainage_m"].values, float)
    if "contact_transfer_resistance" not in part:
        _LOG.warning("the store holds no per-advance readings (written by an older version): "
                     "the contact window and the warm start begin again with this shift")
        return DriveHistory(advances=part["advance"].values.astype(int), faces_m=faces,
                            contact_labels=(), contact_r_ohm=np.empty((n, 0)),
                            contact_rel_error=np.empty((n, 0)), models_ohmm=None,
                            grid_sha256="")
    models, grid = None, ""
    if "parameter_resistivity" in part:
        models = np.asarray(part["parameter_resistivity"].values, float)
        grid = str(part["parameter_grid_sha256"].values[-1])
        last = models[-1]
        models = models[:, np.isfinite(last)] if np.isfinite(last).any() else models
    rho_ref = (float(part["reference_resistivity"].values[-1])
               if "reference_resistivity" in part else math.nan)
    return DriveHistory(
        advances=part["advance"].values.astype(int), faces_m=faces,
        contact_labels=tuple(str(x) for x in part["contact_reading_label"].values),
        contact_r_ohm=np.asarray(part["contact_transfer_resistance"].values, float),
        contact_rel_error=np.asarray(part["contact_rel_error"].values, float),
        models_ohmm=models, grid_sha256=grid, reference_resistivity_ohmm=rho_ref)


__all__ = ["STATE_VARIABLES", "FACE_TOLERANCE_M", "add_history", "repeated_advances",
           "read_history"]
