"""Operating envelopes over time: speed-up on 1 and 2 local Dask workers, per-task costs, the two run targets.

Measured side by side in one run:
  1. the demo grid, 48 invented hours in blocks of 6: serial, Dask with 1 worker, Dask with 2 workers
     (the speed-up, and the per-task costs a scaling model to N workers needs: compute time per block,
     bytes shipped per task and back, scheduler overhead per task from no-op tasks on the same cluster);
  2. case118 (PGLib-OPF v23.07), 24 hours, its five largest-load PQ buses: target ≤ 5 min;
  3. with --year: the demo grid over 8,760 invented hours on 2 workers: target ≤ 30 min.
Writes bench/results/envelopes.json and bench/results/envelopes.md (included in docs/benchmarks.md by
bench/render_benchmarks.py).  Run: python bench/envelopes.py [--year]
"""
from __future__ import annotations

import json
import math
import os
import pickle
import sys
import tempfile
import time
from pathlib import Path

from robustbox.cli import demo_case_path
from robustbox.envelopes import (Block, EnvelopeSettings, default_connections, demo_profile, read_profile,
                                 run_block, run_envelopes)
from robustbox.fanout import FanOut, run_all
from robustbox.grid.casefile import read_case

from pglib import case_path  # noqa: E402 - sibling module of the bench scripts

OUT = Path(__file__).resolve().parent / "results"


def timed_run(net, profile, settings, how: FanOut) -> tuple[float, int]:
    with tempfile.TemporaryDirectory() as folder:
        t0 = time.perf_counter()
        run = run_envelopes(net, profile, settings, folder, how)
        return time.perf_counter() - t0, run.failed


def scheduler_overhead_s(workers: int, tasks: int = 400) -> float:
    """Wall time per no-op task on a LocalCluster (cluster start-up excluded)."""
    from distributed import Client, LocalCluster
    with LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, dashboard_address=None) as cluster, \
            Client(cluster):
        run_all(math.sqrt, list(range(20)), FanOut(scheduler=cluster.scheduler_address))  # warm the workers
        t0 = time.perf_counter()
        run_all(math.sqrt, list(range(tasks)), FanOut(scheduler=cluster.scheduler_address))
        return (time.perf_counter() - t0) / tasks


def cluster_start_s(workers: int) -> float:
    t0 = time.perf_counter()
    run_all(math.sqrt, [1.0], FanOut(workers=workers))
    return time.perf_counter() - t0


def main() -> None:
    year = "--year" in sys.argv
    OUT.mkdir(exist_ok=True)
    res: dict = {"load_average_at_start": os.getloadavg()[0]}
    demo = read_case(demo_case_path())
    tmp = Path(tempfile.mkdtemp())
    prof48 = read_profile(demo_profile(demo, tmp / "demo48.csv", hours=48), demo)
    st = EnvelopeSettings(default_connections(demo), block_intervals=6)
    t_serial, _ = timed_run(demo, prof48, st, FanOut(serial=True))
    t_1, _ = timed_run(demo, prof48, st, FanOut(workers=1))
    t_2, _ = timed_run(demo, prof48, st, FanOut(workers=2))
    block = Block(demo, prof48.rows(range(6)), tuple(range(6)), st)
    t0 = time.perf_counter()
    out = run_block(block)
    t_block = time.perf_counter() - t0
    res["demo_48h"] = {"blocks": 8, "intervals": 48, "serial_s": t_serial, "dask_1_worker_s": t_1,
                       "dask_2_workers_s": t_2, "speedup_2_vs_1": t_1 / t_2,
                       "block_compute_s": t_block, "interval_compute_s": t_block / 6,
                       "task_bytes_in": len(pickle.dumps(block)), "task_bytes_out": len(pickle.dumps(out)),
                       "scheduler_overhead_per_task_s": scheduler_overhead_s(2),
                       "cluster_start_s": cluster_start_s(2)}
    print(json.dumps(res["demo_48h"], indent=2), flush=True)

    path = case_path("pglib_opf_case118_ieee")
    if path.exists():
        net = read_case(path)
        prof = read_profile(demo_profile(net, tmp / "case118_24.csv", hours=24), net)
        st118 = EnvelopeSettings(default_connections(net), block_intervals=6)
        t, failed = timed_run(net, prof, st118, FanOut(workers=2))
        res["case118_24h"] = {"connections": list(st118.connections), "wall_s": t, "failed": failed,
                              "target_s": 300.0, "met": t <= 300.0}
        print(json.dumps(res["case118_24h"], indent=2), flush=True)
    else:
        res["case118_24h"] = {"skipped": f"PGLib-OPF data not found at {path}"}
    if year:
        prof_y = read_profile(demo_profile(demo, tmp / "demo_year.csv", hours=8760), demo)
        sty = EnvelopeSettings(default_connections(demo), block_intervals=24)
        t, failed = timed_run(demo, prof_y, sty, FanOut(workers=2))
        res["demo_8760h"] = {"wall_s": t, "failed_intervals": failed, "target_s": 1800.0, "met": t <= 1800.0}
        print(json.dumps(res["demo_8760h"], indent=2), flush=True)
    res["load_average_at_end"] = os.getloadavg()[0]
    (OUT / "envelopes.json").write_text(json.dumps(res, indent=2), encoding="utf-8")
    (OUT / "envelopes.md").write_text(render(res), encoding="utf-8")
    print(f"wrote {OUT / 'envelopes.json'} and {OUT / 'envelopes.md'}")


