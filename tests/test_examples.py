"""The day-ahead dispatch example (examples/day_ahead_dispatch.py) on the demo grid.

The outside reference here is the AC power flow itself (Newton, at every point checked): the
rewritten LP's objective must bound the true generation cost of the chosen dispatch at ≥ 200
sampled points of the wind/solar box, and the LP must choose the cheaper end of the box for every
flexible plant (judged by AC power flows, not by the LP).  The demo grid is invented data.
"""
from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "examples"))
import day_ahead_dispatch as example  # noqa: E402

from robustbox.grid.network import GEN_AT  # noqa: E402
from robustbox.grid.system import Injection  # noqa: E402
from robustbox.transform import box_of  # noqa: E402


@pytest.fixture(scope="module")
def study():
    return example.run(samples=200, verbose=False)


def test_lp_objective_bounds_the_ac_cost_over_the_box(study):
    assert study.report.passed and study.report.not_converged == 0
    assert np.count_nonzero(np.isfinite(study.ac_costs)) >= 200
    assert np.all(np.isfinite(study.ac_costs))
    assert np.all(study.ac_costs <= study.lp_bound + 1e-9)


def test_lp_picks_the_cheaper_end_for_every_flexible_plant(study):
    model, net, op = study.model, study.net, study.operating_point
    box = box_of(model)
    ends = {g: box[model.pg[g].name] for g in study.flexible}
    injections = [Injection(int(net.gen[net.gen_on[g], GEN_AT]), "p", 0, 0) for g in study.flexible]
    chosen = dict(zip(study.flexible, study.chosen_pu))
    for g in study.flexible:
        lo, up = ends[g]
        assert min(abs(chosen[g] - lo), abs(chosen[g] - up)) <= 1e-7, "the LP stays at an end of the box"
        other = up if abs(chosen[g] - lo) <= 1e-7 else lo
        costs = []
        for value in (chosen[g], other):
            pg = op.pg_pu.copy()
            pg[study.flexible] = [chosen[h] for h in study.flexible]
            pg[g] = value
            delta = np.array([[pg[h] - op.pg_pu[h] for h in study.flexible]])
            costs.append(example.ac_costs(net, op, injections, delta, pg, study.linear_cost)[0])
        assert np.all(np.isfinite(costs)) and costs[0] < costs[1], (g, costs)


def test_user_guide_water_example_prints_what_the_guide_says(capsys):
    # The worked example of docs/user-guide.md ("For modellers"), run as written.  Outside check: the
    # source flow is the sum of the demands (mass balance), so the worst pumping cost over a ±30 % box
    # is 180 $/h per m³/s × 1.3 × (1.0 + 1.5 + 2.0) m³/s = 1053 $/h (closed form); and every head stays
    # above 20 m at +30 % (60 − 0.8·5.85² − 2.0·1.95² = 25.0 m at node 2, 22.5 m at node 3).
    guide = (Path(__file__).resolve().parents[1] / "docs" / "user-guide.md").read_text()
    section = guide.split("### Worked example", 1)[1]
    code = section.split("```python\n", 1)[1].split("```", 1)[0]
    printed = section.split("It prints (measured):\n\n```\n", 1)[1].split("```", 1)[0]
    exec(compile(code, "docs/user-guide.md", "exec"), {})
    out = capsys.readouterr().out
    assert out == printed
    assert "pump cost bound over the box: 1053.0 $/h" in out and "demand[3]: 1.400 .. 2.600" in out
