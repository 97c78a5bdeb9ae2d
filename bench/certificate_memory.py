"""Peak memory of one certificate in a process of its own (large PGLib-OPF cases).

The margin AC-OPF point is computed first and handed over as a point file; then, for each scenario, a
fresh Python process reads the case and the point, builds the system and certifies (scenario A: loads
± t; B: five sites 0..t × 100 MW), and reports its peak resident set size (ru_maxrss) and wall time. This
isolates the certificate from the OPF and from the benchmark's own arrays. Results:
bench/results/certificate_memory.json, rendered by bench/render_benchmarks.py.

Run: python bench/certificate_memory.py [case names]   (default: pglib_opf_case1354_pegase pglib_opf_case2000_goc)
"""
from __future__ import annotations

import json
import subprocess
import sys
import tempfile
from pathlib import Path

OUT = Path(__file__).resolve().parent / "results" / "certificate_memory.json"

CHILD = """
import json, resource, sys, time
from robustbox.certify import CertifyOptions, certify
from robustbox.grid.casefile import read_case
from robustbox.grid.system import build_system, largest_load_pq_buses, load_injections, site_injections
from robustbox.study import point_from_json
case, point_file, scen = sys.argv[1:4]
net = read_case(case)
op = point_from_json(net, json.loads(open(point_file).read()), point_file)
inj = load_injections(net, 1.0) if scen == "A" else site_injections(net, largest_load_pq_buses(net, 5), 1.0)
ns = build_system(net, op, inj)
t0 = time.perf_counter()
cert = certify(ns.system, ns.point, options=CertifyOptions(max_fraction=1e4))
print(json.dumps({"certified_t": cert.certified_fraction, "cert_time_s": time.perf_counter() - t0,
                  "peak_rss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}))
"""


def main() -> None:
    from robustbox.grid.casefile import read_case
    from robustbox.grid.model import solve_opf
    from robustbox.study import point_to_json

    from pglib import case_path  # sibling module of the bench scripts

    names = sys.argv[1:] or ["pglib_opf_case1354_pegase", "pglib_opf_case2000_goc"]
    records = json.loads(OUT.read_text()) if OUT.exists() else []
    for name in names:
        path = case_path(name)
        net = read_case(path)
        opf = solve_opf(net, 0.1, compare_base=False)
        with tempfile.NamedTemporaryFile("w", suffix=".json", delete=False) as fh:
            json.dump(point_to_json(net, opf.point), fh)
        for scen in "AB":
            out = subprocess.run([sys.executable, "-c", CHILD, str(path), fh.name, scen], capture_output=True,
                                 text=True)
            if out.returncode != 0:  # report the child's last line and go on with the next scenario
                last = (out.stderr.strip().splitlines() or ["no output"])[-1]
                print(f"{name} {scen}: the certificate process failed: {last}", flush=True)
                continue
            rec = {"case": name, "scenario": scen, "margin": 0.1, **json.loads(out.stdout.strip().splitlines()[-1])}
            records = [r for r in records if (r["case"], r["scenario"]) != (name, scen)] + [rec]
            OUT.write_text(json.dumps(records, indent=1))
            print(json.dumps(rec), flush=True)
        Path(fh.name).unlink()


if __name__ == "__main__":
    main()
