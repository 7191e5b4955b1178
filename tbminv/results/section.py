"""The moving section: per-advance inversion results, their xarray form and the NetCDF store.

The inversion hands one :class:`AdvanceResult` per advance (a model on a regular grid in the
machine frame, ``ahead`` x ``radius`` for the axisymmetric model or ``ahead`` x ``z`` for a
vertical section through the axis, with its coverage and fit record, and optionally a
parametric :class:`ContactFit`). :func:`build_section` stacks them into an
:class:`xarray.Dataset` with dimensions ``advance`` x ``ahead`` x ``radius`` that follows the
section-store contract (variables ``resistivity``, ``conductivity``, ``coverage``, ``chi2``,
``rrms``, ``iterations``, ``lambda``, ``face_chainage_m``, ``contact_ahead_m``,
``contact_ahead_lo_m``, ``contact_ahead_hi_m``, ``contact_chainage_m``,
``resistivity_beyond``, ``contact_contrast`` with ``contact_contrast_lo``/``_hi``,
``contact_at_bound``, ``contact_contrast_open``, ``contact_ambiguous``,
``contact_part_lo_m``/``_hi_m``,
``contact_lr_statistic``, ``probe_misfit_added``, ``probe_contradicts``) plus a coverage /
depth-of-investigation mask (``covered``), fit flags
(``fit_flag``), shift labels (``shift``) and CF-1.8 / provenance attributes.

The store is one NetCDF-4 file (h5netcdf engine). :func:`append_shift` reads it fully, drops
the advances of the shift being written (re-running a shift replaces exactly that shift), adds
the new ones, writes a *new* file beside it and renames it into place
(:func:`tbminv.cache.atomic_path`): a crash or a kill mid-append leaves the previous store
intact and readable. Appends to one store are serialised by an advisory lock file
(``<store>.lock``).

Use by the inversion, per shift::

    results = [AdvanceResult(advance=k, face_chainage_m=face_k, ahead_m=a, radius_m=r,
                             resistivity_ohmm=rho_k, coverage=cov_k, chi2=..., converged=...,
                             contact=ContactFit.from_estimate(estimate_k)), ...]
    ds = build_section(results, layout_text, settings_text, inputs_sha256)
    append_shift("section.nc", ds, shift="2026-03-01 day")
    section = open_section("section.nc")
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import logging
import math
import os
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr
from scipy.interpolate import RegularGridInterpolator

import tbminv
from tbminv.gimli import versions
from tbminv.inversion.outcome import (
    POSTPROCESS_MASKS,
    POSTPROCESS_MEANINGS,
    AdvanceResult,
    SectionError,
)
from tbminv.layout import layout_document

_LOG = logging.getLogger(__name__)

#: Bits of the per-advance ``fit_flag`` variable (CF ``flag_masks``).
FLAG_NOT_CONVERGED = 1
FLAG_MISFIT_HIGH = 2
FLAG_MISFIT_LOW = 4
FLAG_MEANINGS = "not_converged misfit_high misfit_low"

STORE_FORMAT = 1
"""Version of the section-store layout, written to the ``tbminv_store_format`` attribute."""


@dataclass(frozen=True)
class SectionSettings:
    """How :func:`build_section` masks and flags.

    Parameters
    ----------
    coverage_span_decades : float
        A cell counts as covered if its coverage is within this many decades of the best
        covered cell of its advance (our default 3, common practice, no source).
    coverage_min_log10 : float or None
        Absolute coverage threshold instead of the relative one.
    doi_max : float
        Cells with a DOI index above this are masked (0.1-0.2 was suggested by Oldenburg &
        Li 1999, from memory; our default 0.2).
    chi2_high : float
        An advance with chi2 above this is flagged ``misfit_high`` (our default 2).
    chi2_low : float
        An advance with chi2 below this is flagged ``misfit_low`` (over-fitted; default 0.3).
    """

    coverage_span_decades: float = 3.0
    coverage_min_log10: float | None = None
    doi_max: float = 0.2
    chi2_high: float = 2.0
    chi2_low: float = 0.3


def _attrs(long_name: str, units: str | None = None, **extra: Any) -> dict[str, Any]:
    out: dict[str, Any] = {"long_name": long_name}
    if units is not None:
        out["units"] = units
    out.update(extra)
    return out


def _interp_grid(r: AdvanceResult, ahead: np.ndarray, radius: np.ndarray,
                 values: np.ndarray, log: bool) -> np.ndarray:
    """Bilinear resampling of one advance's grid onto (ahead, transverse); NaN outside."""
    v = np.log10(values) if log else values
    trans = r.transverse_m
    if trans.size == 1:
        out = np.empty((ahead.size, radius.size))
        col = np.interp(ahead, r.ahead_m, v[:, 0], left=np.nan, right=np.nan)
        out[:] = col[:, None]
        out[:, ~np.isclose(radius, trans[0])] = np.nan
    else:
        f = RegularGridInterpolator((r.ahead_m, trans), v, bounds_error=False,
                                    fill_value=np.nan)
        aa, rr = np.meshgrid(ahead, radius, indexing="ij")
        out = f(np.stack([aa.ravel(), rr.ravel()], axis=-1)).reshape(aa.shape)
    return 10.0 ** out if log else out


