"""The ``robustbox`` command: certify, check, opf, demo.

Exit codes: 0 success; 1 a check found violations or a verified box was
rejected; 2 bad input (file, option, data); 3 a solver or certificate
failure.  Errors print one line; ``--debug`` shows the traceback.
"""
from __future__ import annotations

import argparse
import json
import math
import os
import re
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
        buses = [int(b) for b in text.split(",") if b.strip()]
    except ValueError:
        buses = []
    if not buses:
        raise argparse.ArgumentTypeError(f"--uncertain: 'loads', 'renewables' or bus numbers like 5,9,17 (got '{text}')")
    return buses


def _print_summary(data: dict) -> None:
    print(f"case: {data['case']}")
    print(f"scenario: {data['scenario']}")
    if "opf" in data:
        o = data["opf"]
        inc = o.get("cost_increase_per_h")
        print(f"operating point: AC-OPF margin {o['margin_fraction']:g}, cost {o['cost_per_h']:.2f} $/h"
              + (f" (+{inc:.2f} $/h over the untightened optimum)" if inc is not None else ""))
    print(f"status: {data['status']}   certified fraction of the band: {data['certified_fraction']:.4g}")
    print(f"binding: {data['binding_limit']}")
    rows = sorted(data["box"], key=_certified_share)
    print(f"{'bus':>6} {'qty':>3} {'nominal':>11} {'lower':>11} {'upper':>11}  unit  certified share of the band")
    for e in rows[:SUMMARY_ROWS]:
        print(f"{e['bus']:>6} {e['quantity']:>3} {e['nominal']:>11.5g} {e['lower']:>11.5g} {e['upper']:>11.5g}  "
              f"{e['unit']:<4}  {_certified_share(e):.4g}")
    if len(rows) > SUMMARY_ROWS:
        print(f"... {len(rows) - SUMMARY_ROWS} more injections (tightest first above; all of them in --out / --csv)")
    print(f"time: {data['timings_s']['total_s']:.2f} s (certificate)")


SUMMARY_ROWS = 20  # box rows printed on the console (common practice, no source)


def _certified_share(e: dict) -> float:
    """Certified width over requested width of one box entry (1 when nothing was requested)."""
    asked = e["requested_upper"] - e["requested_lower"]
    return (e["upper"] - e["lower"]) / asked if asked > 0 else 1.0


def _fresh_output(path: str | None, what: str, folder: bool = False) -> None:
    """Refuse, before any computation, an output that exists (a file; a folder may exist) or whose folder does not."""
    if not path:
        return
    p = Path(path)
    if not folder and p.exists():
        raise NetworkError(f"{what} {path} exists; remove it or choose another name")
    if folder and p.exists() and not p.is_dir():
        raise NetworkError(f"{what} {path} exists and is not a folder")
    parent = p.parent if not folder else p.parent
    if not parent.exists():
        raise NetworkError(f"{what} {path}: the folder {parent} does not exist")


def _cmd_certify(args: argparse.Namespace) -> int:
    from .study import certify_case, result_to_json, save_json, write_box_csv
    if not (args.band > 0 and math.isfinite(args.band)):
        raise NetworkError(f"--band must be a positive number, got {args.band}")
    if args.uncertain == "loads" and args.band >= 1.0:
        raise NetworkError(f"--band {args.band:g} with --uncertain loads lets loads reach zero or change sign; "
                           "use a band below 1 (a fraction of each load)")
    if args.max_fraction is None:
        args.max_fraction = HOSTING_REACH if args.objective == "hosting" else 1.0
    if not (args.max_fraction > 0 and math.isfinite(args.max_fraction)):
        raise NetworkError(f"--max-fraction must be a positive number, got {args.max_fraction}")
    if args.margin is not None and not (0 <= args.margin < 0.5):
        raise NetworkError(f"--margin must be in [0, 0.5), got {args.margin}")
    _fresh_output(args.out, "--out")
    _fresh_output(args.csv, "--csv")
    _fresh_output(args.report, "--report", folder=True)
    pair = _slice_pair(args.slice)
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
        res = certify_case(args.case, args.uncertain, args.band, args.objective, args.margin, point,
                           args.policy or "slack", CertifyOptions(max_fraction=args.max_fraction),
                           point_source=args.point or "point file", say=_say(args), site_mw=args.site_mw)
        data = result_to_json(res)
        _print_summary(data)
    if args.out:
        save_json(data, args.out)
        print(f"wrote {args.out}")
    if args.csv:
        write_box_csv(data, args.csv)
        print(f"wrote {args.csv}")
    if args.report:
        from .report import write_report
        say = _say(args)
        if say:
            say("report: sampling the slice and drawing the figures")
        print(f"wrote {write_report(res, args.report, pair=pair)}")
    return EXIT_OK


