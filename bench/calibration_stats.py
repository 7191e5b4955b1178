"""Statistics, table and reliability figure of the calibration benchmark.

Used by ``bench/bench_calibration.py`` (see there for what is simulated). Rates come with
Clopper-Pearson 95 % intervals (Clopper & Pearson 1934, Biometrika 26(4):404-413), computed
from the beta distribution of scipy.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from scipy.stats import beta

from tbminv.cache import atomic_path
from tbminv.results.ahead import LEVELS

#: Buckets of the true distance ahead of the face, machine diameters.
BUCKETS_D = ((0.0, 1.0), (1.0, 2.0), (2.0, 4.0), (4.0, 7.0), (7.0, 10.5))
#: Fewest intervals in a bucket for a verdict on its coverage (below: too few to tell).
MIN_N = 20
#: Probability contents of the extra distance intervals (the stated one is 0.95).
EXTRA_LEVELS = (0.5, 0.8, 0.9, 0.99)


# ----------------------------------------------------------------------- statistics
def cp_interval(k: int, n: int, level: float = 0.95) -> tuple[float, float]:
    """Clopper-Pearson interval of a binomial proportion (Clopper & Pearson 1934)."""
    if n == 0:
        return math.nan, math.nan
    a = 1.0 - level
    lo = 0.0 if k == 0 else float(beta.ppf(a / 2, k, n - k + 1))
    hi = 1.0 if k == n else float(beta.ppf(1 - a / 2, k + 1, n - k))
    return lo, hi


def _rate(mask: np.ndarray) -> dict[str, Any]:
    n, k = int(mask.size), int(np.sum(mask))
    lo, hi = cp_interval(k, n)
    return {"n": n, "k": k, "rate": k / n if n else math.nan, "ci95": [lo, hi]}


def interval_holds(lo: np.ndarray, hi: np.ndarray, truth: np.ndarray) -> np.ndarray:
    """Whether ``[lo, hi]`` holds ``truth``; a NaN ``hi`` with a finite ``lo`` is open above."""
    hi = np.where(np.isnan(hi) & np.isfinite(lo), np.inf, hi)
    return (lo <= truth) & (truth <= hi)


def summarise_contact(df: pd.DataFrame, diam_m: float) -> dict[str, Any]:
    """Coverage, detection and error per distance bucket of the contact drives."""
    out: dict[str, Any] = {"buckets": []}
    ahead = df[df["d_true"] > 0]
    for b0, b1 in BUCKETS_D:
        sel = ahead[(ahead["d_true"] >= b0 * diam_m) & (ahead["d_true"] < b1 * diam_m)]
        fnd = sel[sel["found"]]
        dist_ok = interval_holds(fnd["lo_m"].to_numpy(), fnd["hi_m"].to_numpy(),
                         fnd["d_true"].to_numpy())
        has_c = fnd[np.isfinite(fnd["contrast_lo"]) & np.isfinite(fnd["contrast_hi"])]
        c_ok = interval_holds(has_c["contrast_lo"].to_numpy(), has_c["contrast_hi"].to_numpy(),
                      has_c["c_true"].to_numpy())
        err = np.abs(fnd["ahead_m"] - fnd["d_true"])
        right_way = np.sign(np.log(fnd["contrast"])) == np.sign(np.log(fnd["c_true"]))
        levels = {lv: _rate((sel["level"] == lv).to_numpy()) for lv in LEVELS}
        extra = {}
        for lvl in EXTRA_LEVELS:
            if f"lo_{lvl}" in fnd:
                f2 = sel[np.isfinite(sel[f"lo_{lvl}"])]
                extra[str(lvl)] = _rate(interval_holds(f2[f"lo_{lvl}"].to_numpy(),
                                               f2[f"hi_{lvl}"].to_numpy(),
                                               f2["d_true"].to_numpy()))
        out["buckets"].append({
            "distance_D": [b0, b1], "advances": int(len(sel)),
            "drives": int(sel["drive"].nunique()),
            "detected": _rate(sel["found"].to_numpy()),
            "distance_coverage": _rate(dist_ok),
            "distance_coverage_all_advances": _rate(np.concatenate(
                [dist_ok, np.zeros(len(sel) - len(fnd), bool)])),
            "contrast_coverage": _rate(c_ok) if len(has_c) else None,
            "median_abs_distance_error_m": float(np.median(err)) if len(err) else math.nan,
            "median_abs_distance_error_D": float(np.median(err)) / diam_m if len(err)
            else math.nan,
            "right_direction": _rate(right_way.to_numpy()),
            "at_bound": _rate((fnd["at_bound"] > 0).to_numpy()),
            "ambiguous": _rate((fnd["ambiguous"] > 0).to_numpy()),
            "levels": levels,
            "coverage_at_other_levels": extra,
        })
    passed = df[df["d_true"] <= 0]
    pf = passed[passed["found"]]
    out["face_passed"] = {
        "advances": int(len(passed)),
        "found": _rate(passed["found"].to_numpy()),
        "reported_ahead_of_face": _rate((pf["ahead_m"] > 0).to_numpy()),
        "distance_coverage": _rate(interval_holds(pf["lo_m"].to_numpy(), pf["hi_m"].to_numpy(),
                                          pf["d_true"].to_numpy())),
    }
    fnd = ahead[ahead["found"]]
    err = np.abs(fnd["ahead_m"] - fnd["d_true"])
    # every level on the same drives: those also fitted at the extra levels
    sub = fnd[fnd["extra_levels"]] if "extra_levels" in fnd else fnd.iloc[:0]
    by_level = {"0.95": _rate(interval_holds(sub["lo_m"].to_numpy(), sub["hi_m"].to_numpy(),
                                             sub["d_true"].to_numpy()))} if len(sub) else {}
    for lvl in EXTRA_LEVELS:
        if f"lo_{lvl}" in ahead:
            f2 = ahead[np.isfinite(ahead[f"lo_{lvl}"])]
            by_level[str(lvl)] = _rate(interval_holds(f2[f"lo_{lvl}"].to_numpy(),
                                              f2[f"hi_{lvl}"].to_numpy(),
                                              f2["d_true"].to_numpy()))
    out["distance_coverage_by_level"] = dict(sorted(by_level.items(),
                                                    key=lambda kv: float(kv[0])))
    out["overall_ahead"] = {
        "advances": int(len(ahead)), "detected": _rate(ahead["found"].to_numpy()),
        "distance_coverage": _rate(interval_holds(fnd["lo_m"].to_numpy(), fnd["hi_m"].to_numpy(),
                                          fnd["d_true"].to_numpy())),
        "median_abs_distance_error_m": float(np.median(err)) if len(err) else math.nan,
    }
    return out


def summarise_homogeneous(df: pd.DataFrame) -> dict[str, Any]:
    """False-alarm rates per report (advance) and per drive."""
    rank = df["level"].map(LEVELS.index).to_numpy()
    per_drive = df.assign(rank=rank).groupby("drive")["rank"].max()
    out = {
        "advances": int(len(df)), "drives": int(df["drive"].nunique()),
        "false_found_per_advance": _rate(df["found"].to_numpy()),
        "false_likely_or_firm_per_advance": _rate(rank >= LEVELS.index("likely")),
        "false_firm_per_advance": _rate(rank >= LEVELS.index("firm")),
        "false_watch_or_higher_per_advance": _rate(rank >= LEVELS.index("watch")),
        "false_likely_or_firm_per_drive": _rate((per_drive >= LEVELS.index("likely")).to_numpy()),
        "false_firm_per_drive": _rate((per_drive >= LEVELS.index("firm")).to_numpy()),
    }
    pv = _pvalue(df)
    out["p_value_field"] = pv[1]
    alphas = [0.001, 0.01, 0.05, 0.1, 0.2, 0.5]
    out["p_value_calibration"] = {str(a): _rate(pv[0] <= a) for a in alphas}
    return out


def _pvalue(df: pd.DataFrame) -> tuple[np.ndarray, str]:
    for name in ("p_false_alarm", "p_homogeneous"):
        v = df[name].to_numpy()
        if np.isfinite(v).any():
            return v, name
    return df["p_homogeneous"].to_numpy(), "p_homogeneous"


def p_none_reliability(df: pd.DataFrame) -> list[dict[str, Any]]:
    """Stated p(no contact) in bins against the observed frequency of no contact ahead."""
    # advances after the face passed a contact are left out: the window still holds it
    df = df[~(df["d_true"] <= 0)]
    p = df["p_no_contact"].to_numpy()
    truth_none = ~(df["d_true"].to_numpy() > 0)
    edges = np.array([0.0, 1e-6, 1e-3, 0.01, 0.05, 0.2, 0.5, 0.8, 0.95, 0.99, 1.0 + 1e-12])
    out = []
    for e0, e1 in zip(edges[:-1], edges[1:]):
        sel = np.isfinite(p) & (p >= e0) & (p < e1)
        if sel.any():
            r = _rate(truth_none[sel])
            r.update({"stated_bin": [float(e0), float(min(e1, 1.0))],
                      "stated_mean": float(np.mean(p[sel]))})
            out.append(r)
    return out


# ----------------------------------------------------------------------- figure
def reliability_figure(summary: dict[str, Any], out_dir: Path) -> list[Path]:
    """Stated against observed: interval coverage, p(no contact), false-alarm p-values."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, axes2 = plt.subplots(2, 2, figsize=(12.5, 10))
    axes = [axes2[0, 0], axes2[1, 0], axes2[1, 1]]
    ax = axes2[0, 1]
    lv = summary["axisym"]["distance_coverage_by_level"] or {
        "0.95": summary["axisym"]["overall_ahead"]["distance_coverage"]}
    st = np.array([float(k) for k in lv])
    ob = np.array([lv[k]["rate"] for k in lv])
    lo = np.array([lv[k]["ci95"][0] for k in lv])
    hi = np.array([lv[k]["ci95"][1] for k in lv])
    ax.plot([0, 1], [0, 1], "k--", lw=0.8, label="calibrated")
    ax.fill_between([0.935, 0.965], 0.90, 0.98, color="tab:green", alpha=0.3,
                    label="goal at 95 %: 90-98 %")
    ax.errorbar(st, ob, yerr=[ob - lo, hi - ob], fmt="o-", capsize=3,
                label="observed, distance interval")
    for x_, y_, k in zip(st, ob, lv):
        ax.annotate(f"n={lv[k]['n']}", (x_, y_), textcoords="offset points", xytext=(5, -12),
                    fontsize=7)
    ax.set_xlim(0.45, 1.0)
    ax.set_ylim(min(0.4, float(np.nanmin(lo, initial=1.0)) - 0.05), 1.02)
    ax.set_xlabel("stated probability content of the interval")
    ax.set_ylabel("share holding the true distance")
    n_dr = summary["simulation"].get("extra_level_drives", 0)
    ax.set_title(f"(b) distance intervals at several levels, all distances\n(first {n_dr} "
                 "axisym contact drives, advances with a reported contact)", fontsize=10)
    ax.legend(fontsize=8, loc="upper left")
    ax = axes[0]
    b = summary["axisym"]["buckets"]
    x = np.arange(len(b))
    ax.axhspan(0.90, 0.98, color="tab:green", alpha=0.15, label="goal 90-98 %")
    ax.axhline(0.95, color="k", lw=0.8, ls="--", label="stated 95 %")
    for key, lab, dx, mk in (("distance_coverage", "distance interval", -0.12, "o"),
                             ("contrast_coverage", "contrast interval", 0.12, "s")):
        ys, lo, hi, xs, ns = [], [], [], [], []
        for i, q in enumerate(b):
            r = q.get(key)
            if r and r["n"]:
                xs.append(i + dx)
                ys.append(r["rate"])
                lo.append(r["rate"] - r["ci95"][0])
                hi.append(r["ci95"][1] - r["rate"])
                ns.append(r["n"])
        if xs:
            ax.errorbar(xs, ys, yerr=[lo, hi], fmt=mk, capsize=3, label=lab)

    def _n(r: dict[str, Any] | None) -> str:
        return str(r["n"]) if r else "-"

    ax.set_xticks(x, [f"{q['distance_D'][0]:g}-{q['distance_D'][1]:g} D\n"
                      f"n = {_n(q['distance_coverage'])} / {_n(q['contrast_coverage'])}"
                      for q in b])
    ax.set_xlabel("true distance ahead of the face (machine diameters); n = intervals "
                  "(distance / contrast)")
    ax.set_ylabel("share of stated intervals holding the truth")
    ax.set_ylim(0, 1.02)
    ax.set_title("(a) 95 % intervals, axisym drives\n(advances with a reported contact; "
                 "bars: 95 % binomial)", fontsize=10)
    ax.legend(fontsize=8, loc="lower left")

    ax = axes[1]
    rel = summary["reliability"]["p_no_contact"]
    if rel:
        xs = np.arange(len(rel))
        ys = [r["rate"] for r in rel]
        yerr = [[r["rate"] - r["ci95"][0] for r in rel], [r["ci95"][1] - r["rate"] for r in rel]]
        ax.errorbar(xs, ys, yerr=yerr, fmt="o", capsize=3, label="observed share (95 % binomial)")
        ax.plot(xs, [r["stated_mean"] for r in rel], "k_", ms=18, mew=2,
                label="stated (bin mean): calibrated if equal")
        ax.set_xticks(xs, [f"{r['stated_bin'][0]:.2g}-{r['stated_bin'][1]:.2g}\nn={r['n']}"
                           for r in rel], fontsize=7)
    ax.set_xlabel("stated p(no contact), bin\n(where the fit states a p-value of 'no contact', "
                  "not a probability, panel (d) is its check)")
    ax.set_ylabel("observed share with no contact ahead")
    ax.set_ylim(-0.02, 1.02)
    ax.set_title("(c) stated p(no contact), axisym and homogeneous advances before any "
                 f"contact is passed\n(the observed share depends on the mix: "
                 f"{summary['reliability']['share_no_contact']:.0%} without a contact ahead)",
                 fontsize=10)
    ax.legend(fontsize=8, loc="upper left")

    ax = axes[2]
    h = summary["homogeneous"]
    cal = h["p_value_calibration"]
    al = np.array([float(a) for a in cal])
    ys = np.array([cal[a]["rate"] for a in cal])
    lo = np.array([cal[a]["ci95"][0] for a in cal])
    hi = np.array([cal[a]["ci95"][1] for a in cal])
    ax.plot([1e-3, 1], [1e-3, 1], "k--", lw=0.8, label="calibrated")
    pos = ys > 0
    ax.errorbar(al[pos], ys[pos], yerr=[ys[pos] - np.maximum(lo[pos], 1e-4),
                                        hi[pos] - ys[pos]],
                fmt="o", capsize=3, label=f"observed ({h['p_value_field']})")
    if (~pos).any():
        ax.errorbar(al[~pos], hi[~pos], yerr=[hi[~pos] - 1e-4, 0 * hi[~pos]], fmt="v",
                    color="tab:red", capsize=3, label="none observed: 95 % upper bound")
    n_rep = next(iter(cal.values()))["n"]
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlim(5e-4, 1.2)
    ax.set_ylim(5e-5, 1.2)
    ax.set_xlabel("threshold alpha")
    ax.set_ylabel(f"share of the {n_rep} homogeneous reports with p <= alpha")
    fl = h["false_likely_or_firm_per_drive"]
    ff = h["false_firm_per_drive"]
    ax.set_title(f"(d) no-contact p-value on {h['drives']} homogeneous drives\n"
                 f"false 'likely'+: {fl['k']}/{fl['n']} drives, 'firm': {ff['k']}/{ff['n']}",
                 fontsize=10)
    ax.legend(fontsize=8, loc="upper left")
    fig.suptitle("Contact fit: stated against observed (simulated drives; an interpretation aid "
                 "- 'none seen' is not 'all clear')", fontsize=11)
    fig.tight_layout()
    paths = []
    for ext in ("png", "svg"):
        p = out_dir / f"calibration.{ext}"
        with atomic_path(p) as tmp:
            fig.savefig(tmp, format=ext, dpi=130)
        paths.append(p)
    plt.close(fig)
    return paths