def machine_attrs(layout_text: str) -> dict[str, float]:
    """Machine diameter and shield length, m, from layout text (empty if not readable)."""
    try:
        machine = layout_document(layout_text).get("machine", {})
        return {"machine_diameter_m": float(machine["diameter_m"]),
                "machine_shield_length_m": float(machine["shield_length_m"])}
    except Exception:  # layout text without a readable [machine] table: no outline drawn
        return {}


def _sha256_text(text: str) -> str:
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def build_section(results: Sequence[AdvanceResult], layout_text: str, settings_text: str,
                  inputs_sha256: str, *, shift: str = "", settings: SectionSettings | None = None,
                  ) -> xr.Dataset:
    """Stack per-advance results into the moving-section dataset (machine frame).

    Parameters
    ----------
    results : sequence of AdvanceResult
        One per advance, any order (sorted by advance here); advance numbers must be unique.
        All are resampled onto the grid of the first result (bilinear, in log10 resistivity).
    layout_text : str
        The layout file as text (kept as the ``layout_text`` attribute).
    settings_text : str
        The inversion settings as text (TOML), kept as ``settings_text``.
    inputs_sha256 : str
        SHA-256 of the inputs (readings log and layout), kept per advance and as an attribute.
    shift : str
        Shift label given to every advance (:func:`append_shift` sets it again).
    settings : SectionSettings, optional
        Mask and flag thresholds.

    Returns
    -------
    xarray.Dataset
        Dimensions ``advance``, ``ahead``, ``radius`` (or ``z``) and ``iteration`` (chi2
        history).
    """
    if not results:
        raise SectionError("build_section: no advance results given")
    st = settings or SectionSettings()
    res = sorted(results, key=lambda r: r.advance)
    adv = np.array([int(r.advance) for r in res])
    if np.unique(adv).size != adv.size:
        dup = sorted({int(a) for a in adv if np.sum(adv == a) > 1})
        raise SectionError(f"build_section: advance numbers repeated: {dup}")
    tdim = res[0].transverse_dim
    if any(r.transverse_dim != tdim for r in res):
        raise SectionError("build_section: results mix axisymmetric (radius_m) and vertical "
                           "section (z_m) grids")
    ahead, radius = res[0].ahead_m, res[0].transverse_m
    shape = (adv.size, ahead.size, radius.size)
    rho = np.full(shape, np.nan)
    cov = np.full(shape, np.nan)
    doi = np.full(shape, np.nan)
    rho_lo = np.full(shape, np.nan)
    rho_hi = np.full(shape, np.nan)
    has_doi = has_band = False
    for i, r in enumerate(res):
        same = (r.ahead_m.shape == ahead.shape and r.transverse_m.shape == radius.shape
                and np.allclose(r.ahead_m, ahead) and np.allclose(r.transverse_m, radius))

        def put(values: np.ndarray, log: bool, r: AdvanceResult = r,
                same: bool = same) -> np.ndarray:
            return values if same else _interp_grid(r, ahead, radius, values, log)

        if not same:
            _LOG.info("advance %d: resampled onto the grid of advance %d", r.advance, adv[0])
        rho[i] = put(r.resistivity_ohmm, True)
        cov[i] = put(r.coverage, False)
        if r.doi_index is not None:
            doi[i] = put(r.doi_index, False)
            has_doi = True
        if r.resistivity_lo_ohmm is not None and r.resistivity_hi_ohmm is not None:
            rho_lo[i] = put(r.resistivity_lo_ohmm, True)
            rho_hi[i] = put(r.resistivity_hi_ohmm, True)
            has_band = True

    # coverage / DOI mask
    if st.coverage_min_log10 is not None:
        thresh = np.full(adv.size, float(st.coverage_min_log10))
    else:
        best = np.array([np.nanmax(c) if np.isfinite(c).any() else np.nan for c in cov])
        thresh = best - st.coverage_span_decades
    with np.errstate(invalid="ignore"):
        covered = (cov >= thresh[:, None, None]) & np.isfinite(rho)
        if has_doi:
            covered &= ~(doi > st.doi_max)

    chi2 = np.array([r.chi2 for r in res], dtype=float)
    flag = np.zeros(adv.size, dtype=np.int8)
    flag[[not r.converged for r in res]] |= FLAG_NOT_CONVERGED
    with np.errstate(invalid="ignore"):
        flag[~(chi2 <= st.chi2_high)] |= FLAG_MISFIT_HIGH  # NaN chi2 counts as high
        flag[chi2 < st.chi2_low] |= FLAG_MISFIT_LOW

    n_it = max([len(r.chi2_history) for r in res] + [1])
    hist = np.full((adv.size, n_it), np.nan)
    for i, r in enumerate(res):
        hist[i, : len(r.chi2_history)] = r.chi2_history

    def contact_field(name: str) -> np.ndarray:
        out = np.full(adv.size, np.nan)
        for i, r in enumerate(res):
            c = r.contact
            if c is None:
                continue
            if name == "chainage_m":
                val = c.chainage_m if c.chainage_m is not None else r.face_chainage_m + c.ahead_m
                out[i] = val if c.found and val is not None else np.nan
            elif name in ("ahead_m", "ahead_lo_m", "ahead_hi_m", "resistivity_beyond_ohmm",
                          "dip_deg"):
                out[i] = getattr(c, name) if c.found else np.nan
            else:
                out[i] = getattr(c, name)
        return out

    def contact_flag(name: str) -> np.ndarray:
        return np.array([bool(r.contact is not None and getattr(r.contact, name, False))
                         for r in res], np.int8)

    n_parts = max([len(r.contact.parts_m) for r in res if r.contact is not None] + [1])
    parts = np.full((adv.size, n_parts, 2), np.nan)
    for i, r in enumerate(res):
        if r.contact is not None and r.contact.found:
            for j, (lo_, hi_) in enumerate(r.contact.parts_m):
                parts[i, j] = (lo_, hi_)

    # ISO 8601 times with or without a zone (no zone: UTC), stored as UTC without a zone
    times = (pd.to_datetime([r.time or None for r in res], utc=True, format="ISO8601")
             .tz_localize(None).to_numpy(dtype="datetime64[ns]"))
    d3 = ("advance", "ahead", tdim)
    da = ("advance",)
    vars_: dict[str, Any] = {
        "resistivity": (d3, rho, _attrs("electrical resistivity of the ground", "ohm m",
                                        comment="inverted model, machine frame")),
        "conductivity": (d3, 1.0 / rho, _attrs("electrical conductivity of the ground",
                                               "S m-1", comment="1 / resistivity")),
        "coverage": (d3, cov, _attrs("log10 of cumulative sensitivity", "1",
                                     comment="error-weighted absolute sensitivity summed "
                                             "over the data of the advance")),
        "covered": (d3, covered.astype(np.int8), _attrs(
            "cell constrained by the data", None, flag_values=np.array([0, 1], np.int8),
            flag_meanings="not_covered covered",
            coverage_span_decades=float(st.coverage_span_decades),
            coverage_min_log10=(math.nan if st.coverage_min_log10 is None
                                else float(st.coverage_min_log10)),
            doi_max=float(st.doi_max),
            comment="coverage within coverage_span_decades of the best cell of the advance "
                    "(or above coverage_min_log10) and DOI index <= doi_max")),
        "face_chainage_m": (da, np.array([r.face_chainage_m for r in res], float),
                            _attrs("chainage of the cutterhead face", "m")),
        "chi2": (da, chi2, _attrs("error-weighted chi-squared misfit per datum", "1")),
        "rrms": (da, np.array([r.rrms_percent for r in res], float),
                 _attrs("relative root-mean-square misfit", "percent")),
        "iterations": (da, np.array([r.iterations for r in res], np.int32),
                       _attrs("inversion iterations", "1")),
        "lambda": (da, np.array([r.lambda_ for r in res], float),
                   _attrs("regularisation strength of the final model", "1")),
        "converged": (da, np.array([r.converged for r in res], np.int8),
                      _attrs("inversion met its convergence criterion",
                             flag_values=np.array([0, 1], np.int8),
                             flag_meanings="not_converged converged")),
        "stop_reason": (da, np.array([str(r.stop_reason) for r in res], dtype=object),
                        _attrs("why the inversion stopped")),
        "inversion_time_s": (da, np.array([r.time_s for r in res], float),
                             _attrs("wall-clock time of the inversion", "s")),
        "n_data": (da, np.array([r.n_data for r in res], np.int32),
                   _attrs("readings of the advance", "1")),
        "n_used": (da, np.array([r.n_used for r in res], np.int32),
                   _attrs("readings used by the inversion", "1")),
        "fit_flag": (da, flag, _attrs(
            "data-fit flags", None, flag_masks=np.array([1, 2, 4], np.int8),
            flag_meanings=FLAG_MEANINGS, chi2_high=float(st.chi2_high),
            chi2_low=float(st.chi2_low),
            comment="0: converged and chi2 within [chi2_low, chi2_high]")),
        "postprocess_flag": (da, np.array([r.postprocess_flag for r in res], np.int8), _attrs(
            "post-processing steps that failed", None,
            flag_masks=np.array(POSTPROCESS_MASKS, np.int8), flag_meanings=POSTPROCESS_MEANINGS,
            comment="0: every step after the image inversion ran; the image is stored either "
                    "way (tbminv invert exits with code 3 when a bit is set)")),
        "chi2_history": (("advance", "iteration"), hist,
                         _attrs("chi-squared misfit after each iteration", "1")),
        "contact_ahead_m": (da, contact_field("ahead_m"),
                            _attrs("fitted distance of a contact ahead of the face", "m",
                                   comment="NaN: no contact within reach")),
        "contact_ahead_lo_m": (da, contact_field("ahead_lo_m"),
                               _attrs("lower bound of contact_ahead_m", "m")),
        "contact_ahead_hi_m": (da, contact_field("ahead_hi_m"),
                               _attrs("upper bound of contact_ahead_m", "m")),
        "contact_interval_level": (da, contact_field("interval_level"),
                                   _attrs("probability content of the contact interval", "1")),
        "contact_chainage_m": (da, contact_field("chainage_m"),
                               _attrs("chainage of the fitted contact on the axis", "m")),
        "contact_dip_deg": (da, contact_field("dip_deg"),
                            _attrs("fitted dip of the contact", "degree")),
        "resistivity_around": (da, contact_field("resistivity_around_ohmm"),
                               _attrs("fitted resistivity around the machine", "ohm m")),
        "resistivity_beyond": (da, contact_field("resistivity_beyond_ohmm"),
                               _attrs("fitted resistivity beyond the contact", "ohm m")),
        "contact_p_none": (da, contact_field("p_no_contact"), _attrs(
            "calibrated false-alarm probability of the contact statistic", "1",
            comment="share of simulated homogeneous drives whose likelihood-ratio statistic "
                    "reaches contact_lr_statistic (tbminv.inversion.nullcal); a p-value of "
                    "'no contact within reach', not the probability that there is none; "
                    "NaN: not computed")),
        "contact_p_homogeneous": (da, contact_field("p_homogeneous"), _attrs(
            "calibrated p-value of the homogeneous model", "1",
            comment="same value as contact_p_none; NaN: not computed")),
        "contact_lr_statistic": (da, contact_field("lr_statistic"), _attrs(
            "likelihood-ratio statistic of the contact against no contact", "1",
            comment="(chi2_homogeneous - chi2_min) / max(1, reduced chi2) of the joint fit "
                    "over the window of advances; NaN: not computed")),
        "contact_contrast": (da, contact_field("contrast"), _attrs(
            "resistivity beyond the contact over resistivity around the machine", "1",
            comment="resistivity_beyond / resistivity_around; NaN: no contact within reach")),
        "contact_contrast_lo": (da, contact_field("contrast_lo"), _attrs(
            "lower bound of contact_contrast", "1",
            comment="profile-likelihood interval at contact_interval_level")),
        "contact_contrast_hi": (da, contact_field("contrast_hi"), _attrs(
            "upper bound of contact_contrast", "1",
            comment="profile-likelihood interval at contact_interval_level")),
        "contact_at_bound": (da, contact_flag("at_bound"), _attrs(
            "contact result at a bound of the fit", None,
            flag_values=np.array([0, 1], np.int8), flag_meanings="inside at_bound",
            comment="best contrast at a table end, or the distance or its interval at the "
                    "first or last grid point: never reported above the lowest level of "
                    "concern")),
        "contact_contrast_open": (da, contact_flag("contrast_open"), _attrs(
            "contact contrast interval reaches a table end", None,
            flag_values=np.array([0, 1], np.int8), flag_meanings="closed open",
            comment="one-sided contrast answer (e.g. 'x5 or more'); never reported as firm")),
        "contact_ambiguous": (da, contact_flag("ambiguous"), _attrs(
            "contact distance set has several separate parts", None,
            flag_values=np.array([0, 1], np.int8), flag_meanings="single ambiguous",
            comment="contact_ahead_lo_m and contact_ahead_hi_m span all parts; the parts "
                    "are contact_part_lo_m and contact_part_hi_m")),
        "contact_part_lo_m": (("advance", "contact_part"), parts[..., 0], _attrs(
            "lower end of a part of the contact distance set", "m",
            comment="ahead of the face; NaN: no such part")),
        "contact_part_hi_m": (("advance", "contact_part"), parts[..., 1], _attrs(
            "upper end of a part of the contact distance set", "m",
            comment="ahead of the face; NaN: no such part, or open beyond reach")),
        "probe_misfit_added": (da, contact_field("probe_misfit_added"), _attrs(
            "chi-squared the probe constraint adds to the contact fit", "1",
            comment="scaled by the reduced chi-squared of the free fit; NaN: no probe "
                    "constraint for the advance (tbminv.inversion.probefit)")),
        "probe_contradicts": (da, contact_flag("probe_contradicts"), _attrs(
            "probe constraint contradicts the readings", None,
            flag_values=np.array([0, 1], np.int8), flag_meanings="agrees contradicts",
            comment="1: the constraint was flagged and not applied to the contact fit")),
        "shift": (da, np.array([shift] * adv.size, dtype=object), _attrs("shift label")),
        "inputs_sha256": (da, np.array([inputs_sha256] * adv.size, dtype=object),
                          _attrs("SHA-256 of the inputs of the advance")),
        "time": (da, times, {"standard_name": "time", "long_name": "time of the readings"}),
    }
    if has_doi:
        vars_["doi_index"] = (d3, doi, _attrs(
            "depth-of-investigation index", "1",
            references="Oldenburg and Li 1999, Geophysics 64(2):403-416"))
    if has_band:
        vars_["resistivity_lo"] = (d3, rho_lo, _attrs("lower bound of resistivity", "ohm m"))
        vars_["resistivity_hi"] = (d3, rho_hi, _attrs("upper bound of resistivity", "ohm m"))
    coords = {
        "advance": ("advance", adv.astype(np.int32), _attrs("advance number", "1")),
        "ahead": ("ahead", ahead, _attrs("distance ahead of the cutterhead face", "m",
                                         comment="machine frame: positive ahead of the face")),
        tdim: (tdim, radius, _attrs("distance from the tunnel axis", "m")
               if tdim == "radius" else
               _attrs("height above the tunnel axis", "m", comment="positive up")),
        "contact_part": ("contact_part", np.arange(n_parts, dtype=np.int32),
                         _attrs("part of the contact distance set", "1")),
        "iteration": ("iteration", np.arange(n_it, dtype=np.int32),
                      _attrs("inversion iteration (0: starting model)", "1")),
    }
    ds = xr.Dataset(vars_, coords=coords)
    created = _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
    ver = versions()
    ds.attrs = {
        "Conventions": "CF-1.8",
        "title": "tbminv moving section (machine frame)",
        "source": "tbminv per-advance inversion",
        "history": f"{created} built by tbminv {tbminv.__version__}",
        "references": "tbminv section store format (DEVELOPERS.md, File formats, Section store)",
        "comment": tbminv.CAUTION,
        "tbminv_store_format": STORE_FORMAT,
        "tbminv_version": tbminv.__version__,
        "pygimli_version": ver.get("pygimli", "unknown"),
        "pgcore_version": ver.get("pgcore", "unknown"),
        "date_created": created,
        "layout_text": layout_text,
        "layout_sha256": _sha256_text(layout_text),
        "settings_text": settings_text,
        "settings_sha256": _sha256_text(settings_text),
        "inputs_sha256": inputs_sha256,
        **machine_attrs(layout_text),
    }
    return ds