def _slice_pair(text: str | None) -> tuple[str, str] | None:
    """The --slice pair, checked for form before any computation (names are checked against the box later)."""
    if not text:
        return None
    pair = tuple(x.strip() for x in text.split(","))
    if len(pair) != 2 or not all(re.fullmatch(r"[pq]\[\d+\]", x) for x in pair) or pair[0] == pair[1]:
        raise NetworkError(f"--slice needs two different injections like p[9],q[17]; got '{text}'")
    return pair  # type: ignore[return-value]


def _cmd_check(args: argparse.Namespace) -> int:
    from .study import check_box
    net = read_case(args.case)
    try:
        data = json.loads(Path(args.box).read_text())
    except (OSError, json.JSONDecodeError) as exc:
        raise OperatingPointError(f"{args.box}: cannot read the box file ({exc})") from None
    quiet = getattr(args, "quiet", False)
    rep = check_box(net, data, args.samples, source=args.box, progress=_progress(sys.stderr.isatty() and not quiet))
    print(f"checked {rep.points} points ({rep.vertices} vertices): {rep.violations} with violations, "
          f"{rep.not_converged} power flows not converged")
    for key, val in sorted(rep.worst_margin.items()):
        print(f"  worst margin {key}: {val:.5g}")
    for ex in rep.examples:
        print(f"  {ex}")
    return EXIT_OK if rep.passed else EXIT_VIOLATION


def _cmd_opf(args: argparse.Namespace) -> int:
    from .grid.model import find_operating_point
    from .study import point_to_json, save_json
    _fresh_output(args.out, "--out")
    if args.margin is not None and not (0 <= args.margin < 0.5):
        raise NetworkError(f"--margin must be in [0, 0.5), got {args.margin}")
    net = read_case(args.case)
    res = find_operating_point(net, args.margin, _say(args))
    data = point_to_json(net, res.point)
    data.update({"margin_fraction": res.margin, "untightened_cost_per_h": res.base_objective_per_h,
                 "cost_increase_per_h": res.cost_increase_per_h, "time_s": res.time_s})
    print(f"AC-OPF {'with margin ' + format(res.margin, 'g') if res.margin else '(no margin)'}: "
          f"{res.objective_per_h:.4f} $/h, {res.status}, {res.time_s:.2f} s")
    if res.cost_increase_per_h is not None:
        print(f"cost increase over the untightened optimum: {res.cost_increase_per_h:.4f} $/h "
              f"({res.cost_increase_pct:.3f} %)")
    if args.out:
        save_json(data, args.out)
        print(f"wrote {args.out}")
    return EXIT_OK


def _say(args: argparse.Namespace):
    """One line per step to stderr on a terminal, unless --quiet."""
    if getattr(args, "quiet", False) or not sys.stderr.isatty():
        return None
    return lambda line: print(f"robustbox: {line}", file=sys.stderr, flush=True)


def _cmd_demo(args: argparse.Namespace) -> int:
    from .report import write_report
    from .study import certify_case, check_box, result_to_json, save_json
    _fresh_output(args.out, "--out", folder=True)
    out = Path(args.out) if args.out else Path.cwd() / time.strftime("robustbox-demo-%Y%m%d-%H%M%S")
    out.mkdir(parents=True, exist_ok=True)
    case = demo_case_path()
    print("Lakeholm regional network (fictional demo grid): how much wind and solar can each marked site host, "
          f"up to {DEMO_REACH:g} × its planned capacity?")
    res = certify_case(case, "renewables", 1.0, "hosting", options=CertifyOptions(max_fraction=DEMO_REACH),
                       say=_say(args))
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


DEMO_REACH = 3.0  # the demo asks for up to three times each site's planned capacity (invented scenario)
HOSTING_REACH = 10.0  # default search reach of --objective hosting, × the band (common practice, no source)
MARGIN_HELP = ("limit margin of the operating-point AC-OPF: every limit tightened by this fraction of its range "
               "(flows: of the rating). Default: the largest of 0.1, 0.05, 0.02, 0.01, 0.005, 0.002, 0.001 that "
               "solves; 0: the untightened optimum (no room: a zero box)")


