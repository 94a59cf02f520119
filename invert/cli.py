"""The ``rim-invert`` command line: parses arguments and calls the library, nothing more.

Bad input ends with exit code 2 and one line on stderr naming the file, row or column and the
problem; outputs are staged and moved into place only when complete.
"""

from __future__ import annotations

import argparse
import contextlib
import sys
import warnings
from pathlib import Path

import numpy as np

from ._validation import check_level
from .cli_checks import (
    SCHEDULER_TIMEOUT,
    SEED,
    check_batch_args,
    finite,
    int_at_least,
    no_work_left_on_bad_input,
    one_line,
    refuse_all_rejected,
    shape_options,
)
from .errors import InputError
from .stages.registry import DEFAULT_METHOD, TIKHONOV_OPTIONS, method_for

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


def _add_dialect_options(p):
    p.add_argument("--sep", default=None, metavar="SEP",
                   help="delimiter of the CSV input: ',', ';' or 'tab' (default: detected from "
                        "the first lines)")
    p.add_argument("--decimal", default=None, metavar="MARK",
                   help="decimal mark of numbers in the CSV input: '.' or ',' (default: "
                        "detected; a comma with semicolon- or tab-separated files)")


def _dialect(args):
    """``{"sep": ..., "decimal": ...}`` from --sep/--decimal (None: detect)."""
    from .io.dialect import parse_decimal, parse_sep

    return {"sep": parse_sep(args.sep), "decimal": parse_decimal(args.decimal)}


def _add_fit_options(p):
    p.add_argument("--method", default=None, choices=_methods(),
                   help="inference stage (default: averaged; tikhonov when --rule or --lam "
                        "is given)")
    p.add_argument("--rule", default=None,
                   help="tikhonov parameter choice: evidence, gcv, loo, lcurve, discrepancy, "
                        "upre (default: evidence)")
    p.add_argument("--query", type=Path, help="POINTS.csv: x,y[,label] to report")
    p.add_argument("--level", type=float, default=0.9,
                   help="probability of the central intervals (default: 0.9)")
    p.add_argument("--seed", type=SEED, default=0,
                   help="random seed, an integer >= 0 (default: 0)")
    p.add_argument("--smoothness", type=float, default=2.0,
                   help="smoothness order s of the prior (default: 2)")
    p.add_argument("--n-modes", type=int_at_least("--n-modes", 1), default=None,
                   help="truncation degree, >= 1 (default: chosen from the smoothness)")
    p.add_argument("--lam", type=_positive("--lam"), default=None,
                   help="fix the regularisation parameter (with --noise-sd when readings "
                        "carry no sigma), e.g. from an earlier summary.json")
    p.add_argument("--noise-sd", type=_positive("--noise-sd"), default=None,
                   help="fix the common noise sd instead of estimating it (with --lam)")
    p.add_argument("--grid", type=int_at_least("--grid", 3), default=81,
                   help="interior grid: points per side of the square around the region, "
                        ">= 3 (default: 81)")
    p.add_argument("--fix-smoothness", action="store_true",
                   help="gaussian/mcmc: hold s at --smoothness instead of estimating it")
    p.add_argument("--faulty", action="store_true",
                   help="mcmc: model each reading as good or faulty; report fault probabilities")
    p.add_argument("--angle-sd", type=_positive("--angle-sd"), default=None, metavar="DEG",
                   help="mcmc: sd (degrees) of each sensor's angle error, integrated over")
    p.add_argument("--max-steps", type=int_at_least("--max-steps", 1), default=None,
                   help="mcmc: step cap per ensemble (default: 20000)")
    _add_report_options(p)
    _add_dialect_options(p)


