"""AC-OPF wall time: our Ipopt bridge vs PYPOWER's runopf (independent reference), side by side.

Both solve the same PGLib-OPF case (PYPOWER gets the tables our reader parsed; it cannot read .m files).  Prints
objective and time of each and the time ratio.  Run: python bench/opf_time.py [case names...]
"""
from __future__ import annotations

import sys
import time

from robustbox.grid.casefile import read_case
from robustbox.grid.model import solve_opf

from pglib import case_path  # noqa: E402 - sibling module of the bench scripts

CASES = sys.argv[1:] or ["pglib_opf_case14_ieee", "pglib_opf_case30_ieee", "pglib_opf_case118_ieee",
                         "pglib_opf_case300_ieee", "pglib_opf_case1354_pegase", "pglib_opf_case2000_goc"]

try:
    from pypower.api import ppoption, runopf
except ImportError:  # reference library of the test extra
    sys.exit("PYPOWER is needed for the reference column: pip install '.[test]'")

print(f"{'case':<28}{'ours $/h':>14}{'ours s':>9}{'PYPOWER $/h':>14}{'PYPOWER s':>11}{'ratio':>8}")
for name in CASES:
    path = case_path(name)
    t0 = time.perf_counter()
    net = read_case(path)
    ours = solve_opf(net)
    t_ours = time.perf_counter() - t0
    t0 = time.perf_counter()
    try:
        ppc = {"version": "2", "baseMVA": net.base_mva, "bus": net.bus.copy(), "gen": net.gen.copy(),
               "branch": net.branch.copy(), "gencost": net.gencost.copy()}
        ref = runopf(ppc, ppoption(VERBOSE=0, OUT_ALL=0))
        ref_obj, ok = ref["f"], ref["success"]
    except Exception as exc:  # noqa: BLE001 - the reference may fail on a case; say so
        ref_obj, ok = float("nan"), False
        print(f"  PYPOWER failed on {name}: {exc}")
    t_ref = time.perf_counter() - t0
    print(f"{name:<28}{ours.objective_per_h:>14.2f}{t_ours:>9.2f}{ref_obj:>14.2f}{t_ref:>11.2f}"
          f"{t_ours / t_ref:>8.2f}{'' if ok else '  (reference did not converge)'}", flush=True)