def render(res: dict) -> str:
    d = res["demo_48h"]
    c = d["interval_compute_s"]
    o = d["scheduler_overhead_per_task_s"]
    lines = ["## Operating envelopes over time (`robustbox envelopes`)", "",
             "Measured by `python bench/envelopes.py --year` on this 2-core machine (three certificates and one "
             "margin AC-OPF per interval). 1-minute load average of the machine at the start and end of the run: "
             f"{res['load_average_at_start']:.1f} / {res['load_average_at_end']:.1f} (2 cores: above 2, other work "
             "shared the cores and the times are upper bounds).", "",
             "| run | wall s | target | met |", "|---|---|---|---|",
             f"| demo grid, 48 h, serial | {d['serial_s']:.1f} | | |",
             f"| demo grid, 48 h, Dask 1 worker | {d['dask_1_worker_s']:.1f} | | |",
             f"| demo grid, 48 h, Dask 2 workers | {d['dask_2_workers_s']:.1f} | speed-up {d['speedup_2_vs_1']:.2f}× "
             "over 1 worker | |"]
    r = res.get("case118_24h", {})
    if "wall_s" in r:
        lines.append(f"| case118, 24 h, 5 connections, 2 workers | {r['wall_s']:.1f} | ≤ 300 | "
                     f"{'yes' if r['met'] else 'NO'} |")
    y = res.get("demo_8760h")
    if y:
        lines.append(f"| demo grid, 8,760 h, 2 workers | {y['wall_s']:.0f} | ≤ 1800 | {'yes' if y['met'] else 'NO'} "
                     f"({y['failed_intervals']} intervals failed, recorded) |")
    lines += ["", "Per-task costs (a task is a block of consecutive intervals):", "",
              f"- compute: {c:.3f} s per interval ({d['block_compute_s']:.2f} s per block of 6);",
              f"- shipped: {d['task_bytes_in'] / 1e3:.1f} kB to the worker (network tables, the block's profile rows, "
              f"settings) and {d['task_bytes_out'] / 1e3:.1f} kB back (rows and operating points);",
              f"- scheduler overhead: {o * 1e3:.2f} ms per task (no-op tasks on the same 2-worker cluster); "
              f"cluster start-up {d['cluster_start_s']:.1f} s.", "",
              "Scaling to N workers: a run of I intervals in blocks of b costs about "
              "start-up + ⌈I/b / N⌉ · b · compute + (I/b) · overhead. For the year (I = 8,760, b = 24, "
              f"365 tasks) the overhead is {365 * o:.1f} s in all, so the run stays compute-bound: "
              + ", ".join(f"N = {n}: ≈ {d['cluster_start_s'] + math.ceil(365 / n) * 24 * c:.0f} s" for n in (2, 8, 32))
              + " (once N exceeds the number of blocks, smaller blocks are the lever; each block starts its "
              "warm-start chain cold). The tasks ship kilobytes, so a remote scheduler's network is not the limit.",
              ""]
    return "\n".join(lines)


if __name__ == "__main__":
    main()
