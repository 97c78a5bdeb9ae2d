"""Large PGLib-OPF cases: certificate time, peak memory and validation (no true-region bisection).

For each case: the margin AC-OPF (margin 0.05), one plain AC-OPF solve for the time ratio, the certificate
for scenario A (loads ± t × nominal), its validation by sampling (random vertices and interior points),
and the process's peak resident memory.  Results: bench/results/large_cases.json (rendered by
bench/render_benchmarks.py).

Run: python bench/large_cases.py [case names]   (default: pglib_opf_case1354_pegase)
"""
from __future__ import annotations

import json
import resource
import sys
import time
from pathlib import Path

from robustbox.certify import CertifyOptions, certify
from robustbox.errors import RobustboxError
from robustbox.grid.casefile import read_case
from robustbox.grid.model import solve_opf
from robustbox.grid.system import build_system, load_injections
from robustbox.validate import validate_box

from pglib import case_path  # noqa: E402 - sibling module of the bench scripts

OUT = Path(__file__).resolve().parent / "results" / "large_cases.json"


def main() -> None:
    names = sys.argv[1:] or ["pglib_opf_case1354_pegase"]
    records = json.loads(OUT.read_text()) if OUT.exists() else []
    for name in names:
        net = read_case(case_path(name))
        t0 = time.perf_counter()
        solve_opf(net, compare_base=False)
        opf_time = time.perf_counter() - t0
        rec = {"case": name, "buses": net.n_bus, "opf_time_s": opf_time}
        try:
            opf = solve_opf(net, 0.05, compare_base=False)
            ns = build_system(net, opf.point, load_injections(net, 1.0))
            t1 = time.perf_counter()
            cert = certify(ns.system, ns.point, options=CertifyOptions(max_fraction=1e4))
            rec.update({"cert_time_s": time.perf_counter() - t1, "certified_t": cert.certified_fraction,
                        "binding": cert.binding, "uncertain": len(ns.injections)})
            val = validate_box(net, opf.point, ns.injections, cert.lower, cert.upper, samples=100)
            rec.update({"validation_points": val.points, "validation_violations": val.violations + val.not_converged})
        except RobustboxError as exc:
            rec["error"] = str(exc)
        rec["peak_rss_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
        records = [r for r in records if r["case"] != name] + [rec]
        OUT.write_text(json.dumps(records, indent=1, default=float))
        print(json.dumps(rec, default=float), flush=True)


if __name__ == "__main__":
    main()
