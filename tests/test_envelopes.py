"""Operating envelopes over time: validated boxes per interval, resumable runs, Dask = serial, a killed worker.

The boxes are checked by robustbox.validate (Newton power flows at vertices and random points with every
limit of the interval's own network), whose power flow is itself checked against PYPOWER 5.1.21 runpf in
tests/test_grid.py; it shares no code with the certifier beyond the network data.
"""
from __future__ import annotations

import json
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest

from robustbox.cli import demo_case_path, main
from robustbox.envelopes import (TABLE, EnvelopeSettings, default_connections, demo_profile, read_points,
                                 read_profile, run_envelopes, scaled_network, summarize)
from robustbox.errors import CaseFileError, NetworkError
from robustbox.fanout import FanOut
from robustbox.grid.casefile import read_case
from robustbox.grid.network import BUS_P_LOAD
from robustbox.grid.system import Injection
from robustbox.study import point_from_json
from robustbox.validate import validate_box

HOURS = 48


@pytest.fixture(scope="module")
def demo():
    return read_case(demo_case_path())


@pytest.fixture(scope="module")
def profile_path(demo, tmp_path_factory) -> Path:
    return demo_profile(demo, tmp_path_factory.mktemp("profile") / "demo48.csv", hours=HOURS)


@pytest.fixture(scope="module")
def settings(demo) -> EnvelopeSettings:
    return EnvelopeSettings(default_connections(demo), block_intervals=6)


@pytest.fixture(scope="module")
def serial_run(demo, profile_path, settings, tmp_path_factory):
    folder = tmp_path_factory.mktemp("serial")
    return run_envelopes(demo, read_profile(profile_path, demo), settings, folder, FanOut(serial=True))


def _table(folder: Path) -> str:
    return (folder / TABLE).read_text(encoding="utf-8")


def test_demo_profile_has_the_documented_shape(demo, profile_path):
    prof = read_profile(profile_path, demo)
    assert len(prof) == HOURS and set(prof.columns) == {"load", "wind", "solar"}
    solar = prof.columns["solar"].reshape(-1, 24)
    assert np.all(solar[:, :5] == 0) and np.all(solar[:, 20:] == 0) and solar[:, 11:14].min() > 0  # night is dark
    # bounds from demo_profile's own formulas (daily 0.78..1.08, weekends −8 %, season ±10 %): invented data
    assert 0.6 < prof.columns["load"].min() < prof.columns["load"].max() < 1.3
    assert 0 <= prof.columns["wind"].min() and prof.columns["wind"].max() <= 1


def test_every_interval_is_certified_and_its_boxes_pass_the_independent_validator(demo, profile_path, settings,
                                                                                   serial_run):
    assert serial_run.computed == HOURS and serial_run.failed == 0
    assert len(serial_run.rows) == HOURS * len(settings.connections)
    prof = read_profile(profile_path, demo)
    points = read_points(serial_run.folder)
    base = demo.base_mva
    for k in (0, 13, 29, 47):  # night, midday, a second-day evening, the last hour
        net = scaled_network(demo, prof, k)
        op = point_from_json(net, points[k])
        part = np.array(points[k]["participation"])
        rows = [r for r in serial_run.rows if r.interval == k]
        nominal = np.array([r.nominal_mw for r in rows])
        assert np.all([r.lower_mw <= r.nominal_mw <= r.upper_mw for r in rows])
        assert np.all([r.import_limit_mw <= r.lower_mw + 1e-9 and r.upper_mw <= r.export_limit_mw + 1e-9
                       for r in rows])
        assert max(r.upper_mw - r.nominal_mw for r in rows) > 1.0  # a real envelope, not a point (common practice, no source)
        inj = [Injection(r.bus, "p", settings.import_mw / base, settings.export_mw / base) for r in rows]
        boxes = {"both ways": ([r.lower_mw for r in rows], [r.upper_mw for r in rows]),
                 "all exporting": (nominal, [r.export_limit_mw for r in rows]),
                 "all importing": ([r.import_limit_mw for r in rows], nominal)}
        for what, (lo, up) in boxes.items():
            rep = validate_box(net, op, inj, (np.asarray(lo) - nominal) / base, (np.asarray(up) - nominal) / base,
                               settings.policy, part, samples=40, seed=k)
            assert rep.points >= 72 and rep.passed, (k, what, rep.examples)  # 2**5 vertices + 40 random points


