"""The command line: demo, certify → check, and every error path."""
from __future__ import annotations

import json
import time

import pytest

from conftest import pglib_case
from robustbox.cli import demo_case_path, main
from robustbox.errors import NetworkError


def test_demo_writes_report_with_figures(tmp_path, capsys):
    assert main(["demo", "--out", str(tmp_path)]) == 0
    html = (tmp_path / "report.html").read_text()
    assert "Caution" in html and "data:image/png;base64," in html
    for fig in ("envelope.png", "slice.png", "network.png"):
        assert (tmp_path / fig).stat().st_size > 5000  # a blank figure is smaller (common practice, no source)
    data = json.loads((tmp_path / "box.json").read_text())
    assert data["status"] == "certified" and data["objective"] == "hosting"
    assert 1 <= data["certified_fraction"] <= 3  # up to three times the planned capacity (DEMO_REACH)
    assert "0 violations" in capsys.readouterr().out


@pytest.mark.parametrize("case, margin", [("demo", "0.1"), ("pglib_opf_case14_ieee", "0.05"),
                                          ("pglib_opf_case30_ieee", "0.02"), ("pglib_opf_case118_ieee", "0.05")])
def test_certify_then_check_reports_no_violation(tmp_path, case, margin, capsys):
    path = str(demo_case_path() if case == "demo" else pglib_case(case))
    out = tmp_path / "box.json"
    assert main(["certify", path, "--uncertain", "loads", "--band", "0.1", "--margin", margin, "--out", str(out)]) == 0
    data = json.loads(out.read_text())
    for key in ("case", "base_mva", "certified_fraction", "box", "operating_point", "binding_limit", "timings_s"):
        assert key in data
    assert {"bus", "quantity", "unit", "nominal", "lower", "upper"} <= set(data["box"][0])
    assert main(["check", path, str(out), "--samples", "150", "--quiet"]) == 0
    assert "0 with violations" in capsys.readouterr().out


def test_check_exits_1_on_enlarged_box(tmp_path, capsys):
    path = str(demo_case_path())
    out = tmp_path / "box.json"
    assert main(["certify", path, "--uncertain", "renewables", "--band", "1.0", "--out", str(out)]) == 0
    data = json.loads(out.read_text())
    for e in data["box"]:
        e["upper"] = e["nominal"] + 40 * (e["requested_upper"] - e["nominal"])
    out.write_text(json.dumps(data))
    assert main(["check", path, str(out), "--samples", "60", "--quiet"]) == 1
    assert "with violations" in capsys.readouterr().out


def test_opf_command_writes_point(tmp_path):
    out = tmp_path / "point.json"
    assert main(["opf", str(demo_case_path()), "--margin", "0.1", "--out", str(out)]) == 0
    data = json.loads(out.read_text())
    assert data["cost_per_h"] > 0 and {"bus", "index", "output_mw", "voltage_pu"} <= set(data["generators"][0])
    box = tmp_path / "box.json"
    assert main(["certify", str(demo_case_path()), "--point", str(out), "--uncertain", "9,17", "--band", "0.2",
                 "--out", str(box)]) == 0


@pytest.mark.parametrize("args, message", [
    (["certify", "/nonexistent/case.m"], "cannot read the file"),
    (["certify", "BADCASE"], "expected a number"),
    (["certify", "DEMO", "--band", "0"], "band must be a positive number"),
    (["certify", "DEMO", "--band", "-0.1"], "band must be a positive number"),
    (["certify", "DEMO", "--uncertain", "9999"], "bus 9999 is not in the network"),
    (["certify", "DEMO", "--margin", "0.45"], "AC-OPF with margin 0.45"),
])
def test_cli_errors_are_one_line(tmp_path, capsys, args, message):
    bad = tmp_path / "bad.m"
    bad.write_text("mpc.baseMVA = oops;\n")
    args = [str(bad) if a == "BADCASE" else str(demo_case_path()) if a == "DEMO" else a for a in args]
    code = main(args)
    err = capsys.readouterr().err.strip()
    assert code in (2, 3)
    assert message in err and "Traceback" not in err and len(err.splitlines()) == 1