# --------------------------------------------------------------------------- world view


def world_view(ds: xr.Dataset, dx_m: float | None = None) -> xr.Dataset:
    """Resample the section to the world frame: chainage ``x`` x ``radius`` (or ``z``).

    Parameters
    ----------
    ds : xarray.Dataset
        A section from :func:`build_section` or :func:`open_section`.
    dx_m : float, optional
        Chainage spacing, m (default: the smallest ``ahead`` spacing).

    Returns
    -------
    xarray.Dataset
        ``resistivity``, ``coverage`` and ``covered`` on (advance, x, radius), NaN / 0 outside
        each advance's window, and the composite ``resistivity_latest`` on (x, radius): at
        each cell, the value of the latest advance without fit flags that covers it
        (``advance_latest`` says which advance). Interpolation is linear in log10
        resistivity along the axis.
    """
    ahead = ds["ahead"].values
    face = ds["face_chainage_m"].values
    dx = float(dx_m) if dx_m else float(np.min(np.diff(ahead)))
    x0 = float(np.nanmin(face) + ahead[0])
    x1 = float(np.nanmax(face) + ahead[-1])
    x = x0 + dx * np.arange(int(math.floor((x1 - x0) / dx + 1e-9)) + 1)
    tdim = transverse_dim(ds)
    na, nr = ds.sizes["advance"], ds.sizes[tdim]
    lrho = np.log10(ds["resistivity"].values)
    cov = ds["coverage"].values
    covd = ds["covered"].values.astype(float)
    out_rho = np.full((na, x.size, nr), np.nan)
    out_cov = np.full_like(out_rho, np.nan)
    out_cvd = np.zeros((na, x.size, nr), dtype=np.int8)
    for i in range(na):
        local = x - face[i]
        for j in range(nr):
            out_rho[i, :, j] = np.interp(local, ahead, lrho[i, :, j], left=np.nan,
                                         right=np.nan)
            out_cov[i, :, j] = np.interp(local, ahead, cov[i, :, j], left=np.nan, right=np.nan)
            c = np.interp(local, ahead, covd[i, :, j], left=0.0, right=0.0)
            out_cvd[i, :, j] = (c >= 0.5) & np.isfinite(out_rho[i, :, j])
    ok = ds["fit_flag"].values == 0 if "fit_flag" in ds else np.ones(na, bool)
    latest = np.full((x.size, nr), np.nan)
    latest_adv = np.full((x.size, nr), -1, dtype=np.int64)
    latest_cov = np.zeros((x.size, nr), dtype=np.int8)
    adv = ds["advance"].values
    for i in np.argsort(adv):  # later advances overwrite earlier ones
        use = (out_cvd[i] == 1) & ok[i]
        latest[use] = out_rho[i][use]
        latest_adv[use] = adv[i]
        latest_cov[use] = 1
    # where no clean covered value exists, keep the latest value shown (flagged as uncovered)
    for i in np.argsort(adv):
        fill = (latest_cov == 0) & np.isfinite(out_rho[i])
        latest[fill] = out_rho[i][fill]
    w = xr.Dataset(
        {
            "resistivity": (("advance", "x", tdim), 10.0 ** out_rho,
                            ds["resistivity"].attrs),
            "coverage": (("advance", "x", tdim), out_cov, ds["coverage"].attrs),
            "covered": (("advance", "x", tdim), out_cvd,
                        {k: v for k, v in ds["covered"].attrs.items()}),
            "resistivity_latest": (("x", tdim), 10.0 ** latest, _attrs(
                "resistivity from the latest advance covering the cell", "ohm m")),
            "covered_latest": (("x", tdim), latest_cov, _attrs(
                "cell covered by a clean advance", None, flag_values=np.array([0, 1], np.int8),
                flag_meanings="not_covered covered")),
            "advance_latest": (("x", tdim), latest_adv, _attrs(
                "advance giving resistivity_latest (-1: none covers it)", "1")),
            "face_chainage_m": (("advance",), face, ds["face_chainage_m"].attrs),
        },
        coords={
            "advance": ("advance", adv, ds["advance"].attrs),
            "x": ("x", x, _attrs("chainage along the tunnel axis", "m")),
            tdim: (tdim, ds[tdim].values, ds[tdim].attrs),
        },
        attrs={**ds.attrs, "title": "tbminv moving section (world frame)"},
    )
    return w