def build_parser() -> argparse.ArgumentParser:
    from . import __version__
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("--debug", action="store_true", default=argparse.SUPPRESS,
                        help="show Python tracebacks instead of one-line errors")
    common.add_argument("--quiet", action="store_true", default=argparse.SUPPRESS,
                        help="no progress lines on the terminal (results are still printed)")
    p = argparse.ArgumentParser(prog="robustbox", parents=[common],
                                description="Certified inner boxes of injections for AC power flow.")
    p.add_argument("--version", action="version", version=f"robustbox {__version__}")
    sub = p.add_subparsers(dest="command", required=True, parser_class=lambda **kw: argparse.ArgumentParser(
        parents=[common], **kw))
    c = sub.add_parser("certify", help="certify a box of injections on a case file")
    c.add_argument("case", help="case file (MATPOWER format, e.g. a PGLib-OPF .m file)")
    c.add_argument("--uncertain", type=_uncertain, default="loads",
                   help="loads | renewables | comma-separated bus numbers (sites injecting 0..band×100 MW)")
    c.add_argument("--band", type=float, default=0.05,
                   help="requested band (default 0.05): with loads, each load's P and Q within ±band × nominal "
                        "(below 1); with renewables, each marked site from nominal up to band × its capacity "
                        "(unmarked cases: five sites up to band × 100 MW); with bus numbers, each site up to "
                        "band × 100 MW")
    c.add_argument("--objective", choices=["uniform", "hosting", "widths", "volume"], default="uniform",
                   help="uniform: the largest common fraction of the band | hosting: each site's own largest upper "
                        "end (the sum is maximised; lower ends kept), searched up to --max-fraction (default 10) × "
                        "the band | widths: the largest sum of relative widths | volume: the largest log-volume; "
                        "widths, hosting and volume never do worse than uniform")
    c.add_argument("--site-mw", type=float, default=100.0,
                   help="size of a site given by bus number (and of the five default renewable sites), MW: each "
                        "injects 0..band × site-mw (default 100)")
    c.add_argument("--margin", type=float, default=None, help=MARGIN_HELP)
    c.add_argument("--point", help="operating point JSON (from 'robustbox opf') instead of the margin OPF")
    c.add_argument("--policy", choices=["slack", "distributed"], default=None,
                   help="recourse policy (default slack; with --contingencies distributed)")
    c.add_argument("--max-fraction", type=float, default=None,
                   help="look beyond the band up to this multiple of it (default 1: stop at the band; "
                        f"{HOSTING_REACH:g} for --objective hosting)")
    c.add_argument("--out", help="write the result JSON (the box file) here; must not exist")
    c.add_argument("--csv", help="write the box as CSV here (one row per injection, MW/Mvar); must not exist")
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
    k.add_argument("case", help="case file the box was certified on")
    k.add_argument("box", help="box file written by 'robustbox certify --out'")
    k.add_argument("--samples", type=int, default=300,
                   help="random interior points (and random vertices beyond 10 injections); default 300, ≥ 1")
    k.set_defaults(func=_cmd_check)
    o = sub.add_parser("opf", help="solve the AC-OPF (operating point)")
    o.add_argument("case", help="case file (MATPOWER format)")
    o.add_argument("--margin", type=float, default=None, help=MARGIN_HELP)
    o.add_argument("--out", help="write the operating point JSON here (for certify --point); must not exist")
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
    except BrokenPipeError:  # e.g. `robustbox certify ... | head`: the reader left, nothing to report
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())  # no second error at interpreter exit
        return EXIT_OK
    except (CaseFileError, NetworkError, OperatingPointError, QuadraticSystemError, ModelStructureError) as exc:
        if getattr(args, "debug", False):
            raise
        print(f"robustbox: error: {exc}", file=sys.stderr)
        return EXIT_INPUT
    except (SolverError, CertificateError, RobustboxError) as exc:
        if getattr(args, "debug", False):
            raise
        print(f"robustbox: error: {exc}", file=sys.stderr)
        return EXIT_SOLVE
    except KeyboardInterrupt:
        print("robustbox: interrupted", file=sys.stderr)
        return EXIT_SOLVE
    except Exception as exc:  # noqa: BLE001 - a bug of ours: one line, the traceback behind --debug
        if getattr(args, "debug", False):
            raise
        print(f"robustbox: internal error ({type(exc).__name__}: {exc}); run again with --debug and report it",
              file=sys.stderr)
        return EXIT_SOLVE


if __name__ == "__main__":
    sys.exit(main())