# ----------------------------------------------------------------------- report
def _goal(rate: float, lo: float, hi: float) -> str:
    if not math.isfinite(rate):
        return "n/a"
    return "met" if lo <= rate <= hi else "NOT met"


def _fmt(r: dict[str, Any] | None) -> str:
    if not r or not r["n"]:
        return "     -      "
    return f"{r['rate']:6.1%} ({r['k']}/{r['n']})"


def print_table(summary: dict[str, Any]) -> None:
    """The summary as a table on stdout."""
    if summary["axisym"]:
        _print_contact(summary["axisym"])
    h = summary["homogeneous"]
    if h:
        _print_homogeneous(h)
    for rec in summary["drives_3d"]:
        w = rec.get("within_2D")
        if w:
            print(f"3D {rec['drive']}: within 2 D {w['advances']} advances, found {w['found']}, "
                  f"distance holds {w['distance_holds']}, contrast holds "
                  f"{w['contrast_holds'] if w['contrast_interval_available'] else 'n/a'}, "
                  f"levels {rec['levels']}")
        else:
            print(f"3D {rec['drive']}: highest level {rec['highest_level']}, "
                  f"false found in {rec['false_found_advances']} of {rec['advances']} advances")
    for n in summary["notes"]:
        print("note:", n)


def _print_contact(a: dict[str, Any]) -> None:
    print("\nCoverage of the stated 95 % intervals, axisym contact drives (advances with a "
          "reported contact)")
    print(f"{'bucket':>10} {'advances':>8} {'detected':>18} {'distance cov.':>18} "
          f"{'contrast cov.':>18} {'med |err| m':>11} {'goal':>8} {'likely+':>7} "
          f"{'at bound':>8}")
    for q in a["buckets"]:
        dc = q["distance_coverage"]
        lv = q["levels"]
        high = (lv["likely"]["k"] + lv["firm"]["k"]) / max(q["advances"], 1)
        print(f"{q['distance_D'][0]:>4g}-{q['distance_D'][1]:<4g}D {q['advances']:>8} "
              f"{_fmt(q['detected']):>18} {_fmt(dc):>18} {_fmt(q['contrast_coverage']):>18} "
              f"{q['median_abs_distance_error_m']:>11.2f} "
              f"{_goal(dc['rate'], 0.90, 0.98) if dc['n'] >= MIN_N else 'few':>8} "
              f"{high:>7.1%} {q['at_bound']['rate']:>8.1%}")
    fp = a["face_passed"]
    print(f"face passed the contact: {fp['advances']} advances, found {_fmt(fp['found'])}, "
          f"distance interval holds {_fmt(fp['distance_coverage'])}, still reported ahead "
          f"{_fmt(fp['reported_ahead_of_face'])}")
    print("coverage by stated level (all distances): " + ", ".join(
        f"{k}: {_fmt(v).strip()}" for k, v in a["distance_coverage_by_level"].items()))