def transverse_dim(ds: xr.Dataset) -> str:
    """``"radius"`` for an axisymmetric section, ``"z"`` for a vertical one."""
    return "z" if "z" in ds.dims else "radius"


def shift_advances(ds: xr.Dataset, shift: str) -> np.ndarray:
    """Advance numbers of one shift in a section."""
    return ds["advance"].values[ds["shift"].values.astype(str) == str(shift)]


def clean_advances(ds: xr.Dataset) -> np.ndarray:
    """Boolean per advance: no fit flag (converged, chi2 within the flag limits).

    A section without ``fit_flag`` has every advance clean.
    """
    if "fit_flag" not in ds:
        return np.ones(ds.sizes["advance"], dtype=bool)
    return np.asarray(ds["fit_flag"].values) == 0


def axis_median_log10(ds: xr.Dataset, advance: int, radius_m: float, *,
                      var: str = "resistivity", covered_only: bool = True) -> np.ndarray:
    """Median log10 of ``var`` over the cells within ``radius_m`` of the axis, per ``ahead``.

    Parameters
    ----------
    ds : xarray.Dataset
        Section (machine frame).
    advance : int
        Advance number.
    radius_m : float
        Cells at most this far from the axis (or this far above and below it in a vertical
        section) count, m; at least the innermost cell always counts.
    var : str
        Variable of resistivities, ohm-m (``resistivity``, or a bound of it).
    covered_only : bool
        Leave out cells the data do not constrain (``covered == 0``).

    Returns
    -------
    ndarray
        One value per ``ahead`` position, log10(ohm-m); NaN where no cell counts.
    """
    rad = np.abs(ds[transverse_dim(ds)].values)
    sel = rad <= max(radius_m, rad.min())
    sub = ds.sel(advance=advance)
    with np.errstate(divide="ignore", invalid="ignore"):
        vals = np.log10(sub[var].values[:, sel])
    ok = np.isfinite(vals)
    if covered_only and "covered" in ds:
        ok &= sub["covered"].values[:, sel].astype(bool)
    vals = np.where(ok, vals, np.nan)
    out = np.full(vals.shape[0], np.nan)
    rows = ok.any(axis=1)
    out[rows] = np.nanmedian(vals[rows], axis=1)   # rows with a value only: no warning
    return out


def hash_files(paths: Sequence[str | os.PathLike[str]]) -> str:
    """SHA-256 over the bytes of several files (in the given order), for ``inputs_sha256``."""
    h = hashlib.sha256()
    for p in paths:
        h.update(Path(p).read_bytes())
        h.update(b"\0")
    return h.hexdigest()


__all__ = ["machine_attrs",
           "FLAG_NOT_CONVERGED", "FLAG_MISFIT_HIGH", "FLAG_MISFIT_LOW", "FLAG_MEANINGS",
           "STORE_FORMAT", "SectionSettings", "build_section", "world_view", "transverse_dim",
           "shift_advances", "clean_advances", "axis_median_log10", "hash_files"]