def test_dask_run_gives_the_serial_table(demo, profile_path, settings, serial_run, tmp_path):
    run = run_envelopes(demo, read_profile(profile_path, demo), settings, tmp_path, FanOut(workers=2))
    assert run.computed == HOURS
    assert _table(tmp_path) == _table(serial_run.folder)
    assert (tmp_path / "envelopes.parquet").stat().st_size > 0  # pyarrow is in the test extra


def test_rerun_skips_finished_intervals_and_recomputes_a_cut_line(demo, profile_path, settings, serial_run, tmp_path):
    prof = read_profile(profile_path, demo)
    again = run_envelopes(demo, prof, settings, serial_run.folder, FanOut(serial=True))
    assert (again.computed, again.skipped) == (0, HOURS)
    # an interrupted run: the file ends in the middle of interval 47's rows
    for name in (TABLE, "points.jsonl", "run.json"):
        (tmp_path / name).write_bytes((serial_run.folder / name).read_bytes())
    text = _table(tmp_path)
    (tmp_path / TABLE).write_text(text[: text.rindex("\n", 0, len(text) - 1) - 30], encoding="utf-8")
    resumed = run_envelopes(demo, prof, settings, tmp_path, FanOut(serial=True))
    assert (resumed.computed, resumed.skipped) == (1, HOURS - 1)
    assert _table(tmp_path) == text


def test_other_inputs_in_the_folder_are_refused(demo, profile_path, settings, serial_run):
    other = EnvelopeSettings(settings.connections, export_mw=20.0, block_intervals=6)
    with pytest.raises(NetworkError, match="holds a run with other inputs \\(settings differ\\)"):
        run_envelopes(demo, read_profile(profile_path, demo), other, serial_run.folder, FanOut(serial=True))


def test_a_failed_interval_is_recorded_and_the_run_goes_on(demo, tmp_path, settings):
    # interval 1 asks for three times the load: more than all generators can produce (demo case: 1040 MW Pmax)
    assert 3 * demo.bus[:, BUS_P_LOAD].sum() > 1040
    path = tmp_path / "p.csv"
    path.write_text("time,load\nh0,0.9\nh1,3.0\nh2,0.95\n", encoding="utf-8")
    run = run_envelopes(demo, read_profile(path, demo), settings, tmp_path / "out", FanOut(serial=True))
    assert run.failed == 1
    status = {r.interval: (r.status, r.detail) for r in run.rows}
    assert status[0][0] == status[2][0] == "certified"
    assert status[1][0] == "failed" and "AC-OPF" in status[1][1]
    again = run_envelopes(demo, read_profile(path, demo), settings, tmp_path / "out", FanOut(serial=True),
                          retry_failed=True)
    assert again.computed == 1 and again.failed == 1
    summary = summarize(run.rows, settings.connections, threshold_mw=5.0)
    entry = summary["connections"][str(settings.connections[0])]
    assert (entry["certified"], entry["failed"]) == (2, 1)


def _dask(*args: str, log: Path) -> subprocess.Popen:
    """A Dask scheduler or worker in its own process (``python -m dask ...``), as on a real cluster."""
    return subprocess.Popen([sys.executable, "-m", "dask", *args], stdout=subprocess.DEVNULL,
                            stderr=log.open("w", encoding="utf-8"))


def _wait_for(path: Path, what: str, seconds: float = 60) -> None:
    deadline = time.time() + seconds
    while not path.exists() and time.time() < deadline:
        time.sleep(0.1)
    assert path.exists(), f"{what} did not start within {seconds:.0f} s"