def _print_homogeneous(h: dict[str, Any]) -> None:
    print(f"\nHomogeneous drives: {h['drives']} drives, {h['advances']} reports")
    for key, goal in (("false_likely_or_firm_per_drive", 0.02), ("false_firm_per_drive", 0.005),
                      ("false_likely_or_firm_per_advance", 0.02),
                      ("false_firm_per_advance", 0.005)):
        r = h[key]
        print(f"  {key:<36} {_fmt(r):>20}  95 % CI {r['ci95'][0]:.3f}-{r['ci95'][1]:.3f}  "
              f"goal <= {goal:.1%}: {_goal(r['rate'], 0.0, goal)}")


def verdict(summary: dict[str, Any]) -> dict[str, str]:
    """Each goal: "met", "NOT met" or "n/a" (no data)."""
    out: dict[str, str] = {}
    if summary["axisym"]:
        for q in summary["axisym"]["buckets"]:
            tag = f"{q['distance_D'][0]:g}-{q['distance_D'][1]:g}D"
            for key in ("distance_coverage", "contrast_coverage"):
                r = q.get(key)
                n = r["n"] if r else 0
                out[f"{key} {tag}"] = (_goal(r["rate"], 0.90, 0.98) if n >= MIN_N
                                       else f"n/a: {n} intervals")
    h = summary["homogeneous"]
    if h:
        for key, goal in (("false_likely_or_firm_per_drive", 0.02),
                          ("false_firm_per_drive", 0.005),
                          ("false_likely_or_firm_per_advance", 0.02),
                          ("false_firm_per_advance", 0.005)):
            out[key] = _goal(h[key]["rate"], 0.0, goal)
    return out


def clean_json(obj: Any) -> Any:
    """Plain JSON values: numpy scalars to Python, NaN and infinities to null."""
    if isinstance(obj, dict):
        return {str(k): clean_json(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [clean_json(v) for v in obj]
    if isinstance(obj, (np.floating, float)):
        return float(obj) if math.isfinite(obj) else None
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, np.bool_):
        return bool(obj)
    return obj
