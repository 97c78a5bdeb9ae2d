"""The ``robustbox`` command: certify, check, opf, demo.

Exit codes: 0 success; 1 a check found violations or a verified box was
rejected; 2 bad input (file, option, data); 3 a solver or certificate
failure.  Errors print one line; ``--debug`` shows the traceback.
"""
from __future__ import annotations

import argparse
import json
import sys
import time
import warnings
from importlib import resources
from pathlib import Path

from .certify import CertifyOptions
from .errors import (CaseFileError, CertificateError, ModelStructureError, NetworkError, OperatingPointError,
                     QuadraticSystemError, RobustboxError, RobustboxNote, SolverError)
from .grid.casefile import read_case

EXIT_OK, EXIT_VIOLATION, EXIT_INPUT, EXIT_SOLVE = 0, 1, 2, 3


def demo_case_path() -> Path:
    """Path of the shipped fictional demo grid."""
    return Path(str(resources.files("robustbox") / "data" / "demo_grid.m"))


def _progress(enabled: bool):
    from .fanout import progress_bar
    return progress_bar("sampling", enabled)


def _uncertain(text: str):
    if text in ("loads", "renewables"):
        return text
    try:
        return [int(b) for b in text.split(",") if b.strip()]
    except ValueError:
        raise argparse.ArgumentTypeError(f"--uncertain: 'loads', 'renewables' or bus numbers like 5,9,17 (got '{text}')") from None


def _print_summary(data: dict) -> None:
    print(f"case: {data['case']}")
    print(f"scenario: {data['scenario']}")
    if "opf" in data:
        o = data["opf"]
        inc = o.get("cost_increase_per_h")
        print(f"operating point: AC-OPF margin {o['margin']:g}, cost {o['objective_per_h']:.2f} $/h"
              + (f" (+{inc:.2f} $/h over the untightened optimum)" if inc is not None else ""))
    print(f"status: {data['status']}   certified fraction of the band: {data['certified_fraction']:.4g}")
    print(f"binding: {data['binding_limit']}")
    print(f"{'bus':>6} {'qty':>3} {'nominal':>10} {'lower':>10} {'upper':>10}  unit")
    for e in data["box"]:
        print(f"{e['bus']:>6} {e['quantity']:>3} {e['nominal']:>10.3f} {e['lower']:>10.3f} {e['upper']:>10.3f}  {e['unit']}")
    print(f"time: {data['timings_s']['total_s']:.2f} s (certificate)")


def _cmd_certify(args: argparse.Namespace) -> int:
    from .study import certify_case, result_to_json, save_json
    if not args.band > 0:
        raise NetworkError(f"--band must be positive, got {args.band}")
    point = None
    if args.point:
        try:
            point = json.loads(Path(args.point).read_text())
        except (OSError, json.JSONDecodeError) as exc:
            raise OperatingPointError(f"{args.point}: cannot read the operating point ({exc})") from None
    if args.contingencies:
        from .contingency import certify_secure_cli
        data, res = certify_secure_cli(args, point, _fan_out(args))
    else:
        res = certify_case(args.case, args.uncertain, args.band, args.objective,
                           0.1 if args.margin is None else args.margin, point, args.policy or "slack",
                           CertifyOptions(max_fraction=args.max_fraction), point_source=args.point or "point file")
        data = result_to_json(res)
        _print_summary(data)
    if args.out:
        save_json(data, args.out)
        print(f"wrote {args.out}")
    if args.report:
        from .report import write_report
        pair = tuple(x.strip() for x in args.slice.split(",")) if args.slice else None
        print(f"wrote {write_report(res, args.report, pair=pair)}")
    return EXIT_OK


def _cmd_check(args: argparse.Namespace) -> int:
    from .study import check_box
    net = read_case(args.case)
    try:
        data = json.loads(Path(args.box).read_text())
    except (OSError, json.JSONDecodeError) as exc:
        raise OperatingPointError(f"{args.box}: cannot read the box file ({exc})") from None
    rep = check_box(net, data, args.samples, source=args.box, progress=_progress(sys.stderr.isatty() and not args.quiet))
    print(f"checked {rep.points} points ({rep.vertices} vertices): {rep.violations} with violations, "
          f"{rep.not_converged} power flows not converged")
    for key, val in sorted(rep.worst_margin.items()):
        print(f"  worst margin {key}: {val:.5g}")
    for ex in rep.examples:
        print(f"  {ex}")
    return EXIT_OK if rep.passed else EXIT_VIOLATION


