"""The ``rim-invert`` command line: parses arguments and calls the library, nothing more.

Bad input ends with exit code 2 and one line on stderr naming the file, row or column and the
problem; outputs are staged and moved into place only when complete.
"""

from __future__ import annotations

import argparse
import sys
import warnings
from pathlib import Path

import numpy as np

from ._validation import check_level
from .errors import InputError

EXIT_BAD_INPUT = 2
#: Exit code when the operating system refused a read or write (disk full, permissions).
EXIT_SYSTEM = 1


class _Parser(argparse.ArgumentParser):
    def error(self, message):
        self.print_usage(sys.stderr)
        print(f"rim-invert: error: {message}", file=sys.stderr)
        sys.exit(EXIT_BAD_INPUT)


def _positive(name):
    def conv(text):
        try:
            v = float(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{name} must be a number, got {text!r}") from None
        if not (np.isfinite(v) and v > 0):
            raise argparse.ArgumentTypeError(f"{name} must be > 0, got {text!r}")
        return v

    return conv


def _add_fit_options(p):
    p.add_argument("--method", default="tikhonov", choices=_methods(),
                   help="inference stage (default: tikhonov)")
    p.add_argument("--rule", default="evidence",
                   help="tikhonov parameter choice: evidence, gcv, loo, lcurve, discrepancy, "
                        "upre (default: evidence)")
    p.add_argument("--query", type=Path, help="POINTS.csv: x,y[,label] to report")
    p.add_argument("--level", type=float, default=0.9,
                   help="probability of the central intervals (default: 0.9)")
    p.add_argument("--seed", type=int, default=0, help="random seed (default: 0)")
    p.add_argument("--smoothness", type=float, default=2.0,
                   help="smoothness order s of the prior (default: 2)")
    p.add_argument("--n-modes", type=int, default=None,
                   help="truncation degree (default: chosen from the smoothness)")
    p.add_argument("--lam", type=_positive("--lam"), default=None,
                   help="fix the regularisation parameter (with --noise-sd when readings "
                        "carry no sigma), e.g. from an earlier summary.json")
    p.add_argument("--noise-sd", type=_positive("--noise-sd"), default=None,
                   help="fix the common noise sd instead of estimating it (with --lam)")
    p.add_argument("--grid", type=int, default=81, help="interior grid size (default: 81)")
    p.add_argument("--fix-smoothness", action="store_true",
                   help="gaussian/mcmc: hold s at --smoothness instead of estimating it")
    p.add_argument("--faulty", action="store_true",
                   help="mcmc: model each reading as good or faulty; report fault probabilities")
    p.add_argument("--angle-sd", type=_positive("--angle-sd"), default=None, metavar="DEG",
                   help="mcmc: sd (degrees) of each sensor's angle error, integrated over")
    p.add_argument("--max-steps", type=int, default=20000,
                   help="mcmc: step cap per ensemble (default: 20000)")
    _add_report_options(p)


def _add_report_options(p, threshold=None, unit="", length_unit=""):
    p.add_argument("--threshold", type=float, default=threshold,
                   help="report the probability that the value exceeds this, as a map and "
                        f"anywhere in the region (default: {threshold})")
    p.add_argument("--unit", default=unit, help=f"unit of the values (default: {unit!r})")
    p.add_argument("--length-unit", default=length_unit,
                   help=f"unit of the coordinates and radius (default: {length_unit!r})")


def _methods():
    from .stages.registry import stage_names

    return list(stage_names())


def _domains():
    from .geometry import domain_names

    return list(domain_names())


def build_parser():
    """Build the argument parser (exposed for documentation and tests)."""
    parser = _Parser(prog="rim-invert",
                     description="Estimate a harmonic field in a disk or ball from rim and "
                                 "interior sensor readings, with calibrated uncertainty.")
    sub = parser.add_subparsers(dest="command", required=True, parser_class=_Parser)

    p = sub.add_parser("fit", help="fit one snapshot of readings")
    p.add_argument("readings", type=Path, help="READINGS.csv: x,y,value[,sigma][,sensor]")
    p.add_argument("--radius", type=_positive("--radius"), required=True)
    p.add_argument("--out", type=Path, required=True, help="output folder")
    p.add_argument("--center", type=float, nargs="+", metavar="C", default=None,
                   help="centre: X Y for a disk, X Y Z for a ball (default: the origin)")
    p.add_argument("--domain", default="disk", choices=_domains(),
                   help="region: disk (readings x,y) or ball (readings x,y,z; boundary.csv on "
                        "a latitude/longitude grid) (default: disk)")
    _add_fit_options(p)

    p = sub.add_parser("demo", help="run the main job on the bundled synthetic demo data")
    p.add_argument("--out", type=Path, default=Path("demo-output"))
    p.add_argument("--method", default="tikhonov", choices=_methods())
    p.add_argument("--seed", type=int, default=0)
    _add_report_options(p, threshold=95.0, unit="°C", length_unit="m")

    p = sub.add_parser("advise", help="rank new sensor positions and failed sensors to repair")
    p.add_argument("readings", type=Path, help="READINGS.csv: x,y,value[,sigma][,sensor]")
    p.add_argument("--radius", type=_positive("--radius"), required=True)
    p.add_argument("--out", type=Path, required=True, help="output folder")
    p.add_argument("--center", type=float, nargs=2, metavar=("X", "Y"), default=None)
    p.add_argument("--count", type=int, default=5, help="new sensors to choose (default: 5)")
    p.add_argument("--candidates", type=Path,
                   help="POINTS.csv of candidate positions (default: every degree on the rim "
                        "and rings at 1/4, 1/2, 3/4 of the radius)")
    p.add_argument("--query", type=Path,
                   help="POINTS.csv: reduce the variance at these points instead of over the disk")
    p.add_argument("--min-spacing", type=float, default=None,
                   help="minimum angle between new sensors, degrees (default: half the sensor "
                        "spacing)")
    p.add_argument("--method", default="tikhonov", choices=_methods())
    p.add_argument("--smoothness", type=float, default=2.0)
    p.add_argument("--seed", type=int, default=0)

    _add_batch_parser(sub)
    return parser


def _add_batch_parser(sub):
    p = sub.add_parser("batch", help="reanalyse a log of frames (per frame or Kalman smoothing)")
    p.add_argument("log", type=Path, help="LOG.csv or LOG.parquet: time + one column per sensor")
    p.add_argument("--layout", type=Path, required=True, help="LAYOUT.csv: sensor,x,y[,sigma]")
    p.add_argument("--radius", type=_positive("--radius"), required=True)
    p.add_argument("--out", type=Path, required=True, help="output folder")
    p.add_argument("--center", type=float, nargs=2, metavar=("X", "Y"), default=None)
    p.add_argument("--query", type=Path, help="POINTS.csv: x,y[,label] (default: the centre)")
    p.add_argument("--assimilate", action="store_true",
                   help="Kalman filter + RTS smoother over time instead of per-frame fits")
    p.add_argument("--engine", default="local", choices=["local", "dask"])
    p.add_argument("--scheduler", default=None, help="address of an existing dask scheduler")
    p.add_argument("--format", default="parquet", choices=["csv", "parquet"], dest="fmt")
    p.add_argument("--resume", action="store_true", help="continue an interrupted run in --out")
    p.add_argument("--lam", type=_positive("--lam"), default=None,
                   help="fixed regularisation parameter (e.g. from a fit's summary.json)")
    p.add_argument("--noise-sd", type=_positive("--noise-sd"), default=None,
                   help="fixed common noise sd (with --lam, when the layout has no sigma)")
    p.add_argument("--calibrate", action="store_true",
                   help="estimate lam (and the noise sd) once on the log (default without --lam)")
    p.add_argument("--time-scale", type=_positive("--time-scale"), default=None,
                   help="fix the time scale of the dynamics (default: maximum likelihood)")
    p.add_argument("--level", type=float, default=0.9)
    p.add_argument("--smoothness", type=float, default=2.0)
    p.add_argument("--n-modes", type=int, default=None)
    p.add_argument("--chunk-rows", type=int, default=65536, help="frames per chunk")
    p.add_argument("--max-transient", type=int, default=50,
                   help="assimilation: exact Kalman steps after a change of drop-out pattern or "
                        "time step before the steady-state gain is used; 0 = exact throughout "
                        "(default: 50)")


def _fit_options(args):
    opts = {}
    if getattr(args, "method", "tikhonov") in ("gaussian", "mcmc"):
        if args.lam is not None or args.noise_sd is not None:
            raise ValueError("--lam and --noise-sd belong to --method tikhonov")
        if args.fix_smoothness:
            opts["fix_s"] = True
        if args.method == "mcmc":
            if args.max_steps < 1:
                raise ValueError(f"--max-steps must be >= 1, got {args.max_steps}")
            opts.update(faulty=args.faulty, angle_sd_deg=args.angle_sd,
                        max_steps=args.max_steps)
        elif args.faulty or args.angle_sd is not None:
            raise ValueError("--faulty and --angle-sd belong to --method mcmc")
        return opts
    if args.lam is not None:
        opts.update(rule="fixed", lam=args.lam, noise_sd=args.noise_sd)
    elif args.noise_sd is not None:
        raise ValueError("--noise-sd goes with --lam (both fixed, e.g. from a batch summary)")
    else:
        opts.update(rule=args.rule)
    return opts


def run_fit(readings_path, *, radius, out, center=None, method="tikhonov", query=None,
            level=0.9, seed=0, smoothness=2.0, n_modes=None, grid=81, figures=False,
            stage_options=None, say=print, threshold=None, unit="", length_unit="",
            domain="disk"):
    """Run ``fit`` end to end: load, check, fit, write. Returns the summary dict.

    ``domain`` is a name in :data:`invert.geometry.DOMAINS`; readings, ``center`` and query
    points have that domain's ``dim`` coordinates (``"ball"``: x, y, z).
    """
    from . import workflow
    from .io.readings import check_inside, load_points, load_readings
    from .problem import LinearProblem
    from .report.files import staged_output, write_fit_outputs

    level = check_level(level)
    from .geometry import domain_class

    dim = domain_class(domain).dim
    if center is not None and len(center) != dim:
        raise ValueError(f"--center needs {dim} numbers for a {domain}, got {len(center)}")
    readings = load_readings(readings_path, dim=dim, center=center)
    domain = workflow.make_domain(radius, center, kind=domain, s=smoothness, n_modes=n_modes)
    workflow.check_memory(domain, grid=grid, n_readings=readings.observed.sum(),
                          given_modes=n_modes is not None)
    problem = LinearProblem.from_readings(readings, domain)
    q = None
    if query is not None:
        pts, labels, rows = load_points(query, dim=dim)
        check_inside(domain, pts, rows, Path(query).name)
        q = (pts, labels)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            estimate = workflow.run_stage(problem, method, s=smoothness, seed=seed,
                                          **(stage_options or {}))
        except ValueError as exc:  # e.g. too few readings: name the file they came from
            raise InputError(readings.source, str(exc).splitlines()[0]) from None
    estimate, diag = _diagnose(estimate, problem, level, threshold, seed, q)
    with staged_output(out) as stage:
        summary = write_fit_outputs(stage, estimate, problem, readings, level=level, query=q,
                                    grid=grid, summary_extra={"seed": seed, "unit": unit,
                                                              "length_unit": length_unit,
                                                              "diagnostics": diag.to_dict()})
        if figures:
            from .report.html import write_report

            write_report(stage, estimate, problem, readings, level=level, unit=unit,
                         length_unit=length_unit, threshold=threshold, diagnostics=diag,
                         query=q, summary=summary)
    for w in summary["warnings"]:
        say(f"warning: {w}")
    return summary


def _diagnose(estimate, problem, level, threshold, seed, query=None):
    # Diagnostics of the fit; a failed model check goes first in the estimate's warnings.
    import dataclasses

    from .diagnostics.diagnose import diagnose

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        diag = diagnose(estimate, problem, level=level, threshold=threshold, rng=seed,
                        query=None if query is None else query[0],
                        labels=None if query is None else query[1])
    if diag.warnings:
        estimate = dataclasses.replace(estimate,
                                       warnings=tuple(diag.warnings) + tuple(estimate.warnings))
    return estimate, diag


def _cmd_fit(args):
    summary = run_fit(args.readings, radius=args.radius, out=args.out, center=args.center,
                      method=args.method, query=args.query, level=args.level, seed=args.seed,
                      smoothness=args.smoothness, n_modes=args.n_modes, grid=args.grid,
                      figures=True, stage_options=_fit_options(args), threshold=args.threshold,
                      unit=args.unit, length_unit=args.length_unit, domain=args.domain)
    print(f"fit ({summary['method']}) written to {args.out}/ (report: {args.out}/report.html)")


def _cmd_demo(args):
    from importlib import resources

    data = resources.files("invert") / "data"
    with resources.as_file(data / "demo_readings.csv") as rpath, \
            resources.as_file(data / "demo_query.csv") as qpath:
        summary = run_fit(rpath, radius=0.25, out=args.out, method=args.method, query=qpath,
                          seed=args.seed, figures=True, threshold=args.threshold,
                          unit=args.unit, length_unit=args.length_unit)
    print("Demo (synthetic data: a heated circular plate, radius 0.25 m, 32 rim thermocouples "
          "with a failed harness and drop-outs, 4 interior probes).")
    print(f"method {summary['method']}, rule {summary.get('rule')}, "
          f"{summary['readings']['n_used']} readings used, {summary['readings']['n_gaps']} gaps")
    print(f"Output written to {args.out}/ (summary.json, boundary.csv, query.csv, field.csv, "
          f"figures)")
    print(f"Report: {args.out}/report.html")


def _cmd_advise(args):
    from . import workflow
    from .diagnostics.advise import advise
    from .io.readings import check_inside, load_points, load_readings
    from .problem import LinearProblem
    from .report.files import staged_output, to_jsonable

    def points(path):
        if path is None:
            return None
        pts, _, rows = load_points(path)
        check_inside(domain, pts, rows, Path(path).name)
        return pts

    if args.count < 1:
        raise ValueError(f"--count must be >= 1, got {args.count}")
    readings = load_readings(args.readings, center=args.center)
    domain = workflow.make_domain(args.radius, args.center, s=args.smoothness)
    problem = LinearProblem.from_readings(readings, domain)
    cand, query = points(args.candidates), points(args.query)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        estimate = workflow.run_stage(problem, args.method, s=args.smoothness, seed=args.seed)
    adv = advise(estimate, problem, count=args.count, candidates=cand, query=query,
                 min_spacing_deg=args.min_spacing)
    cframe, rframe = adv.to_frames()
    import json

    with staged_output(args.out) as stage:
        cframe.to_csv(stage / "candidates.csv", index=False, float_format="%.10g")
        rframe.to_csv(stage / "repair.csv", index=False, float_format="%.10g")
        with open(stage / "advice.json", "w") as fh:
            json.dump(to_jsonable({"target": adv.target, "target_before": adv.target_before,
                                   "noise_sd": adv.noise_sd,
                                   "min_spacing_deg": adv.min_spacing_deg,
                                   "method": estimate.method}), fh, indent=2)
    print(f"target: {adv.target}, now {adv.target_before:.4g}")
    if len(rframe):
        print(f"repair first: {rframe['sensor'][0]} (cuts it by {rframe['reduction'][0]:.3g})")
    r0 = cframe.iloc[0]
    where = f"rim at {r0['theta_deg']:.1f} deg" if r0["position"] == "rim" else \
        f"interior at ({r0['x']:.4g}, {r0['y']:.4g})"
    print(f"best new sensor: {where} (cuts it by {r0['reduction']:.3g})")
    print(f"written to {args.out}/ (candidates.csv, repair.csv, advice.json)")


def _cmd_batch(args):
    from .batch.runner import run_batch

    if args.calibrate and args.lam is not None:
        raise ValueError("--calibrate and --lam exclude each other")
    summary = run_batch(args.log, args.layout, radius=args.radius, out=args.out,
                        query=args.query, assimilate=args.assimilate, engine=args.engine,
                        scheduler=args.scheduler, fmt=args.fmt, resume=args.resume,
                        lam=args.lam, noise_sd=args.noise_sd, level=args.level,
                        smoothness=args.smoothness, n_modes=args.n_modes, center=args.center,
                        time_scale=args.time_scale, chunk_rows=args.chunk_rows,
                        max_transient=args.max_transient or None,
                        # exact mode on dask runs the parallel-in-time smoother
                        parallel_in_time=args.engine == "dask" and not args.max_transient)
    for w in summary["warnings"]:  # e.g. a repeated header, a stale lock taken over
        print(f"rim-invert: warning: {w}", file=sys.stderr)
    f = summary["frames"]
    print(f"batch ({summary['method']}, {summary['engine']}): {f['total']} frames, "
          f"{f.get('ok', 0)} ok, {f.get('no-data', 0)} no-data, {f.get('rejected', 0)} "
          f"rejected; written to {args.out}/")


def main(argv=None):
    """Entry point of the ``rim-invert`` command."""
    args = build_parser().parse_args(argv)
    try:
        {"fit": _cmd_fit, "demo": _cmd_demo, "advise": _cmd_advise,
         "batch": _cmd_batch}[args.command](args)
    except InputError as exc:
        print(f"rim-invert: error: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except ValueError as exc:
        print(f"rim-invert: error: {str(exc).splitlines()[0]}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except OSError as exc:  # the system refused a read or write: one line, nothing half-written
        where = f"{exc.filename}: " if getattr(exc, "filename", None) else ""
        print(f"rim-invert: error: {where}{exc.strerror or exc}", file=sys.stderr)
        return EXIT_SYSTEM
    return 0


if __name__ == "__main__":
    sys.exit(main())
