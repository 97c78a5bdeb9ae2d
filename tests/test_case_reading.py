"""Reading MATPOWER case files as the format documents them: isolated buses, NaN in unused
columns, unlimited angle-difference limits.

The 4-bus case below is invented for these tests (no real network).  Format facts checked here
come from the MATPOWER User's Manual, Appendix B (from memory): Table B-1 bus type 4 = isolated;
Table B-3 notes: angmin = angmax = 0 means the angle difference is unconstrained, as do
angmin < -360 and angmax > 360; Tables B-1/B-2 column meanings (bus column 7 area, 10 base kV,
11 loss zone; generator column 7 machine base MVA).
"""
from __future__ import annotations

import subprocess
import sys
import warnings

import numpy as np
import pytest

from robustbox import CaseFileError, NetworkError, RobustboxNote
from robustbox.grid.casefile import read_case, write_case
from robustbox.grid.forms import angle_forms
from robustbox.grid.network import (BRANCH_ANGLE_HIGH, BRANCH_ANGLE_LOW, BRANCH_FROM, BRANCH_TO, BUS_NUMBER, GEN_AT,
                                    Network)
from robustbox.grid.powerflow import case_power_flow

# Invented data.  Line numbers of the rows (1-based) are checked against the text in test_layout.
FOUR = """function mpc = four
% invented 4-bus case for robustbox's reader tests
mpc.version = '2';
mpc.baseMVA = 100;
mpc.bus = [
\t1\t3\t0\t0\t0\t0\t1\t1.02\t0\t132\t1\t1.1\t0.9;
\t2\t1\t40\t10\t0\t0\t1\t1\t0\t132\t1\t1.1\t0.9;
\t3\t2\t30\t5\t0\t0\t1\t1\t0\t132\t1\t1.1\t0.9;
\t4\t1\t20\t5\t0\t0\t1\t1\t0\t132\t1\t1.1\t0.9;
];
mpc.gen = [
\t1\t60\t0\t100\t-100\t1.02\t100\t1\t200\t0;
\t4\t10\t0\t20\t-20\t1\t100\t1\t40\t0;
\t3\t30\t0\t50\t-50\t1.01\t100\t1\t80\t0;
];
mpc.branch = [
\t1\t2\t0.01\t0.1\t0.02\t150\t150\t150\t0\t0\t1\t-30\t30;
\t1\t4\t0.01\t0.1\t0.02\t150\t150\t150\t0\t0\t1\t-30\t30;
\t2\t3\t0.01\t0.1\t0.02\t150\t150\t150\t0\t0\t1\t-30\t30;
\t3\t4\t0.02\t0.2\t0.02\t150\t150\t150\t0\t0\t1\t-30\t30;
];
mpc.gencost = [
\t2\t0\t0\t3\t0.01\t10\t0;
\t2\t0\t0\t3\t0.03\t20\t0;
\t2\t0\t0\t3\t0.02\t15\t0;
];
"""
BUS_LINE = {1: 6, 2: 7, 3: 8, 4: 9}          # bus number -> line
GEN_LINE = [12, 13, 14]                      # gen rows 1..3 (at buses 1, 4, 3)
BRANCH_LINE = [17, 18, 19, 20]               # branch rows 1..4 (1-2, 1-4, 2-3, 3-4)


def _row(table_line: int, text: str = FOUR) -> list[str]:
    return text.splitlines()[table_line - 1].split("\t")[1:]


def _edit(text: str, line: int, column: int, value: str) -> str:
    """Replace column ``column`` (1-based) of the matrix row on ``line``."""
    lines = text.splitlines()
    cells = lines[line - 1].rstrip(";").split("\t")
    cells[column] = value  # cells[0] is the empty string before the leading tab
    lines[line - 1] = "\t".join(cells) + ";"
    return "\n".join(lines) + "\n"


def _write(tmp_path, text: str, name: str = "four.m"):
    path = tmp_path / name
    path.write_text(text)
    return path


def _read_quiet(path):
    """read_case that fails on any RobustboxNote."""
    with warnings.catch_warnings():
        warnings.simplefilter("error", RobustboxNote)
        return read_case(path)


def _read_noting(path) -> tuple[Network, list[str]]:
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        net = read_case(path)
    return net, [str(w.message) for w in seen if issubclass(w.category, RobustboxNote)]


def test_layout():
    for bus, line in BUS_LINE.items():
        assert _row(line)[0] == str(bus)
    assert [_row(line)[0] for line in GEN_LINE] == ["1", "4", "3"]
    assert [tuple(_row(line)[:2]) for line in BRANCH_LINE] == [("1", "2"), ("1", "4"), ("2", "3"), ("3", "4")]