def _cmd_opf(args: argparse.Namespace) -> int:
    from .grid.model import solve_opf
    from .study import point_to_json, save_json
    net = read_case(args.case)
    res = solve_opf(net, args.margin)
    data = point_to_json(net, res.point)
    data.update({"margin": args.margin, "base_objective": res.base_objective_per_h,
                 "cost_increase": res.cost_increase_per_h, "time_s": res.time_s})
    print(f"AC-OPF {'with margin ' + format(args.margin, 'g') if args.margin else '(no margin)'}: "
          f"{res.objective_per_h:.4f} $/h, {res.status}, {res.time_s:.2f} s")
    if res.cost_increase_per_h is not None:
        print(f"cost increase over the untightened optimum: {res.cost_increase_per_h:.4f} $/h "
              f"({res.cost_increase_pct:.3f} %)")
    if args.out:
        save_json(data, args.out)
        print(f"wrote {args.out}")
    return EXIT_OK


def _cmd_demo(args: argparse.Namespace) -> int:
    from .report import write_report
    from .study import certify_case, check_box, result_to_json, save_json
    out = Path(args.out) if args.out else Path.cwd() / time.strftime("robustbox-demo-%Y%m%d-%H%M%S")
    out.mkdir(parents=True, exist_ok=True)
    case = demo_case_path()
    print("Lakeholm regional network (fictional demo grid): wind and solar sites may inject up to their full capacity")
    res = certify_case(case, "renewables", 1.0, "uniform", 0.1, options=CertifyOptions(max_fraction=1.0))
    data = result_to_json(res)
    _print_summary(data)
    save_json(data, out / "box.json")
    rep = check_box(res.network, data, samples=200, source=str(out / "box.json"),
                    progress=_progress(sys.stderr.isatty()))
    print(f"independent check: {rep.points} power flows, {rep.violations} violations, {rep.not_converged} not converged")
    print(f"wrote {write_report(res, out, rep)}")
    return EXIT_OK if rep.passed else EXIT_VIOLATION


def _case_or_demo(text: str) -> Path:
    """A case file; the word 'demo' (with no such file here) is the built-in fictional grid."""
    return demo_case_path() if text == "demo" and not Path(text).exists() else Path(text)


def _buses(text: str) -> tuple[int, ...]:
    try:
        return tuple(int(b) for b in text.split(",") if b.strip())
    except ValueError:
        raise argparse.ArgumentTypeError(f"bus numbers like 5,9,17 (got '{text}')") from None


def _fan_out(args: argparse.Namespace):
    from .fanout import FanOut
    if args.workers is not None and args.workers < 1:
        raise NetworkError(f"--workers must be ≥ 1, got {args.workers}")
    return FanOut(serial=args.serial, scheduler=args.scheduler, workers=args.workers)


