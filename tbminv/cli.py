"""The ``tbminv`` command line: parses arguments and calls the library (nothing else).

Commands (the README lists them; DEVELOPERS.md the file formats)::

    tbminv simulate --layout L.toml --ground G.toml --faces START:STOP:STEP --out readings.csv
                    [--model axisym|3d|section] [--noise-rel R] [--noise-abs V] [--seed N]
                    [--cutterhead-angles START:STOP:STEP]
    tbminv check READINGS --layout L.toml --out DIR [--settings S.toml]
    tbminv invert READINGS --layout L.toml --store STORE.nc [--settings S.toml] [--cold]
                    [--scheduler ADDRESS] [--probes PROBES.csv]
    tbminv reach --layout L.toml --out DIR [--contrast C] [--noise-rel R] [--noise-abs V]
                 [--false-alarm P] [--detection-probability P] [--sweep SWEEP.toml]
                 [--scheduler ADDRESS]
    tbminv report STORE.nc --out DIR [--settings S.toml] [--materials TABLE] [--shift LABEL]
                  [--probes PROBES.csv]
    tbminv demo --out DIR
    tbminv env                      # environment report for bug reports

Exit codes: 0 success, 1 the job ran but found nothing usable, 2 bad input (one line naming the
file, row or field), 3 (``invert``) partial: images stored, a post-processing step failed.
"""

from __future__ import annotations

import argparse
import logging
import sys
from collections.abc import Callable, Sequence
from pathlib import Path

import numpy as np

from tbminv import environment_report
from tbminv.demo import run_demo
from tbminv.forward.registry import MODEL_NAMES, MODEL_SETTINGS_CHOICES
from tbminv.ground import NotAxisymmetricError, ScenarioError, load_scenario
from tbminv.inversion.outcome import SectionError
from tbminv.inversion.settings import InversionError, load_settings
from tbminv.jobs import invert_job, reach_job, report_job, run_check
from tbminv.layout import LayoutError, load_layout
from tbminv.materials import MaterialTableError
from tbminv.readings.probes import ProbeLogError
from tbminv.readings.qc import QCError
from tbminv.readings.reader import ReadingsError
from tbminv.results.ahead import AheadSettingsError
from tbminv.studies.simulate import simulate_drive, write_readings

_LOG = logging.getLogger(__name__)


class CLIError(Exception):
    """A command-line problem reported to the user without a traceback (exit code 2)."""


