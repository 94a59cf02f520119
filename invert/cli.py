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

from ._validation import InputError, check_level

EXIT_BAD_INPUT = 2


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


def _methods():
    from .workflow import METHODS

    return list(METHODS)


def build_parser():
    """The argument parser (exposed for documentation and tests)."""
    parser = _Parser(prog="rim-invert",
                     description="Estimate a harmonic field in a disk from rim and interior "
                                 "sensor readings, with calibrated uncertainty.")
    sub = parser.add_subparsers(dest="command", required=True, parser_class=_Parser)

    p = sub.add_parser("fit", help="fit one snapshot of readings")
    p.add_argument("readings", type=Path, help="READINGS.csv: x,y,value[,sigma][,sensor]")
    p.add_argument("--radius", type=_positive("--radius"), required=True)
    p.add_argument("--out", type=Path, required=True, help="output folder")
    p.add_argument("--center", type=float, nargs=2, metavar=("X", "Y"), default=None)
    _add_fit_options(p)

    p = sub.add_parser("demo", help="run the main job on the bundled synthetic demo data")
    p.add_argument("--out", type=Path, default=Path("demo-output"))
    p.add_argument("--method", default="tikhonov", choices=_methods())
    p.add_argument("--seed", type=int, default=0)
    return parser


def _fit_options(args):
    opts = {}
    if args.lam is not None:
        opts.update(rule="fixed", lam=args.lam, noise_sd=args.noise_sd)
    elif args.noise_sd is not None:
        raise ValueError("--noise-sd goes with --lam (both fixed, e.g. from a batch summary)")
    else:
        opts.update(rule=args.rule)
    return opts


def run_fit(readings_path, *, radius, out, center=None, method="tikhonov", query=None,
            level=0.9, seed=0, smoothness=2.0, n_modes=None, grid=81, figures=False,
            stage_options=None, say=print):
    """Run ``fit`` end to end: load, check, fit, write. Returns the summary dict."""
    from . import workflow
    from .outputs import staged_output, write_fit_outputs
    from .problem import LinearProblem
    from .readings import load_points, load_readings

    level = check_level(level)
    readings = load_readings(readings_path, center=center)
    domain = workflow.make_domain(radius, center, s=smoothness, n_modes=n_modes)
    problem = LinearProblem.from_readings(readings, domain)
    q = None
    if query is not None:
        pts, labels, rows = load_points(query)
        try:
            domain.locate(pts)
        except Exception as exc:  # DomainError: name the row of the query file
            i = getattr(exc, "index", 0) or 0
            raise InputError(Path(query).name, str(exc), row=int(rows[i])) from None
        q = (pts, labels)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        estimate = workflow.run_stage(problem, method, s=smoothness, seed=seed,
                                      **(stage_options or {}))
    with staged_output(out) as stage:
        summary = write_fit_outputs(stage, estimate, problem, readings, level=level, query=q,
                                    grid=grid, summary_extra={"seed": seed})
        if figures:
            from .report import write_figures

            write_figures(stage, estimate, problem, readings, level=level)
    for w in summary["warnings"]:
        say(f"warning: {w}")
    return summary


def _cmd_fit(args):
    summary = run_fit(args.readings, radius=args.radius, out=args.out, center=args.center,
                      method=args.method, query=args.query, level=args.level, seed=args.seed,
                      smoothness=args.smoothness, n_modes=args.n_modes, grid=args.grid,
                      figures=True, stage_options=_fit_options(args))
    print(f"fit ({summary['method']}) written to {args.out}/")


def _cmd_demo(args):
    from importlib import resources

    data = resources.files("invert") / "data"
    with resources.as_file(data / "demo_readings.csv") as rpath, \
            resources.as_file(data / "demo_query.csv") as qpath:
        summary = run_fit(rpath, radius=0.25, out=args.out, method=args.method, query=qpath,
                          seed=args.seed, figures=True)
    print("Demo (synthetic data: a heated circular plate, radius 0.25 m, 32 rim thermocouples "
          "with a failed harness and drop-outs, 4 interior probes).")
    print(f"method {summary['method']}, rule {summary.get('rule')}, "
          f"{summary['readings']['n_used']} readings used, {summary['readings']['n_gaps']} gaps")
    print(f"Output written to {args.out}/ (summary.json, boundary.csv, query.csv, field.csv, "
          f"figures)")


def main(argv=None):
    """Entry point of the ``rim-invert`` command."""
    args = build_parser().parse_args(argv)
    try:
        {"fit": _cmd_fit, "demo": _cmd_demo}[args.command](args)
    except InputError as exc:
        print(f"rim-invert: error: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except ValueError as exc:
        print(f"rim-invert: error: {str(exc).splitlines()[0]}", file=sys.stderr)
        return EXIT_BAD_INPUT
    return 0


if __name__ == "__main__":
    sys.exit(main())