def _add_report_options(p, threshold=None, unit="", length_unit=""):
    p.add_argument("--threshold", type=finite("--threshold"), default=threshold,
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
    from importlib import metadata

    parser.add_argument("--version", action="version",
                        version=f"%(prog)s {metadata.version('rim-invert')}")
    sub = parser.add_subparsers(dest="command", required=True, parser_class=_Parser)

    p = sub.add_parser("fit", help="fit one snapshot of readings")
    p.add_argument("readings", type=Path, help="READINGS.csv: x,y,value[,sigma][,sensor]")
    p.add_argument("--radius", type=_positive("--radius"), required=True,
                   help="radius of the region, in the unit of the x, y (z) columns")
    p.add_argument("--out", type=Path, required=True, help="output folder")
    p.add_argument("--center", type=finite("--center"), nargs="+", metavar="C", default=None,
                   help="centre: X Y for a disk, X Y Z for a ball (default: the origin)")
    p.add_argument("--domain", default="disk", choices=_domains(),
                   help="region: disk (readings x,y) or ball (readings x,y,z; boundary.csv on "
                        "a latitude/longitude grid) or annulus (a wall between --inner-radius "
                        "and --radius; readings x,y) (default: disk)")
    p.add_argument("--inner-radius", type=_positive("--inner-radius"), default=None,
                   metavar="A", help="annulus: radius of the bore, 0 < A < --radius")
    p.add_argument("--conductivity", type=_positive("--conductivity"), default=None,
                   metavar="K", help="annulus: thermal conductivity (W/m/K) for the heat flow "
                                     "through the wall (default: per unit conductivity)")
    _add_fit_options(p)

    p = sub.add_parser("demo", help="run the main job on the bundled synthetic demo data")
    p.add_argument("--out", type=Path, default=Path("demo-output"),
                   help="output folder (default: demo-output)")
    p.add_argument("--method", default=DEFAULT_METHOD, choices=_methods(),
                   help=f"stage that fits the readings (default: {DEFAULT_METHOD})")
    p.add_argument("--seed", type=SEED, default=0,
                   help="random seed, an integer >= 0 (default: 0)")
    _add_report_options(p, threshold=95.0, unit="°C", length_unit="m")

    p = sub.add_parser("advise", help="rank new sensor positions and failed sensors to repair")
    p.add_argument("readings", type=Path, help="READINGS.csv: x,y,value[,sigma][,sensor]")
    p.add_argument("--radius", type=_positive("--radius"), required=True,
                   help="radius of the region, in the unit of the x, y (z) columns")
    p.add_argument("--out", type=Path, required=True, help="output folder")
    p.add_argument("--center", type=finite("--center"), nargs="+", metavar="C", default=None,
                   help="centre: X Y for a disk, X Y Z for a ball (default: the origin)")
    p.add_argument("--domain", default="disk", choices=_domains(),
                   help="region of the readings (default: disk); advice needs rim circles (a "
                        "disk, or an annulus with --inner-radius), so a ball is refused with one "
                        "line")
    p.add_argument("--inner-radius", type=_positive("--inner-radius"), default=None,
                   metavar="A", help="annulus: radius of the bore, 0 < A < --radius")
    p.add_argument("--count", type=int, default=5,
                   help="new sensors to choose (default: 5)")
    p.add_argument("--candidates", type=Path,
                   help="POINTS.csv of candidate positions (default: every degree on each rim "
                        "and rings 1/4, 1/2, 3/4 of the way from the centre, or the bore, to the "
                        "outer rim)")
    p.add_argument("--query", type=Path,
                   help="POINTS.csv: reduce the variance at these points instead of over the disk")
    p.add_argument("--min-spacing", type=finite("--min-spacing", 0.0), default=None,
                   help="minimum angle between new sensors, degrees (default: half the sensor "
                        "spacing)")
    p.add_argument("--method", default=DEFAULT_METHOD, choices=_methods(),
                   help=f"stage that fits the readings (default: {DEFAULT_METHOD})")
    p.add_argument("--smoothness", type=float, default=2.0,
                   help="smoothness order s of the prior (default: 2)")
    p.add_argument("--seed", type=SEED, default=0,
                   help="random seed, an integer >= 0 (default: 0)")
    _add_dialect_options(p)

    _add_batch_parser(sub)
    return parser


def _add_batch_parser(sub):
    p = sub.add_parser("batch", help="reanalyse a log of frames (per frame or Kalman smoothing)")
    p.add_argument("log", help="LOG.csv or LOG.parquet (wide: time + one column per sensor; or "
                               "long: time,sensor,value[,flag]), or a database URL "
                               "sqlite:///FILE.db or postgresql://user@host:port/db with --table")
    p.add_argument("--table", default=None, help="table of a database LOG (wide or long)")
    p.add_argument("--out-table", default=None, metavar="NAME",
                   help="database LOG: also write the results into tables NAME_frames and "
                        "NAME_query of the same database (replaced if they exist)")
    p.add_argument("--from", dest="time_from", default=None, metavar="TIME",
                   help="database LOG: only frames with time >= TIME")
    p.add_argument("--to", dest="time_to", default=None, metavar="TIME",
                   help="database LOG: only frames with time < TIME")
    p.add_argument("--layout", type=Path, required=True,
                   help="LAYOUT.csv: sensor,x,y[,sigma] (or sensor,r,theta_deg[,sigma])")
    p.add_argument("--radius", type=_positive("--radius"), required=True,
                   help="radius of the region, in the unit of the x, y (z) columns")
    p.add_argument("--domain", default="disk", choices=("disk", "annulus"),
                   help="region: disk (default) or annulus (a wall between --inner-radius and "
                        "--radius)")
    p.add_argument("--inner-radius", type=_positive("--inner-radius"), default=None,
                   metavar="A", help="annulus: radius of the bore, 0 < A < --radius")
    p.add_argument("--out", type=Path, required=True, help="output folder")
    p.add_argument("--center", type=finite("--center"), nargs=2, metavar=("X", "Y"), default=None,
                   help="centre of the disk (default: 0 0)")
    p.add_argument("--query", type=Path, help="POINTS.csv: x,y[,label] (default: the centre; "
                                              "on an annulus mid-wall at 0 and 180 degrees)")
    p.add_argument("--assimilate", action="store_true",
                   help="Kalman filter + RTS smoother over time instead of per-frame fits")
    p.add_argument("--engine", default="local", choices=["local", "dask"],
                   help="run the chunks in this process (local, default) or on dask.distributed")
    p.add_argument("--scheduler", default=None, help="address of an existing dask scheduler")
    p.add_argument("--format", default="parquet", choices=["csv", "parquet", "netcdf"],
                   dest="fmt", help="frames and query tables as csv or parquet; netcdf: "
                                    "parquet tables and results.nc (CF conventions)")
    p.add_argument("--unit", default=None, help="unit of the readings (written into results.nc)")
    p.add_argument("--resume", action="store_true", help="continue an interrupted run in --out")
    p.add_argument("--lam", type=_positive("--lam"), default=None,
                   help="fixed regularisation parameter (e.g. from a fit's summary.json)")
    p.add_argument("--noise-sd", type=_positive("--noise-sd"), default=None,
                   help="fixed common noise sd (with --lam, when the layout has no sigma)")
    p.add_argument("--calibrate", action="store_true",
                   help="estimate lam (and the noise sd) once on the log (default without --lam)")
    p.add_argument("--time-scale", type=_positive("--time-scale"), default=None,
                   help="fix the time scale of the dynamics (default: maximum likelihood)")
    p.add_argument("--level", type=float, default=0.9,
                   help="probability of the central intervals (default: 0.9)")
    p.add_argument("--smoothness", type=float, default=2.0,
                   help="smoothness order s of the prior (default: 2)")
    p.add_argument("--n-modes", type=int_at_least("--n-modes", 1), default=None,
                   help="highest harmonic degree (default: chosen from the prior)")
    p.add_argument("--chunk-rows", type=int_at_least("--chunk-rows", 1), default=65536,
                   help="frames per chunk, >= 1 (default: 65536)")
    _add_dialect_options(p)
    p.add_argument("--time-format", default=None, metavar="FORMAT",
                   help="how the log writes its times when they are not numbers (kept as "
                        "written) or ISO 8601 date-times: epoch-s, epoch-ms, epoch-us, epoch-ns "
                        "(Unix epoch numbers) or a strptime pattern such as '%%d/%%m/%%Y "
                        "%%H:%%M:%%S' (day-first dates); without a zone times are read as UTC")
    p.add_argument("--max-transient", type=int_at_least("--max-transient", 0), default=0,
                   help="assimilation: 0 (default) = exact Kalman filter and smoother at every "
                        "frame (compiled); N > 0 = the steady-state shortcut: exact steps for up "
                        "to N frames after a change of drop-out pattern or time step, then the "
                        "cached steady-state gain")
    p.add_argument("--sensor-health", action="store_true",
                   help="assimilation: also estimate a slowly varying offset per sensor "
                        "(offsets sum to zero over the sensors) and down-weight readings "
                        "judged faulty; writes sensors.<fmt> and spikes.<fmt>")
    p.add_argument("--offset-sd", type=_positive("--offset-sd"), default=None,
                   help="with --sensor-health: prior sd of an offset, in the unit of the "
                        "readings (default: 10 noise sds)")
    p.add_argument("--offset-rate", type=_positive("--offset-rate"), default=None,
                   help="with --sensor-health: sd of an offset's change over one time scale "
                        "of the dynamics (default: 1 noise sd)")
    p.add_argument("--health-block", default=None, metavar="SIZE",
                   help="with --sensor-health: blocks of the sensors table, a record count "
                        "(default: 1000) or a duration such as 30min, 2h")


#: Default of --max-steps (mcmc only; None on the parser so that a stray one is seen).
MAX_STEPS = 20000


def _fit_options(args):
    """Stage options from the fit options; an option the chosen method would ignore is an error."""
    method = getattr(args, "method", DEFAULT_METHOD)
    if method != "mcmc" and (args.faulty or args.angle_sd is not None
                             or args.max_steps is not None):
        raise ValueError(f"--faulty, --angle-sd and --max-steps belong to --method mcmc; the "
                         f"{method} fit would ignore them")
    if method == "averaged":
        if args.fix_smoothness:
            raise ValueError("--fix-smoothness belongs to --method gaussian or mcmc; the "
                             "averaged fit averages over the smoothness order")
        if args.lam is not None or args.noise_sd is not None or args.rule is not None:
            raise ValueError("--lam, --noise-sd and --rule belong to --method tikhonov")
        return {}
    if method in ("gaussian", "mcmc"):
        if args.lam is not None or args.noise_sd is not None or args.rule is not None:
            raise ValueError("--lam, --noise-sd and --rule belong to --method tikhonov")
        opts = {"fix_s": True} if args.fix_smoothness else {}
        if method == "mcmc":
            opts.update(faulty=args.faulty, angle_sd_deg=args.angle_sd,
                        max_steps=MAX_STEPS if args.max_steps is None else args.max_steps)
        return opts
    opts = {}
    if args.lam is not None:
        if args.rule is not None:
            raise ValueError("--rule and --lam exclude each other (--lam fixes the parameter "
                             "the rule would choose)")
        opts.update(rule="fixed", lam=args.lam, noise_sd=args.noise_sd)
    elif args.noise_sd is not None:
        raise ValueError("--noise-sd goes with --lam (both fixed, e.g. from a batch summary)")
    else:
        opts.update(rule=args.rule or "evidence")
    return opts


def run_fit(readings_path, *, radius, out, center=None, method=None, query=None,
            level=0.9, seed=0, smoothness=2.0, n_modes=None, grid=81, figures=False,
            stage_options=None, say=print, threshold=None, unit="", length_unit="",
            domain="disk", dialect=None, inner_radius=None, conductivity=None):
    """Run ``fit`` end to end: load, check, fit, write. Returns the summary dict.

    ``domain`` is a name in :data:`invert.geometry.DOMAINS`; readings, ``center`` and query
    points have that domain's ``dim`` coordinates (``"ball"``: x, y, z). ``dialect``:
    ``{"sep": ..., "decimal": ...}`` of the readings file (None values: detected).
    ``inner_radius``: the bore of an annulus; ``conductivity``: for its heat flow.
    """
    from . import workflow
    from .io.publish import check_output_path
    from .io.readings import check_inside, load_points, load_readings
    from .report.files import staged_output, write_fit_outputs

    level = check_level(level)
    check_output_path(out, "fit")  # before any computation
    from .diagnostics.heat_flow import has_heat_flow
    from .geometry import domain_class

    dim = domain_class(domain).dim
    if center is not None and len(center) != dim:
        raise ValueError(f"--center needs {dim} numbers for a {domain}, got {len(center)}")
    name = domain
    shape = shape_options(domain_class(name), name, radius, inner_radius=inner_radius)
    readings = load_readings(readings_path, dim=dim, center=center, **(dialect or {}))
    domain = workflow.make_domain(radius, center, kind=domain, s=smoothness, n_modes=n_modes,
                                  **shape)
    if conductivity is not None and not has_heat_flow(domain):
        raise ValueError(f"--conductivity needs a region with a bore (--domain annulus): a "
                         f"source-free {name} has no net heat flow through its rim")
    workflow.check_memory(domain, grid=grid, n_readings=readings.observed.sum(),
                          given_modes=n_modes is not None)
    problem = workflow.problem_from_readings(readings, domain)
    q = None
    if query is not None:
        pts, labels, rows = load_points(query, dim=dim)
        check_inside(domain, pts, rows, Path(query).name)
        q = (pts, labels)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            method = method_for(method, stage_options or {})  # as the command line
            estimate, problem = workflow.robust_stage(problem, method, s=smoothness,
                                                      seed=seed, **(stage_options or {}))
        except ValueError as exc:  # e.g. too few readings: name the file they came from
            raise InputError(readings.source, str(exc).splitlines()[0]) from None
    estimate, diag = _diagnose(estimate, problem, level, threshold, seed, q)
    with staged_output(out) as stage:
        summary = write_fit_outputs(stage, estimate, problem, readings, level=level, query=q,
                                    grid=grid, summary_extra={"seed": seed, "unit": unit,
                                                              "length_unit": length_unit,
                                                              "diagnostics": diag.to_dict()},
                                    conductivity=conductivity)
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
                      unit=args.unit, length_unit=args.length_unit, domain=args.domain,
                      dialect=_dialect(args), inner_radius=args.inner_radius,
                      conductivity=args.conductivity)
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
    from .report.files import describe_choice

    print(f"method {summary['method']}, {describe_choice(summary)}, "
          f"{summary['readings']['n_used']} readings used, {summary['readings']['n_gaps']} gaps")
    print(f"Output written to {args.out}/ (summary.json, boundary.csv, query.csv, field.csv, "
          f"figures)")
    print(f"Report: {args.out}/report.html")


