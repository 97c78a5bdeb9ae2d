"""Time the N-1 certificates of PGLib case118 over all branch outages on 1 and 2 workers.

The operating point (preventive SCOPF, or with --point-margin the margin OPF only) is
computed once and excluded from the certificate timing; its time and cost are printed beside.
Target (bench/results, not a unit test): ≤ 60 s on 2 workers.
"""
from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from pglib import case_path  # noqa: E402

from robustbox.contingency import certify_secure, split_islanding  # noqa: E402
from robustbox.fanout import FanOut  # noqa: E402
from robustbox.grid.casefile import read_case  # noqa: E402
from robustbox.grid.model import solve_opf  # noqa: E402
from robustbox.grid.security import all_outages, solve_scopf  # noqa: E402
from robustbox.study import point_to_json  # noqa: E402


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--case", default="pglib_opf_case118_ieee")
    ap.add_argument("--margin", type=float, default=0.05)
    ap.add_argument("--point-margin", action="store_true", help="operating point from the margin OPF, no SCOPF")
    args = ap.parse_args()
    path = case_path(args.case)
    net = read_case(path)
    outages = [o for o in all_outages(net) if o.kind == "branch"]
    listing = Path(tempfile.mkdtemp()) / "branches.txt"
    listing.write_text("".join(f"branch row {o.row + 1}\n" for o in outages))
    t0 = time.perf_counter()
    if args.point_margin:
        opf = solve_opf(net, args.margin)
        point, what = opf.point, f"margin OPF {opf.objective_per_h:.2f} $/h (plain {opf.base_objective_per_h:.2f})"
    else:
        studied, _ = split_islanding(net, outages)
        sc = solve_scopf(net, studied, "distributed", args.margin, skip_insecure=True)
        point = sc.point
        what = (f"SCOPF {sc.objective_per_h:.2f} $/h (plain {sc.plain_objective_per_h:.2f}), {len(sc.included)} copies, "
                f"{len(sc.excluded)} outages left out")
    print(f"{args.case}: operating point in {time.perf_counter() - t0:.1f} s: {what}")
    data = point_to_json(net, point)
    for how in (FanOut(serial=True), FanOut(workers=1), FanOut(workers=2)):
        t = time.perf_counter()
        res = certify_secure(path, listing, "loads", 0.05, point=data, fanout=how, skip_insecure=True)
        print(f"{how.describe():40s} {time.perf_counter() - t:7.1f} s  fraction {res.fraction:.4g} "
              f"(intact {res.intact_fraction:.4g})  {res.counts()}")


if __name__ == "__main__":
    main()
