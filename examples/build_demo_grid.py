"""Build the fictional demo grid shipped with robustbox (robustbox/data/demo_grid.m).

"Lakeholm regional network": an invented 30-bus, 132 kV system.  A hydro
plant at Northfall (bus 1, slack), a gas plant at Kestrel Ford (bus 12) and a
combined-heat plant at Saltmere (bus 22); two wind farms (Grey Moor, bus 9;
Whitecap Ridge, bus 17) and three solar parks (Amberfield, bus 5; Sunvale,
bus 19; Copperleaf, bus 24); an industrial load pocket (Ironbridge works,
buses 26-30) fed through a weak double corridor.  All names and numbers are
made up for demonstrations; the file is not a model of any real grid.

Run: python examples/build_demo_grid.py  (rewrites robustbox/data/demo_grid.m)
"""
from pathlib import Path

import numpy as np

from robustbox.grid.casefile import write_case
from robustbox.grid.network import Network

BASE_MVA = 100.0
rng = np.random.default_rng(20261202)
n = 30
bus = np.zeros((n, 13))
bus[:, 0] = np.arange(1, n + 1)
bus[:, 1] = 1
bus[:, 6] = 1
bus[:, 7] = 1.0
bus[:, 9] = 132.0
bus[:, 10] = 1
bus[:, 11] = 1.07
bus[:, 12] = 0.93
loads = rng.uniform(8.0, 22.0, n)
loads[[0, 11, 21]] = [0.0, 10.0, 12.0]
loads[25:30] = [45.0, 38.0, 52.0, 30.0, 41.0]  # industrial pocket
bus[:, 2] = np.round(loads, 1)
bus[:, 3] = np.round(0.3 * loads, 1)
bus[[4, 18, 23], 5] = 0.0
bus[27, 5] = 15.0  # capacitor bank in the pocket (Mvar at 1 pu)
bus[0, 1] = 3
bus[[11, 21, 27], 1] = 2

# generators: bus, Pg, Qg, Qmax, Qmin, Vg, mBase, status, Pmax, Pmin
gen = np.array([
    [1, 200, 0, 180, -80, 1.03, 100, 1, 400, 0],
    [12, 150, 0, 140, -60, 1.02, 100, 1, 300, 20],
    [22, 120, 0, 120, -50, 1.02, 100, 1, 250, 20],
    [28, 40, 0, 60, -30, 1.01, 100, 1, 90, 10],
], dtype=float)
gencost = np.array([
    [2, 0, 0, 3, 0.004, 12.0, 0],
    [2, 0, 0, 3, 0.012, 28.0, 0],
    [2, 0, 0, 3, 0.010, 24.0, 0],
    [2, 0, 0, 3, 0.030, 45.0, 0],
], dtype=float)

links = [(i, i + 1) for i in range(1, 25)] + [(25, 1)]
links += [(1, 6), (3, 10), (6, 12), (8, 14), (12, 18), (14, 20), (16, 22), (18, 24), (20, 25), (11, 17), (4, 9)]
pocket = [(21, 26), (24, 27), (26, 27), (27, 28), (28, 29), (29, 30), (26, 30)]
rows = []
for f, t in links:
    r, x = rng.uniform(0.006, 0.012), rng.uniform(0.03, 0.06)
    rows.append([f, t, round(r, 4), round(x, 4), round(rng.uniform(0.02, 0.05), 4), 160, 160, 160, 0, 0, 1, -30, 30])
for f, t in pocket:
    weak = (f, t) in [(21, 26), (24, 27)]
    r, x = (0.03, 0.13) if weak else (0.01, 0.04)
    rows.append([f, t, r, x, 0.02, 150 if weak else 120, 150, 150, 0, 0, 1, -30, 30])
rows[5][8] = 0.98  # an off-nominal tap at the 6-7 transformer
branch = np.array(rows, dtype=float)

net = Network.from_tables("demo_grid", BASE_MVA, bus, gen, branch, gencost)
out = Path(__file__).resolve().parents[1] / "robustbox" / "data" / "demo_grid.m"
write_case(net, out)
text = out.read_text()
header = ("% Lakeholm regional network: a FICTIONAL 30-bus 132 kV demo grid for robustbox.\n"
          "% Invented names and data (examples/build_demo_grid.py); not a model of any real grid.\n"
          "% mpc.injection_site marks the renewable sites: bus, kind (1 wind, 2 solar), capacity in MW.\n")
sites = "mpc.injection_site = [\n\t9\t1\t60;\n\t17\t1\t50;\n\t5\t2\t30;\n\t19\t2\t40;\n\t24\t2\t35;\n];\n"
lines = text.splitlines()
out.write_text("\n".join(lines[:1] + header.splitlines() + lines[1:]) + "\n" + sites)
print(f"wrote {out}")