def _cmd_advise(args):
    from . import workflow
    from .diagnostics.advise import advise
    from .geometry import domain_class
    from .io.publish import check_output_path
    from .io.readings import check_inside, load_points, load_readings

    def points(path):
        if path is None:
            return None
        pts, _, rows = load_points(path, dim=dim)
        check_inside(domain, pts, rows, Path(path).name)
        return pts

    if args.count < 1:
        raise ValueError(f"--count must be >= 1, got {args.count}")
    check_output_path(args.out, "fit")
    dim = domain_class(args.domain).dim
    if args.center is not None and len(args.center) != dim:
        raise ValueError(f"--center needs {dim} numbers for a {args.domain}, got "
                         f"{len(args.center)}")
    shape = shape_options(domain_class(args.domain), args.domain, args.radius,
                          inner_radius=args.inner_radius)
    readings = load_readings(args.readings, dim=dim, center=args.center, **_dialect(args))
    domain = workflow.make_domain(args.radius, args.center, kind=args.domain,
                                  s=args.smoothness, **shape)
    if getattr(domain, "rim_circles", None) is None:
        raise ValueError(f"advise needs a region with a rim circle (a disk or an annulus); the "
                         f"{args.domain} has none, so no sensor advice can be given")
    problem = workflow.problem_from_readings(readings, domain)
    cand, query = points(args.candidates), points(args.query)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        estimate = workflow.run_stage(problem, args.method, s=args.smoothness, seed=args.seed)
    adv = advise(estimate, problem, count=args.count, candidates=cand, query=query,
                 min_spacing_deg=args.min_spacing)
    _write_advice(args, adv, estimate, problem)