def test_plain_case_reads_without_notes(tmp_path):
    net = _read_quiet(_write(tmp_path, FOUR))
    assert net.n_bus == 4 and len(net.branch) == 4 and len(net.gen) == 3
    assert case_power_flow(net).converged


# ------------------------------------------------------------------ isolated buses (type 4)
def test_isolated_bus_is_dropped_with_its_branches_and_generator(tmp_path):
    # bus type 4 = isolated: MATPOWER User's Manual, Table B-1 (from memory)
    net, notes = _read_noting(_write(tmp_path, _edit(FOUR, BUS_LINE[4], 2, "4")))
    assert net.bus[:, BUS_NUMBER].tolist() == [1, 2, 3]
    assert net.branch[:, [BRANCH_FROM, BRANCH_TO]].tolist() == [[1, 2], [2, 3]]
    assert net.gen[:, GEN_AT].tolist() == [1, 3]
    assert net.gencost[:, 4].tolist() == [0.01, 0.02]  # the cost rows of the kept generators (rows 1 and 3)
    assert len(notes) == 1
    note = notes[0]
    assert note.startswith(f"{tmp_path / 'four.m'}:9: isolated bus 4 (type 4) dropped")
    for part in ("in-service branch 1-4 (line 18)", "in-service branch 3-4 (line 20)",
                 "in-service generator at bus 4 (line 13)"):
        assert part in note
    assert "\n" not in note
    assert net.row_lines["branch"] == [17, 19] and net.row_lines["gen"] == [12, 14]
    assert case_power_flow(net).converged


@pytest.mark.parametrize("edits, message", [
    # branch 2-3 (file row 3, line 19) given zero impedance: row and line of the file, not of the reduced table
    ([(BRANCH_LINE[2], 3, "0"), (BRANCH_LINE[2], 4, "0")],
     r"four\.m:19 \(mpc\.branch row 3\): branch 2-3 has zero impedance"),
    # generator at bus 3 (file row 3, line 14) with Pmin above Pmax
    ([(GEN_LINE[2], 10, "500")], r"four\.m:14 \(mpc\.gen row 3\): generator at bus 3 has min above max"),
    # NaN in a needed column after the drop
    ([(GEN_LINE[2], 9, "NaN")], r"four\.m:14 \(mpc\.gen row 3\): column 9 is not a number"),
    # cost row of the generator at bus 3 (file row 3, line 25) that does not fit its model
    ([(25, 4, "7")], r"four\.m:25 \(mpc\.gencost row 3\): cost model 2 with 7 coefficients"),
])
def test_errors_name_the_file_row_after_dropping(tmp_path, edits, message):
    text = _edit(FOUR, BUS_LINE[4], 2, "4")
    for line, column, value in edits:
        text = _edit(text, line, column, value)
    with pytest.raises(NetworkError, match=message):
        _read_noting(_write(tmp_path, text))


def test_isolated_rows_are_not_checked(tmp_path):
    # a NaN maximum output of the generator at the isolated bus does not matter: the row is dropped
    text = _edit(_edit(FOUR, BUS_LINE[4], 2, "4"), GEN_LINE[1], 9, "NaN")
    net, notes = _read_noting(_write(tmp_path, text))
    assert len(net.gen) == 2 and len(notes) == 1


def test_isolated_slack_is_an_error(tmp_path):
    # bus 1 (slack) reaches the rest only through bus 4: branches 1-4, 4-2 (was 2-3 moved), 2-3
    text = _edit(_edit(FOUR, BUS_LINE[4], 2, "4"), BRANCH_LINE[0], 2, "4")  # branch 1-2 becomes 1-4
    with pytest.raises(NetworkError, match=r"four\.m:6 \(mpc\.bus row 1\): the slack bus 1 is isolated"):
        _read_noting(_write(tmp_path, text))


def _arrays():
    """Five buses (invented): 1 slack, 2, 3 live; 4 and 5 to be marked isolated."""
    bus = np.array([[b, 3 if b == 1 else 1, 10.0 * (b > 1), 0, 0, 0, 1, 1, 0, 132, 1, 1.1, 0.9] for b in range(1, 6)])
    gen = np.array([[1, 0, 0, 100, -100, 1, 100, 1, 200, 0],
                    [5, 5, 0, 10, -10, 1, 100, 1, 20, 0],
                    [5, 5, 0, 10, -10, 1, 100, 0, 20, 0]])
    line = [0.01, 0.1, 0.0, 100, 100, 100, 0, 0, 1, -360, 360]
    branch = np.array([[1, 2] + line, [2, 3] + line, [3, 4] + line, [4, 5] + line,
                       [1, 5] + line[:8] + [0, -360, 360]])  # the last one out of service
    return bus, gen, branch