def test_a_killed_worker_loses_nothing(demo, profile_path, settings, serial_run, tmp_path):
    """SIGKILL one of two worker processes once the first row is written; the other one finishes the run.

    Scheduler and workers run as separate processes so that nothing but the run's own client lives in
    this process (two clients in one process share Dask's event loop thread).
    """
    address_file = tmp_path / "scheduler.json"
    procs = [_dask("scheduler", "--port", "0", "--no-dashboard", "--scheduler-file", str(address_file),
                   log=tmp_path / "scheduler.log")]
    try:
        _wait_for(address_file, "the Dask scheduler")
        procs += [_dask("worker", "--scheduler-file", str(address_file), "--nthreads", "1", "--no-nanny",
                        "--no-dashboard", log=tmp_path / f"worker{i}.log") for i in range(2)]
        address = json.loads(address_file.read_text(encoding="utf-8"))["address"]
        table = tmp_path / "run" / TABLE
        killed: list[int] = []

        def kill_one_worker_after_the_first_row() -> None:
            deadline = time.time() + 300
            while time.time() < deadline:
                if table.exists() and len(table.read_text(encoding="utf-8").splitlines()) > 1:
                    procs[1].send_signal(signal.SIGKILL)
                    killed.append(procs[1].pid)
                    return
                time.sleep(0.05)

        spy = threading.Thread(target=kill_one_worker_after_the_first_row, daemon=True)
        spy.start()
        run = run_envelopes(demo, read_profile(profile_path, demo), settings, tmp_path / "run",
                            FanOut(scheduler=address))
        spy.join(timeout=5)
    finally:
        for proc in reversed(procs):
            proc.kill()
            proc.wait(timeout=30)
    assert killed, "no worker was killed: the run finished before the first row was written"
    assert run.computed == HOURS
    assert _table(tmp_path / "run") == _table(serial_run.folder)


@pytest.mark.parametrize("text, match", [
    ("time,load,cloud\nh0,1,2\n", "p.csv:1: unknown column 'cloud'"),
    ("time,load\nh0,1\nh1,x\n", "p.csv:3: column 'load' is not a number"),
    ("time,load\nh0,-1\n", "p.csv:2: column 'load' must be a finite number ≥ 0"),
    ("time,wind\nh0,1.5\n", "p.csv:2: column 'wind' is a fraction of capacity"),
    ("time,load@99\nh0,1\n", "column 'load@99': bus 99 is not in the network"),
    ("time,site@2\nh0,1\n", "column 'site@2': bus 2 has no marked injection site"),
    ("time,load\nh0,1\nh0,1\n", "p.csv:3: interval 'h0' appears twice \\(first on line 2\\)"),
    ("time,load\nh0,1,2\n", "p.csv:2: 3 fields, the header has 2"),
    ("time,load\n", "a header but no interval"),
    ("", "the profile is empty"),
])
def test_profile_errors_name_the_file_line_and_column(demo, tmp_path, text, match):
    path = tmp_path / "p.csv"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(CaseFileError, match=match):
        read_profile(path, demo)


def test_command_line_envelopes_and_bad_input(tmp_path, capsys):
    prof = tmp_path / "p.csv"
    assert main(["profile-demo", str(prof), "--hours", "3"]) == 0
    out = tmp_path / "env"
    assert main(["envelopes", "demo", str(prof), "--out", str(out), "--serial", "--threshold-mw", "5"]) == 0
    text = capsys.readouterr().out
    assert "computed 3 intervals" in text and "0 failed" in text
    html = (out / "report.html").read_text(encoding="utf-8")
    assert "Caution" in html and "data:image/png;base64," in html
    assert (out / "envelopes.png").stat().st_size > 5000  # a blank figure is smaller (common practice, no source)
    assert main(["envelopes", "demo", str(prof), "--out", str(tmp_path / "e2"), "--connections", "999",
                 "--serial"]) == 2
    assert "bus 999" in capsys.readouterr().err
    assert main(["envelopes", "demo", str(tmp_path / "missing.csv"), "--serial"]) == 2
    assert "cannot read the profile" in capsys.readouterr().err
    assert main(["envelopes", "demo", str(prof), "--out", str(tmp_path / "e3"), "--export-mw", "-5",
                 "--serial"]) == 2
    assert "export-mw must be a positive number" in capsys.readouterr().err