def test_report_slice_for_chosen_injections(tmp_path):
    out = tmp_path / "rep"
    assert main(["certify", str(demo_case_path()), "--uncertain", "renewables", "--band", "0.5",
                 "--report", str(out), "--slice", "p[24],p[9]"]) == 0
    assert (out / "slice.png").stat().st_size > 5000  # a blank figure is smaller (common practice, no source)
    assert main(["certify", str(demo_case_path()), "--uncertain", "renewables", "--report", str(out),
                 "--slice", "p[24],p[999]"]) == 2


def test_bad_point_file_is_one_line(tmp_path, capsys):
    point = tmp_path / "point.json"
    gens = [{"index": g, "output_mw": 1.0, "output_mvar": 0.0, "voltage_pu": 1.0} for g in range(4)]  # the demo grid's 4 units
    point.write_text(json.dumps({"generators": gens, "buses": [{"bus": 1}]}))
    code = main(["certify", str(demo_case_path()), "--point", str(point)])
    err = capsys.readouterr().err.strip()
    assert code == 2 and "point.json" in err and "voltage_pu" in err and len(err.splitlines()) == 1


def test_bad_input_is_refused_in_one_line_before_any_computation(tmp_path, capsys):
    # Each refusal is an exit 2 with one line naming the problem; the outputs are checked first, so no
    # certificate is computed (the calls return within a second; common practice, no source).
    demo = str(demo_case_path())
    (tmp_path / "exists.json").write_text("{}")
    for args, message in [
            (["certify", demo, "--max-fraction", "0"], "--max-fraction must be a positive number"),
            (["certify", demo, "--max-fraction", "-1"], "--max-fraction must be a positive number"),
            (["certify", demo, "--uncertain", "loads", "--band", "50"], "loads reach zero or change sign"),
            (["certify", demo, "--out", str(tmp_path / "exists.json")], "exists; remove it"),
            (["certify", demo, "--out", str(tmp_path / "missing" / "x.json")], "does not exist"),
            (["certify", demo, "--slice", "p[9]"], "--slice needs two different injections"),
            (["demo", "--out", str(tmp_path / "exists.json")], "exists and is not a folder"),
            (["opf", demo, "--margin", "-0.1"], "--margin must be in [0, 0.5)")]:
        t0 = time.perf_counter()
        assert main(args) == 2, args
        err = capsys.readouterr().err.strip()
        assert message in err and len(err.splitlines()) == 1, (args, err)
        assert time.perf_counter() - t0 < 5.0, args
    with pytest.raises(SystemExit) as stop:  # argparse: usage line and exit 2
        main(["certify", demo, "--uncertain", ""])
    assert stop.value.code == 2
    with pytest.raises(NetworkError, match="band must be a positive number"):  # --debug after the subcommand
        main(["certify", demo, "--debug", "--band", "0"])


def test_check_refuses_a_tampered_box_file(tmp_path, capsys):
    box = tmp_path / "box.json"
    assert main(["certify", str(demo_case_path()), "--out", str(box)]) == 0
    good = json.loads(box.read_text())
    capsys.readouterr()
    for edit, message in [
            (lambda d: d["box"][0].update(lower=d["box"][0]["upper"], upper=d["box"][0]["lower"]),
             "lower ≤ nominal ≤ upper"),
            (lambda d: d["box"][0].update(lower=float("nan")), "lower ≤ nominal ≤ upper"),
            (lambda d: d.update(format_version=99), "format_version 99"),
            (lambda d: d["recourse"]["units"].pop(), "made for another case")]:
        data = json.loads(json.dumps(good))
        edit(data)
        bad = tmp_path / "bad.json"
        bad.write_text(json.dumps(data))
        assert main(["check", str(demo_case_path()), str(bad)]) == 2
        assert message in capsys.readouterr().err
    for samples in ("0", "-5"):
        assert main(["check", str(demo_case_path()), str(box), "--samples", samples]) == 2
        assert "samples must be a whole number ≥ 1" in capsys.readouterr().err