def test_from_tables_drops_one_group_of_joined_isolated_buses():
    bus, gen, branch = _arrays()
    bus[3:5, 1] = 4
    before = [a.copy() for a in (bus, gen, branch)]
    with pytest.warns(RobustboxNote) as seen:
        net = Network.from_tables("five", 100, bus, gen, branch)
    notes = [str(w.message) for w in seen if issubclass(w.category, RobustboxNote)]
    assert len(notes) == 1  # buses 4 and 5 are joined by branch 4-5: one group
    assert notes[0].startswith("<memory> (mpc.bus row 4): isolated buses 4, 5 (type 4; row 4, row 5) dropped")
    assert "in-service branch 3-4" in notes[0] and "in-service generator at bus 5" in notes[0]
    assert "1 out-of-service branch" in notes[0] and "1 out-of-service generator" in notes[0]
    assert net.n_bus == 3 and len(net.branch) == 2 and len(net.gen) == 1
    assert net.where("bus", 2) == "<memory> (mpc.bus row 3)"
    for a, b in zip(before, (bus, gen, branch)):
        assert np.array_equal(a, b)  # the caller's arrays are left alone
    assert net.copy().file_rows == net.file_rows


def test_from_tables_notes_each_group_once():
    bus, gen, branch = _arrays()
    bus[3:5, 1] = 4
    branch = branch[[0, 1, 2, 4]]  # no branch 4-5: buses 4 and 5 are two groups
    with pytest.warns(RobustboxNote) as seen:
        Network.from_tables("five", 100, bus, gen, branch)
    notes = [str(w.message) for w in seen if issubclass(w.category, RobustboxNote)]
    assert len(notes) == 2
    assert notes[0].startswith("<memory> (mpc.bus row 4): isolated bus 4 ")
    assert notes[1].startswith("<memory> (mpc.bus row 5): isolated bus 5 ")


def test_cli_shows_the_note_once(tmp_path):
    path = _write(tmp_path, _edit(FOUR, BUS_LINE[4], 2, "4"))
    run = subprocess.run([sys.executable, "-m", "robustbox.cli", "opf", str(path)], capture_output=True, text=True,
                         cwd=tmp_path, timeout=300)
    assert run.returncode == 0, run.stderr
    assert run.stderr.count("isolated bus 4 (type 4) dropped") == 1
    assert run.stderr.startswith("robustbox: note: ") and "warnings.warn" not in run.stderr
    assert "AC-OPF" in run.stdout


# ------------------------------------------------------------------ NaN
def test_nan_in_unused_columns_is_noted_once_per_column(tmp_path):
    # column meanings: MATPOWER User's Manual, Tables B-1 and B-2 (from memory); "unused" is robustbox's own
    # finding (grep of the column constants), recorded in robustbox.grid.network.UNUSED_COLS
    text = _edit(FOUR, GEN_LINE[0], 7, "NaN")      # machine base MVA of generators 1 and 3
    text = _edit(text, GEN_LINE[2], 7, "NaN")
    text = _edit(text, BUS_LINE[2], 10, "nan")     # base kV of bus 2
    text = _edit(text, BUS_LINE[3], 11, "NaN")     # loss zone of bus 3
    text = _edit(text, BUS_LINE[3], 7, "NaN")      # area of bus 3
    net, notes = _read_noting(_write(tmp_path, text))
    assert len(notes) == 4
    assert any(n.endswith("four.m:12 (mpc.gen row 1) and 1 more row: column 7 is not a number (machine base, MVA); "
                          "robustbox does not use this column, so it is ignored") for n in notes)
    assert any("four.m:7 (mpc.bus row 2): column 10 is not a number (base voltage, kV)" in n for n in notes)
    assert any("four.m:8 (mpc.bus row 3): column 7 is not a number (area number)" in n for n in notes)
    assert any("four.m:8 (mpc.bus row 3): column 11 is not a number (loss zone)" in n for n in notes)
    pf = case_power_flow(net)
    assert pf.converged and np.all(np.isfinite(pf.voltage))
    from robustbox.grid.model import build_opf
    build_opf(net, 0.05)  # the OPF does not read these columns either


@pytest.mark.parametrize("line, column, message", [
    (GEN_LINE[2], 9, r"four\.m:14 \(mpc\.gen row 3\): column 9 is not a number \(maximum active output, MW"),
    (BUS_LINE[2], 3, r"four\.m:7 \(mpc\.bus row 2\): column 3 is not a number \(active load, MW"),
    (BUS_LINE[3], 8, r"four\.m:8 \(mpc\.bus row 3\): column 8 is not a number"),   # |V| start of the power flow
    (BRANCH_LINE[1], 8, r"four\.m:18 \(mpc\.branch row 2\): column 8 is not a number"),  # emergency rating (N-1)
    (BRANCH_LINE[2], 13, r"four\.m:19 \(mpc\.branch row 3\): column 13 is not a number"),  # angle limit
])
def test_nan_where_it_matters_is_an_error_naming_file_and_line(tmp_path, line, column, message):
    with pytest.raises(NetworkError, match=message):
        _read_noting(_write(tmp_path, _edit(FOUR, line, column, "NaN")))