def _advice_warnings(args, adv, cframe, problem):
    notes = list(problem.notes)
    if len(cframe) < args.count:
        notes.append(f"--count {args.count}: only {len(cframe)} new sensor(s) could be placed "
                     f"(candidates at least {adv.min_spacing_deg:.3g} deg apart; give "
                     f"--min-spacing or --candidates for more)")
    return notes


def _write_advice(args, adv, estimate, problem):
    import json

    from .io.writers import write_csv_frame
    from .report.files import staged_output, to_jsonable

    cframe, rframe = adv.to_frames()
    notes = _advice_warnings(args, adv, cframe, problem)
    with staged_output(args.out) as stage:
        write_csv_frame(cframe, stage / "candidates.csv")
        write_csv_frame(rframe, stage / "repair.csv")
        advice = {"target": adv.target, "target_before": adv.target_before,
                  "noise_sd": adv.noise_sd, "min_spacing_deg": adv.min_spacing_deg,
                  "method": estimate.method}
        if notes:  # only then: the file of a plain run keeps its keys
            advice.update(count=args.count, n_chosen=len(cframe), warnings=notes)
        with open(stage / "advice.json", "w") as fh:
            json.dump(to_jsonable(advice), fh, indent=2)
    for w in notes:
        print(f"warning: {w}")
    print(f"target: {adv.target}, now {adv.target_before:.4g}")
    if len(rframe):
        print(f"repair first: {rframe['sensor'][0]} (cuts it by {rframe['reduction'][0]:.3g})")
    r0 = cframe.iloc[0]
    where = f"{r0['position']} at ({r0['x']:.4g}, {r0['y']:.4g})"
    if np.isfinite(r0["theta_deg"]):  # on a rim: its angle says where
        where = f"{r0['position']} at {r0['theta_deg']:.1f} deg"
    print(f"best new sensor: {where} (cuts it by {r0['reduction']:.3g})")
    print(f"written to {args.out}/ (candidates.csv, repair.csv, advice.json)")