def _cmd_envelopes(args: argparse.Namespace) -> int:
    from .envelopes import EnvelopeSettings, default_connections, read_profile, run_envelopes, summarize
    from .fanout import progress_bar
    from .report import write_envelope_report
    net = read_case(_case_or_demo(args.case))
    profile = read_profile(args.profile, net)
    settings = EnvelopeSettings(args.connections or default_connections(net), args.import_mw, args.export_mw,
                                args.margin, args.policy, args.point, args.block)
    how = _fan_out(args)
    out = Path(args.out)
    print(f"{len(profile)} intervals of {args.profile} on {net.name}; connections at buses "
          f"{', '.join(map(str, settings.connections))}; {how.describe()}")
    t0 = time.perf_counter()
    run = run_envelopes(net, profile, settings, out, how, fresh=args.fresh, retry_failed=args.retry_failed,
                        progress=progress_bar("intervals"))
    summary = summarize(run.rows, settings.connections, args.threshold_mw)
    (out / "summary.json").write_text(json.dumps(summary, indent=2), encoding="utf-8")
    report = write_envelope_report(run, settings, summary, out)
    print(f"computed {run.computed} intervals in {time.perf_counter() - t0:.1f} s ({run.skipped} already done), "
          f"{run.failed} failed")
    print(f"{'bus':>6} {'certified':>9} {'failed':>6} {'median export MW':>17} {'min export MW':>14}"
          + (f" {'below ' + format(args.threshold_mw, 'g') + ' MW':>12}" if args.threshold_mw is not None else ""))
    for b, e in summary["connections"].items():
        med, low = e.get("export_headroom_mw_median", float("nan")), e.get("export_headroom_mw_min", float("nan"))
        print(f"{b:>6} {e['certified']:>9} {e['failed']:>6} {med:>17.2f} {low:>14.2f}"
              + (f" {e['intervals_below_threshold']:>12}" if args.threshold_mw is not None else ""))
    for name, path in {**run.files, "summary": out / "summary.json", "figure": out / "envelopes.png",
                       "report": report}.items():
        print(f"wrote {path}")
    return EXIT_OK


def _cmd_profile_demo(args: argparse.Namespace) -> int:
    from .envelopes import demo_profile
    path = demo_profile(read_case(demo_case_path()), args.out, args.hours, args.seed)
    print(f"wrote {path} ({args.hours} invented hourly intervals for the demo grid)")
    return EXIT_OK


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="robustbox", description="Certified inner boxes of injections for AC power flow.")
    p.add_argument("--debug", action="store_true", help="show tracebacks")
    sub = p.add_subparsers(dest="command", required=True)
    c = sub.add_parser("certify", help="certify a box of injections on a case file")
    c.add_argument("case")
    c.add_argument("--uncertain", type=_uncertain, default="loads",
                   help="loads | renewables | comma-separated bus numbers (sites injecting 0..band×100 MW)")
    c.add_argument("--band", type=float, default=0.05, help="requested band (fraction; default 0.05)")
    c.add_argument("--objective", choices=["uniform", "hosting", "widths", "volume"], default="uniform",
                   help="uniform fraction of the band | hosting (upper ends, lower fixed) | widths | volume")
    c.add_argument("--margin", type=float, default=None,
                   help="limit margin of the operating-point OPF (default 0.1; with --contingencies 0.1, 0.05, 0.02, "
                        "0.01 are tried in turn)")
    c.add_argument("--point", help="operating point JSON (from 'robustbox opf') instead of the margin OPF")
    c.add_argument("--policy", choices=["slack", "distributed"], default=None,
                   help="recourse policy (default slack; with --contingencies distributed)")
    c.add_argument("--max-fraction", type=float, default=1.0, help="look beyond the band up to this fraction")
    c.add_argument("--out", help="write the result JSON here")
    c.add_argument("--report", help="write figures and report.html into this folder")
    c.add_argument("--slice", help="two injections for the report's 2-D slice, e.g. p[9],p[17] (default: first two)")
    c.add_argument("--contingencies", help="n-1 (every in-service branch and generator) or a contingency file "
                   "(docs/file-format.md): certify the box on every post-outage network too")
    c.add_argument("--skip-insecure", action="store_true",
                   help="with --contingencies: leave out (and list) outages after which no operating point exists")
    c.add_argument("--scheduler", help="Dask scheduler address tcp://host:port for the outages (default: a LocalCluster)")
    c.add_argument("--workers", type=int, help="LocalCluster worker processes (default min(2, CPUs))")
    c.add_argument("--serial", action="store_true", help="certify the outages in this process, without Dask")
    c.set_defaults(func=_cmd_certify)
    k = sub.add_parser("check", help="independently validate a saved box by sampling power flows")
    k.add_argument("case")
    k.add_argument("box")
    k.add_argument("--samples", type=int, default=300)
    k.add_argument("--quiet", action="store_true")
    k.set_defaults(func=_cmd_check)
    o = sub.add_parser("opf", help="solve the AC-OPF (operating point)")
    o.add_argument("case")
    o.add_argument("--margin", type=float, default=0.0)
    o.add_argument("--out")
    o.set_defaults(func=_cmd_opf)
    d = sub.add_parser("demo", help="the whole job on the built-in fictional demo grid")
    d.add_argument("--out", help="report folder (default: a new folder here)")
    d.set_defaults(func=_cmd_demo)
    e = sub.add_parser("envelopes", help="certified per-connection import/export limits for every interval of a profile")
    e.add_argument("case", help="case file ('demo': the built-in fictional grid)")
    e.add_argument("profile", help="profile CSV: time column, then load / wind / solar / load@BUS / site@BUS scalings")
    e.add_argument("--connections", type=_buses, help="connection buses, e.g. 5,9,17 (default: the case's marked "
                   "sites, else the five largest-load PQ buses)")
    e.add_argument("--import-mw", type=float, default=50.0, help="requested import per connection, MW (default 50)")
    e.add_argument("--export-mw", type=float, default=50.0, help="requested export per connection, MW (default 50)")
    e.add_argument("--margin", type=float, default=0.05, help="limit margin of each interval's OPF (default 0.05)")
    e.add_argument("--point", choices=["opf", "flow"], default="opf",
                   help="operating point per interval: margin AC-OPF, or a power flow of the scaled case dispatch")
    e.add_argument("--policy", choices=["slack", "distributed"], default="distributed", help="recourse policy")
    e.add_argument("--threshold-mw", type=float, help="summary: count intervals whose certified export headroom is below this")
    e.add_argument("--out", default="envelopes", help="output folder (default ./envelopes); a rerun resumes it")
    e.add_argument("--fresh", action="store_true", help="discard what the output folder holds and start again")
    e.add_argument("--retry-failed", action="store_true", help="recompute the intervals recorded as failed")
    e.add_argument("--block", type=int, default=24, help="consecutive intervals per task (warm starts run inside)")
    e.add_argument("--serial", action="store_true", help="run in this process (no Dask)")
    e.add_argument("--workers", type=int, help="local Dask worker processes (default: min(2, CPUs))")
    e.add_argument("--scheduler", help="address of an existing Dask scheduler, e.g. tcp://10.0.0.5:8786")
    e.set_defaults(func=_cmd_envelopes)
    g = sub.add_parser("profile-demo", help="write an invented hourly profile for the demo grid")
    g.add_argument("out", help="CSV file to write")
    g.add_argument("--hours", type=int, default=8760)
    g.add_argument("--seed", type=int, default=2027)
    g.set_defaults(func=_cmd_profile_demo)
    return p