def test_parse_error_names_line_and_column(tmp_path):
    with pytest.raises(CaseFileError, match=r"four\.m:19: expected a number, found 'x' \(column 5\)"):
        read_case(_write(tmp_path, _edit(FOUR, BRANCH_LINE[2], 5, "x")))


# ------------------------------------------------------------------ angle-difference limits
def _with_angles(lo: str, hi: str) -> str:
    text = FOUR
    for line in BRANCH_LINE:
        text = _edit(_edit(text, line, 12, lo), line, 13, hi)
    return text


@pytest.mark.parametrize("lo, hi", [("0", "0"), ("-360", "360"), ("-400", "1000"), ("-Inf", "Inf")])
def test_unlimited_angle_differences_give_no_angle_rows(tmp_path, lo, hi):
    # 0/0 and beyond ±360 mean unconstrained: MATPOWER User's Manual, Table B-3 notes (from memory)
    net = _read_quiet(_write(tmp_path, _with_angles(lo, hi)))
    assert np.all(net.branch[:, BRANCH_ANGLE_LOW] == -360) and np.all(net.branch[:, BRANCH_ANGLE_HIGH] == 360)
    assert angle_forms(net).n_rows == 0
    from robustbox.grid.model import build_opf
    assert len(build_opf(net, 0.1).A) == 0
    from robustbox.grid.security import tightened_network
    assert angle_forms(tightened_network(net, 0.1)).n_rows == 0


def test_limited_and_one_sided_angle_limits_are_kept(tmp_path):
    net = _read_quiet(_write(tmp_path, FOUR))
    assert angle_forms(net).n_rows == 2 * 4  # ±30 degrees on all four branches
    # only angmin = angmax = 0 together means "no limit"; 0..30 is a real range
    # (MATPOWER User's Manual, Table B-3 notes, from memory)
    text = _edit(_edit(FOUR, BRANCH_LINE[0], 12, "0"), BRANCH_LINE[0], 13, "30")
    net = _read_quiet(_write(tmp_path, text, "one.m"))
    assert net.branch[0, [BRANCH_ANGLE_LOW, BRANCH_ANGLE_HIGH]].tolist() == [0, 30]
    assert angle_forms(net).n_rows == 2 * 4


def test_zero_angle_limits_do_not_make_the_opf_infeasible(tmp_path):
    from robustbox.grid.model import solve_opf
    net = _read_quiet(_write(tmp_path, _with_angles("0", "0")))
    res = solve_opf(net, 0.0)
    va = np.degrees(res.point.v_ang_rad)
    assert np.max(np.abs(va)) > 0.1  # power flows, so the angles differ: no θf − θt = 0 row was imposed
    # robustbox.validate measures an angle margin min(angmax − Δθ, Δθ − angmin) from these columns, with
    # Δθ the angle of V_f conj(V_t) in (−180°, 180°]: for the stored −360 / 360 it is never binding
    v = res.point.voltage
    f, t = net.branch_ends()
    dth = np.angle(v[f] * np.conj(v[t]), deg=True)
    br = net.branch[net.branch_on]
    assert np.min(np.minimum(br[:, BRANCH_ANGLE_HIGH] - dth, dth - br[:, BRANCH_ANGLE_LOW])) >= 180.0


def test_round_trip_after_normalising(tmp_path):
    net, notes = _read_noting(_write(tmp_path, _edit(_with_angles("0", "0"), BUS_LINE[4], 2, "4")))
    assert len(notes) == 1
    write_case(net, tmp_path / "back.m")
    back = _read_quiet(tmp_path / "back.m")
    for a, b in ((net.bus, back.bus), (net.gen, back.gen), (net.branch, back.branch), (net.gencost, back.gencost)):
        assert np.array_equal(a, b)


def test_file_row_maps_kept_rows_to_the_source(tmp_path):
    net, _ = _read_noting(_write(tmp_path, _edit(FOUR, BUS_LINE[4], 2, "4")))
    assert [net.file_row("gen", g) for g in range(len(net.gen))] == [1, 3]
    assert [net.file_row("branch", k) for k in range(len(net.branch))] == [1, 3]
    assert [net.file_row("bus", b) for b in range(net.n_bus)] == [1, 2, 3]
