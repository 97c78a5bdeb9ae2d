"""The command's defaults on every shared PGLib-OPF v23.07 TYP case up to 2,000 buses.

For each case and each of `--uncertain loads` and `--uncertain renewables`, with no other option
(the default operating point: the largest margin of the ladder that solves), one process runs
`robustbox certify CASE --uncertain U --out box.json`; the table records the exit code, the chosen
margin, the cost increase over the untightened optimum, the certified fraction and the wall time.
Writes bench/results/default_point.json and bench/results/default_point.md (included in
docs/benchmarks.md by bench/render_benchmarks.py).  Run: python bench/default_point.py [MAX_BUSES]
[--only case1888_rte,...] (reruns those cases and replaces their rows).
"""
from __future__ import annotations

import json
import re
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from pglib import DATA  # noqa: E402 - sibling module of the bench scripts

OUT = Path(__file__).resolve().parent / "results"


def buses_of(path: Path) -> int:
    m = re.search(r"case(\d+)", path.name)
    return int(m.group(1)) if m else 0


def run(path: Path, uncertain: str, folder: Path) -> dict:
    box = folder / f"{path.stem}_{uncertain}.json"
    t0 = time.perf_counter()
    proc = subprocess.run([sys.executable, "-m", "robustbox.cli", "certify", str(path), "--uncertain", uncertain,
                           "--out", str(box)], capture_output=True, text=True, timeout=3600)
    row = {"case": path.stem.replace("pglib_opf_", ""), "buses": buses_of(path), "uncertain": uncertain,
           "exit": proc.returncode, "wall_s": time.perf_counter() - t0}
    if proc.returncode == 0:
        data = json.loads(box.read_text(encoding="utf-8"))
        opf = data["opf"]
        row.update(margin=opf["margin_fraction"], certified_fraction=data["certified_fraction"],
                   cost_increase_pct=100.0 * opf["cost_increase_per_h"] / abs(opf["untightened_cost_per_h"]))
    else:
        row["error"] = proc.stderr.strip().splitlines()[-1][:300] if proc.stderr.strip() else "(no message)"
    return row


def main() -> None:
    args = sys.argv[1:]
    only = args[args.index("--only") + 1].split(",") if "--only" in args else None
    limit = int(args[0]) if args and args[0].isdigit() else 2000
    cases = sorted((p for p in DATA.glob("pglib_opf_case*.m") if buses_of(p) <= limit), key=buses_of)
    if only:  # rerun these cases and replace their rows in the stored table
        cases = [p for p in cases if p.stem.replace("pglib_opf_", "") in only]
    if not cases:
        sys.exit(f"no PGLib-OPF cases found in {DATA} (set ROBUSTBOX_PGLIB)")
    stored = OUT / "default_point.json"
    rows = [r for r in json.loads(stored.read_text(encoding="utf-8")) if r["case"] not in only] \
        if only and stored.exists() else []
    with tempfile.TemporaryDirectory() as tmp:
        for path in cases:
            for uncertain in ("loads", "renewables"):
                rows.append(run(path, uncertain, Path(tmp)))
                print(json.dumps(rows[-1]), flush=True)
    rows.sort(key=lambda r: (r["buses"], r["case"], r["uncertain"]))
    OUT.mkdir(exist_ok=True)
    stored.write_text(json.dumps(rows, indent=2), encoding="utf-8")
    ok = sum(r["exit"] == 0 and r.get("certified_fraction", 0) > 0 for r in rows)
    lines = ["## Defaults on every TYP case (`robustbox certify CASE --uncertain loads|renewables`)", "",
             f"Measured by `python bench/default_point.py` on this 2-core machine: {ok} of {len(rows)} runs exit 0 "
             "with a nonzero certified box. Margin: the largest of 0.1, 0.05, 0.02, 0.01, 0.005, 0.002, 0.001 whose AC-OPF solves.",
             "", "| case | buses | uncertain | exit | margin | cost +% over untightened | certified fraction | wall s |",
             "|---|---|---|---|---|---|---|---|"]
    for r in rows:
        if r["exit"] == 0:
            lines.append(f"| {r['case']} | {r['buses']} | {r['uncertain']} | 0 | {r['margin']:g} | "
                         f"{r['cost_increase_pct']:.2f} | {r['certified_fraction']:.4g} | {r['wall_s']:.1f} |")
        else:
            lines.append(f"| {r['case']} | {r['buses']} | {r['uncertain']} | {r['exit']} | – | – | – | "
                         f"{r['wall_s']:.1f} |")
    failed = [r for r in rows if r["exit"] != 0]
    if failed:
        lines += ["", "Messages of the runs that did not exit 0:", ""]
        lines += [f"- {r['case']} ({r['uncertain']}): {r['error']}" for r in failed]
    (OUT / "default_point.md").write_text("\n".join(lines) + "\n", encoding="utf-8")
    print(f"wrote {OUT / 'default_point.json'} and {OUT / 'default_point.md'}")


if __name__ == "__main__":
    main()