def _scheduler_timeout(args):
    """Dask's connect timeout cut to SCHEDULER_TIMEOUT for a run on an existing scheduler."""
    if args.scheduler is None:
        return contextlib.nullcontext()
    import dask

    return dask.config.set({"distributed.comm.timeouts.connect": f"{SCHEDULER_TIMEOUT:g}s"})


def _health_options(args):
    """Return the sensor-health arguments of run_batch (none without --sensor-health)."""
    if not args.sensor_health:
        return {}
    return {"sensor_health": True, "offset_sd": args.offset_sd,
            "offset_rate": args.offset_rate, "health_block": args.health_block or "1000"}


def _cmd_batch(args):
    from .batch.runner import run_batch
    from .geometry import domain_class

    check_batch_args(args)
    shape = shape_options(domain_class(args.domain), args.domain, args.radius,
                          inner_radius=args.inner_radius)
    fresh = not args.out.exists()
    with _scheduler_timeout(args), no_work_left_on_bad_input(args, fresh):
        summary = run_batch(args.log, args.layout, radius=args.radius, out=args.out,
                            query=args.query, assimilate=args.assimilate, engine=args.engine,
                            scheduler=args.scheduler, fmt=args.fmt, resume=args.resume,
                            lam=args.lam, noise_sd=args.noise_sd, level=args.level,
                            smoothness=args.smoothness, n_modes=args.n_modes,
                            center=args.center, time_scale=args.time_scale,
                            chunk_rows=args.chunk_rows, log_options=_dialect(args),
                            max_transient=args.max_transient or None,
                            time_format=args.time_format, table=args.table,
                            out_table=args.out_table, time_from=args.time_from,
                            time_to=args.time_to, unit=args.unit, kind=args.domain,
                            **shape, **_health_options(args))
    for w in summary["warnings"]:  # e.g. a repeated header, a stale lock taken over
        print(f"rim-invert: warning: {w}", file=sys.stderr)
    f = summary["frames"]
    print(f"batch ({summary['method']}, {summary['engine']}): {f['total']} frames, "
          f"{f.get('ok', 0)} ok, {f.get('no-data', 0)} no-data, {f.get('rejected', 0)} "
          f"rejected; written to {args.out}/")
    refuse_all_rejected(args, summary)


def resolve_method(args):
    """Set ``args.method`` if not given: tikhonov with --rule/--lam/--noise-sd, else the default."""
    if getattr(args, "method", "") is None:
        args.method = method_for(None, {k: getattr(args, k, None) for k in TIKHONOV_OPTIONS})
    return args


def main(argv=None):
    """Entry point of the ``rim-invert`` command."""
    args = resolve_method(build_parser().parse_args(argv))
    try:
        {"fit": _cmd_fit, "demo": _cmd_demo, "advise": _cmd_advise,
         "batch": _cmd_batch}[args.command](args)
    except ValueError as exc:  # InputError too: one line, never empty
        print(f"rim-invert: error: {one_line(exc)}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except OSError as exc:  # the system refused a read or write: one line, nothing half-written
        where = f"{exc.filename}: " if getattr(exc, "filename", None) else ""
        print(f"rim-invert: error: {where}{exc.strerror or one_line(exc)}", file=sys.stderr)
        return EXIT_SYSTEM
    return 0


if __name__ == "__main__":
    sys.exit(main())
