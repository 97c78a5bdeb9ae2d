"""Compare the remainder bounds (plain, eigen-split, anchored, combined, and the tightest per row).

Prints, side by side in one run, the certified fraction of a ±100 % load band and the certificate
time on several networks (PGLib-OPF v23.07 cases from ../shared/data/pglib-opf or $ROBUSTBOX_PGLIB).
Run: python bench/remainder_bounds.py [case names...]
"""
from __future__ import annotations

import sys
import time

from robustbox.bounds import RemainderOptions
from robustbox.certify import CertifyOptions, certify
from robustbox.errors import RobustboxError
from robustbox.grid.casefile import read_case
from robustbox.grid.model import solve_opf
from robustbox.grid.system import build_system, load_injections

from pglib import case_path  # noqa: E402 - sibling module of the bench scripts

CASES = sys.argv[1:] or ["pglib_opf_case5_pjm", "pglib_opf_case14_ieee", "pglib_opf_case30_as", "pglib_opf_case39_epri",
                         "pglib_opf_case57_ieee", "pglib_opf_case118_ieee"]
METHODS = [("plain",), ("eigen",), ("anchored",), ("combined",), ("plain", "eigen", "anchored", "combined")]

print(f"{'case':<26}" + "".join(f"{'+'.join(m):>26}" for m in METHODS[:-1]) + f"{'all (tightest per row)':>26}")
for name in CASES:
    net = read_case(case_path(name))
    opf = solve_opf(net, 0.05, compare_base=False)
    ns = build_system(net, opf.point, load_injections(net, 1.0))
    cells = []
    for methods in METHODS:
        t0 = time.perf_counter()
        try:
            cert = certify(ns.system, ns.point, options=CertifyOptions(max_fraction=100.0,
                                                                        remainder=RemainderOptions(methods=methods)))
            cells.append(f"{cert.certified_fraction:>12.4f} {time.perf_counter() - t0:>9.2f} s  ")
        except RobustboxError as exc:
            cells.append(f"{'no certificate':>24}  ")
            print(f"  {name} {'+'.join(methods)}: {exc}")
    print(f"{name:<26}" + "".join(f"{c:>26}" for c in cells), flush=True)
print("cells: certified fraction of a ±100 % load band (P and Q of every load), certificate wall time; 'no certificate'"
      " where a bound alone does not apply (combined: too large to store) or gives none")