def _number(kind: str) -> Callable[[str], float]:
    """An argparse type: a finite float of the given kind.

    ``positive`` (> 0), ``non-negative`` (>= 0) or ``probability`` (strictly between 0 and 1).
    """

    def parse(text: str) -> float:
        try:
            value = float(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
        if kind == "probability":
            ok = bool(0.0 < value < 1.0)
        else:
            ok = np.isfinite(value) and (value > 0 if kind == "positive" else value >= 0)
        if not ok:
            raise argparse.ArgumentTypeError(f"{text!r}: expected a {kind} number")
        return value

    parse.__name__ = f"{kind} number"
    return parse


POSITIVE = _number("positive")
NON_NEGATIVE = _number("non-negative")
PROBABILITY = _number("probability")


def parse_range(text: str, option: str = "--faces", unit: str = "metres",
                example: str = "1200:1236:1.5") -> np.ndarray:
    """Parse ``START:STOP:STEP``, STOP included when on the step grid.

    Also accepts a single value or a comma-separated list.

    Parameters
    ----------
    text : str
        The option's value.
    option, unit, example : str
        For the error message.

    Raises
    ------
    CLIError
        If the text is not of that form or the step does not move from START towards STOP.
    """
    try:
        if ":" in text:
            parts = [float(p) for p in text.split(":")]
            if len(parts) != 3 or not np.all(np.isfinite(parts)):
                raise ValueError
            start, stop, step = parts
            if step == 0 or (stop - start) * step < 0:
                raise CLIError(f"{option} {text}: STEP must move from START towards STOP")
            n = int(np.floor((stop - start) / step + 1e-9)) + 1
            return start + step * np.arange(n)
        vals = np.array([float(p) for p in text.split(",")])
        if not np.all(np.isfinite(vals)):
            raise ValueError
        return vals
    except ValueError:
        raise CLIError(f"{option} {text!r}: expected START:STOP:STEP in {unit} "
                       f"(e.g. {example}) or a comma-separated list") from None


def parse_faces(text: str) -> np.ndarray:
    """Parse ``--faces START:STOP:STEP`` face chainages, m (see :func:`parse_range`)."""
    return parse_range(text)


def parse_angles(text: str) -> np.ndarray:
    """Parse ``--cutterhead-angles START:STOP:STEP``, degrees (see :func:`parse_range`)."""
    return parse_range(text, "--cutterhead-angles", "degrees", "0:315:45")




def cmd_simulate(args: argparse.Namespace) -> int:
    """Run ``tbminv simulate``."""
    layout = load_layout(args.layout)
    scenario = load_scenario(args.ground)
    faces = parse_faces(args.faces)
    angles = None if args.cutterhead_angles is None else parse_angles(args.cutterhead_angles)
    df = simulate_drive(layout, scenario, faces, model=args.model,
                            noise_rel=args.noise_rel, noise_abs_v=args.noise_abs, seed=args.seed,
                            cutterhead_angles_deg=angles)
    out = write_readings(df, args.out)
    turn = "" if angles is None else f" at {len(angles)} cutterhead angles each"
    print(f"simulated {len(faces)} advances{turn}, {len(df)} readings ({args.model} model) "
          f"-> {out}")
    return 0


def cmd_check(args: argparse.Namespace) -> int:
    """Run ``tbminv check``."""
    layout = load_layout(args.layout)
    inversion, qc = load_settings(args.settings)   # [invert]: the floor shown in the flags
    result = run_check(args.readings, layout, args.out, qc,
                       model_error_floor=inversion.model_error_floor,
                       forward_settings=inversion.forward_settings)
    for line in result.describe():
        print(line)
    return 0 if result.usable else 1


def cmd_invert(args: argparse.Namespace) -> int:
    """Run ``tbminv invert``."""
    return invert_job(args.readings, args.layout, args.store, settings_path=args.settings,
                      cold=args.cold, scheduler=args.scheduler, echo=print,
                      probes_path=args.probes)


def cmd_reach(args: argparse.Namespace) -> int:
    """Run ``tbminv reach``."""
    return reach_job(args.layout, args.out, contrast=args.contrast, noise_rel=args.noise_rel,
                     noise_abs_v=args.noise_abs, k=args.k, model=args.model,
                     model_settings=args.model_settings, target=args.target,
                     sweep_path=args.sweep, workers=args.workers, scheduler=args.scheduler,
                     false_alarm=args.false_alarm,
                     detection_probability=args.detection_probability, echo=print)


def cmd_report(args: argparse.Namespace) -> int:
    """Run ``tbminv report``."""
    return report_job(args.store, args.out, settings_path=args.settings,
                      materials_path=args.materials, shift=args.shift, echo=print,
                      probes_path=args.probes)


def cmd_demo(args: argparse.Namespace) -> int:
    """Run ``tbminv demo``: the whole chain on the bundled demo drive."""
    return run_demo(Path(args.out), echo=print)


def cmd_env(args: argparse.Namespace) -> int:
    """Print the environment report."""
    print(environment_report())
    return 0


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of the ``tbminv`` command."""
    p = argparse.ArgumentParser(
        prog="tbminv",
        description="Electrical-resistivity look-ahead for tunnel boring machines. "
                    "An interpretation aid: probing, site investigation and licensed engineers "
                    "decide; local codes rule.")
    p.add_argument("-v", "--verbose", action="count", default=0,
                   help="more log output (-v info, -vv debug)")
    sub = p.add_subparsers(dest="command", required=True)

    s = sub.add_parser("simulate", help="synthetic readings log of a drive")
    s.add_argument("--layout", required=True, help="layout file (TOML)")
    s.add_argument("--ground", required=True, help="ground scenario file (TOML)")
    s.add_argument("--faces", required=True, help="face chainages START:STOP:STEP, m (inclusive)")
    s.add_argument("--out", required=True, help="readings log to write (CSV or .parquet)")
    s.add_argument("--model", default="axisym", choices=MODEL_NAMES,
                   help="forward model (default axisym; 3d for any scenario)")
    s.add_argument("--noise-rel", type=NON_NEGATIVE, default=0.0,
                   help="relative noise (fraction)")
    s.add_argument("--noise-abs", type=NON_NEGATIVE, default=0.0,
                   help="absolute voltage noise, V")
    s.add_argument("--seed", type=int, default=None, help="random seed for the noise")
    s.add_argument("--cutterhead-angles", default=None, metavar="START:STOP:STEP",
                   help="cutterhead angles, degrees (STOP included): every reading of every "
                        "advance is simulated at each, and logs its cutterhead_deg "
                        "(default: one reading per quadrupole at 0 degrees)")
    s.set_defaults(func=cmd_simulate)

    c = sub.add_parser("check", help="screen a readings log: quarantine, QC, error model")
    c.add_argument("readings", help="readings log (CSV or Parquet)")
    c.add_argument("--layout", required=True, help="layout file (TOML)")
    c.add_argument("--out", required=True, help="output folder")
    c.add_argument("--settings", default=None,
                   help="settings file (TOML) with a [qc] table (thresholds, fallback error)")
    c.set_defaults(func=cmd_check)

    i = sub.add_parser(
        "invert", help="invert every advance into the moving section store",
        formatter_class=argparse.RawDescriptionHelpFormatter,
        description="Invert every advance of a readings log and append them to the section "
                    "store as one shift.",
        epilog="Each advance's image is journaled beside the store (STORE.journal/) as soon as "
               "it is done;\nafter a crash or a kill, the same command resumes where it "
               "stopped.\nAppending to a store continues its drive: advances it holds are "
               "skipped, the first new\nadvance starts from its last model and the contact "
               "fit uses its advances' readings.\nEvery reading is modelled at its own logged "
               "cutterhead_deg (readings without a turning\ncutterhead electrode are stacked "
               "over the angles).\n\n"
               "exit codes:\n"
               "  0  success\n"
               "  2  bad input (one line naming the file, row or field); nothing is stored\n"
               "  3  partial: images stored, a post-processing step failed (contact fit, depth "
               "of\n     investigation or resampling); the store's postprocess_flag says "
               "which advances")
    i.add_argument("readings", help="readings log (CSV or Parquet)")
    i.add_argument("--layout", required=True, help="layout file (TOML)")
    i.add_argument("--store", required=True, help="section store (NetCDF) to create or append")
    i.add_argument("--settings", default=None, help="settings file (TOML)")
    i.add_argument("--cold", action="store_true", help="cold-start every advance")
    i.add_argument("--scheduler", default=None,
                   help="dask scheduler address: run the cold-started advances (--cold) on its "
                        "workers")
    i.add_argument("--probes", default=None,
                   help="probe log (CSV): probed contacts constrain the contact fit; a probe "
                        "that contradicts the readings is flagged, not applied")
    i.set_defaults(func=cmd_invert)

    r = sub.add_parser("reach", help="how far ahead a layout sees a contrast")
    r.add_argument("--layout", required=True, help="layout file (TOML)")
    r.add_argument("--out", required=True, help="output folder")
    r.add_argument("--contrast", type=POSITIVE, default=10.0,
                   help="resistivity beyond / around (default 10)")
    r.add_argument("--noise-rel", type=NON_NEGATIVE, default=0.02,
                   help="relative noise (fraction)")
    r.add_argument("--noise-abs", type=NON_NEGATIVE, default=0.0, help="absolute noise, V")
    r.add_argument("--sweep", default=None, help="sweep file (TOML)")
    r.add_argument("--model", default="axisym", choices=MODEL_NAMES,
                   help="forward model (default axisym)")
    r.add_argument("--model-settings", default="fast", choices=MODEL_SETTINGS_CHOICES,
                   help="axisym accuracy/speed preset (default fast: within 1 %% of standard)")
    r.add_argument("--k", type=POSITIVE, default=3.0,
                   help="detection threshold of one reading in standard deviations (default 3; "
                        "also sets the whole-set false-alarm probability 2 Phi(-k))")
    r.add_argument("--false-alarm", type=PROBABILITY, default=None,
                   help="false-alarm probability of the whole-set reach reach_m "
                        "(default: 2 Phi(-k), 0.27 %% for k = 3)")
    r.add_argument("--detection-probability", type=PROBABILITY, default=0.5,
                   help="detection probability at reach_m (default 0.5)")
    r.add_argument("--target", default="contact", choices=("contact", "sphere"),
                   help="what approaches the face (default: a contact square to the axis)")
    r.add_argument("--workers", type=int, default=None,
                   help="workers of the local dask cluster for sweeps (default: CPU count)")
    r.add_argument("--scheduler", default=None, help="dask scheduler address")
    r.set_defaults(func=cmd_reach)

    rp = sub.add_parser("report", help="shift report from a section store")
    rp.add_argument("store", help="section store (NetCDF)")
    rp.add_argument("--out", required=True, help="output folder")
    rp.add_argument("--settings", default=None,
                    help="settings file (TOML) whose [ahead] table sets the levels of concern")
    rp.add_argument("--materials", default=None,
                    help="site-calibrated material table (TOML or CSV) instead of the handbook "
                         "table")
    rp.add_argument("--shift", default=None,
                    help="shift to report (default: the shift of the last advance)")
    rp.add_argument("--probes", default=None,
                    help="probe log (CSV): drawn on the figures, listed, checked against the "
                         "contact fit, and (without --materials) the site material table")
    rp.set_defaults(func=cmd_report)

    d = sub.add_parser("demo", help="run the whole chain on the bundled demo drive")
    d.add_argument("--out", required=True, help="output folder")
    d.set_defaults(func=cmd_demo)

    e = sub.add_parser("env", help="environment report for bug reports")
    e.set_defaults(func=cmd_env)
    return p


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``tbminv`` console script.

    Parameters
    ----------
    argv : sequence of str, optional
        Arguments (default: ``sys.argv[1:]``).

    Returns
    -------
    int
        Exit code.
    """
    parser = build_parser()
    args = parser.parse_args(argv)
    level = (logging.WARNING, logging.INFO, logging.DEBUG)[min(args.verbose, 2)]
    logging.basicConfig(level=level, format="%(levelname)s %(name)s: %(message)s")
    logging.getLogger("tbminv").setLevel(level)
    func: Callable[[argparse.Namespace], int] = args.func
    expected = (CLIError, LayoutError, ScenarioError, NotAxisymmetricError, FileNotFoundError,
                ReadingsError, QCError, SectionError, InversionError, AheadSettingsError,
                MaterialTableError, ProbeLogError)
    try:
        return func(args)
    except expected as exc:
        print(f"tbminv {args.command}: error: {exc}", file=sys.stderr)
        return 2


if __name__ == "__main__":
    raise SystemExit(main())