def _show_note(message, category, filename, lineno, file=None, line=None) -> None:
    """Print a RobustboxNote as one line; other warnings the usual way."""
    if issubclass(category, RobustboxNote):
        print(f"robustbox: note: {message}", file=sys.stderr)
    else:
        print(warnings.formatwarning(message, category, filename, lineno, line), end="", file=sys.stderr)


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    with warnings.catch_warnings():
        warnings.simplefilter("default", RobustboxNote)
        warnings.showwarning = _show_note
        return _run(args)


def _run(args: argparse.Namespace) -> int:
    try:
        return args.func(args)
    except (CaseFileError, NetworkError, OperatingPointError, QuadraticSystemError, ModelStructureError) as exc:
        if args.debug:
            raise
        print(f"robustbox: error: {exc}", file=sys.stderr)
        return EXIT_INPUT
    except (SolverError, CertificateError, RobustboxError) as exc:
        if args.debug:
            raise
        print(f"robustbox: error: {exc}", file=sys.stderr)
        return EXIT_SOLVE
    except KeyboardInterrupt:
        print("robustbox: interrupted", file=sys.stderr)
        return EXIT_SOLVE
    except Exception as exc:  # noqa: BLE001 - a bug of ours: one line, the traceback behind --debug
        if args.debug:
            raise
        print(f"robustbox: internal error ({type(exc).__name__}: {exc}); run again with --debug and report it",
              file=sys.stderr)
        return EXIT_SOLVE


if __name__ == "__main__":
    sys.exit(main())
