"""Benchmark: read + check + QC of a large readings log (throughput and peak memory).

Usage::

    python bench/bench_readings.py [--rows 1000000] [--bad-every 1000]

Writes ``bench/results/readings.json``. Each stage runs in a fresh Python process so that its
peak resident memory (``ru_maxrss``) is its own; the baseline is the same process after the
imports, before reading. The log is invented: the demo layout's protocol repeated over
advances, with one bad row every ``--bad-every`` rows (negative current, text in a number or an
unknown label, in turn) and every quadrupole read with its reciprocal.

Stages: ``read`` (the CSV file), ``read_frame`` (the same log handed over as a pandas DataFrame
already in memory; its peak includes the frame), ``read_qc``, ``prepare`` (read, QC and the
per-advance data, :func:`tbminv.readings.advance.prepare_advances`) and ``run_check`` (with the
summary files and the figure).
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))


def make_log(path: Path, rows: int, bad_every: int, seed: int = 0) -> dict[str, int]:
    """Write an invented log of ``rows`` readings; return counts of what was put in."""
    import numpy as np

    from tbminv.layout import demo_layout_path, load_layout

    layout = load_layout(demo_layout_path())
    quads = []
    for q in layout.measurements:
        quads.append((q.a, q.b or "", q.m, q.n or ""))
        quads.append((q.m, q.n or "", q.a, q.b or ""))  # its reciprocal
    per = len(quads)
    rng = np.random.default_rng(seed)
    r_true = np.repeat(10 ** rng.uniform(-2, 1, per // 2), 2)  # a quadrupole and its reciprocal
    bad = 0
    with open(path, "w", encoding="utf-8", newline="\n") as fh:
        fh.write("advance,face_chainage_m,a,b,m,n,current_a,voltage_v,time,cutterhead_deg,"
                 "stack_n,voltage_std_v,contact_ohm_a,contact_ohm_m\n")
        block = 100_000
        for start in range(0, rows, block):
            idx = np.arange(start, min(rows, start + block))
            k = idx % per
            adv = idx // per + 1
            cur = rng.uniform(0.2, 1.0, len(idx))
            r = r_true[k] * (1 + rng.normal(0, 0.01, len(idx)))
            volt = r * cur
            lines = []
            for j, i in enumerate(idx.tolist()):
                a, b, m, n = quads[k[j]]
                c = f"{cur[j]:.5f}"
                lab = m
                v = f"{volt[j]:.6g}"
                if bad_every and i % bad_every == bad_every - 1:
                    bad += 1
                    kind = (i // bad_every) % 3
                    if kind == 0:
                        c = "-" + c
                    elif kind == 1:
                        v = "n/a"
                    else:
                        lab = "X9"
                sec = i % 86400
                lines.append(f"{adv[j]},{1000.0 + 0.6 * adv[j] + 1e-5 * k[j]:.5f},{a},{b},{lab},"
                             f"{n},{c},{v},2026-12-01T{sec // 3600:02d}:{sec // 60 % 60:02d}:"
                             f"{sec % 60:02d}Z,{(7 * i) % 360},4,1e-06,1500,2100\n")
            fh.write("".join(lines))
    return {"rows": rows, "bad_rows": bad, "protocol_per_advance": per}


def _maxrss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # Linux: kB


def run_stage(stage: str, log: Path, out: Path) -> dict[str, float]:
    """One stage in this process; returns timings and peak memory."""
    import pandas as pd

    from tbminv.jobs import run_check
    from tbminv.layout import demo_layout_path, load_layout
    from tbminv.readings.advance import prepare_advances
    from tbminv.readings.qc import QCSettings, run_qc
    from tbminv.readings.reader import read_readings

    layout = load_layout(demo_layout_path())
    frame = pd.read_csv(log) if stage == "read_frame" else None   # held in memory beforehand
    base = _maxrss_mb()
    res: dict[str, float] = {"baseline_rss_mb": base}
    t0 = time.perf_counter()
    settings = QCSettings(error_model_group="advance", fallback_a_ohm=1e-4, fallback_b=0.02)
    if stage in ("read", "read_frame"):
        r = read_readings(log if frame is None else frame, layout)
        res["rows_read"] = r.summary.rows_read
        res["rows_quarantined"] = r.summary.rows_quarantined
    elif stage == "prepare":
        prep = prepare_advances(log, layout, settings)
        res["rows_read"] = prep.readings.summary.rows_read
        res["valid"] = int(prep.qc.table["valid"].sum())
        res["advances"] = len(prep.advances)
    elif stage == "read_qc":
        r = read_readings(log, layout)
        t1 = time.perf_counter()
        qc = run_qc(r, settings)
        res["read_s"] = t1 - t0
        res["qc_s"] = time.perf_counter() - t1
        res["rows_read"] = r.summary.rows_read
        res["valid"] = int(qc.table["valid"].sum())
        res["pairs"] = len(qc.pairs)
    elif stage == "run_check":
        # the reading and QC path; the sign check's forward runs are not this benchmark's
        c = run_check(log, layout, out, settings, sign_check=False)
        res["rows_read"] = c.n_read
        res["valid"] = c.n_valid
    else:
        raise SystemExit(f"unknown stage {stage}")
    res["seconds"] = time.perf_counter() - t0
    res["rows_per_s"] = res["rows_read"] / res["seconds"]
    res["peak_rss_mb"] = _maxrss_mb()
    return res


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--bad-every", type=int, default=1000)
    ap.add_argument("--stage", help=argparse.SUPPRESS)
    ap.add_argument("--log", help=argparse.SUPPRESS)
    ap.add_argument("--out", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.stage:
        print(json.dumps(run_stage(args.stage, Path(args.log), Path(args.out))))
        return
    results: dict[str, object] = {
        "python": platform.python_version(), "machine": platform.machine(),
        "cpus": os.cpu_count(),
        "load_average_1min_at_start": os.getloadavg()[0],   # other work on the machine
        "target": ">= 1e5 rows/s for read + check of a 1-million-row log (2 cores)",
    }
    with tempfile.TemporaryDirectory(prefix="tbminv-bench-") as tmp:
        sizes = sorted({min(args.rows, 100_000), args.rows})
        runs = []
        for rows in sizes:
            log = Path(tmp) / f"log_{rows}.csv"
            t0 = time.perf_counter()
            made = make_log(log, rows, args.bad_every)
            entry: dict[str, object] = {"rows": rows, "file_mb": log.stat().st_size / 2**20,
                                        "generate_s": time.perf_counter() - t0, **made}
            for stage in ("read", "read_frame", "read_qc", "prepare", "run_check"):
                proc = subprocess.run(
                    [sys.executable, __file__, "--stage", stage, "--log", str(log), "--out",
                     str(Path(tmp) / f"out_{rows}_{stage}")],
                    capture_output=True, text=True, check=True)
                entry[stage] = json.loads(proc.stdout.strip().splitlines()[-1])
            runs.append(entry)
            log.unlink()
        results["runs"] = runs
    out = HERE / "results" / "readings.json"
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(json.dumps(results, indent=2) + "\n")
    print(json.dumps(results, indent=2))


if __name__ == "__main__":
    main()
