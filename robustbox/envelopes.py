"""Certified per-connection operating envelopes for every interval of a profile.

For each interval of a profile (load and renewable scaling per interval, see
docs/file-format.md) the network is scaled, an operating point is found (a
margin AC-OPF warm-started from the previous interval of its block, or a power
flow of the scaled dispatch) and three certificates are formed for the
connections' active power:

* export: every connection may inject from its nominal value up to its export
  limit, all at once (the ``hosting`` objective on the band [0, export]);
* import: every connection may draw from its nominal value down to its import
  limit, all at once (the same LP on the mirrored band [import, 0]);
* both ways: the box [import limit, export limit] itself, verified; where mixed
  directions fail, the widest box inside it that is certified (``widths``).

The table's ``lower_mw``/``upper_mw`` are the both-ways box: every combination
of the connections' injections inside it is certified at once.  Intervals
are independent work items, grouped in blocks of consecutive intervals (the
warm start runs inside a block), which fan out on Dask; a failed interval is
a row with its reason, and a rerun skips the intervals already written.
"""
from __future__ import annotations

import csv
import hashlib
import json
import math
from dataclasses import asdict, dataclass, field, fields
from pathlib import Path
from typing import Callable, Literal, Sequence

import numpy as np

from .certify import Certificate, certify
from .errors import CaseFileError, NetworkError, RobustboxError
from .fanout import FanOut, run_all
from .grid.model import solve_opf
from .grid.network import BUS_P_LOAD, BUS_Q_LOAD, GEN_P, Network
from .grid.system import Injection, OperatingPoint, build_system, largest_load_pq_buses
from .study import CAUTION, point_to_json, power_flow_point

SITE_KINDS = {1: "wind", 2: "solar"}
TABLE = "envelopes.csv"
POINTS = "points.jsonl"
RUN = "run.json"


# ------------------------------------------------------------------- profile
@dataclass(frozen=True)
class Profile:
    """Per-interval scaling read from a profile CSV (see docs/file-format.md)."""

    times: tuple[str, ...]
    columns: dict[str, np.ndarray]
    source: str

    def __len__(self) -> int:
        return len(self.times)

    def digest(self) -> str:
        h = hashlib.sha256("\n".join(self.times).encode())
        for name in sorted(self.columns):
            h.update(name.encode())
            h.update(np.ascontiguousarray(self.columns[name], dtype=float).tobytes())
        return h.hexdigest()[:16]

    def rows(self, indices: Sequence[int]) -> "Profile":
        idx = np.asarray(indices, dtype=int)
        return Profile(tuple(self.times[i] for i in idx), {k: v[idx] for k, v in self.columns.items()}, self.source)


def read_profile(path: str | Path, net: Network) -> Profile:
    """Read and check a profile: errors name the file, line and column at fault."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise CaseFileError(str(path), None, f"cannot read the profile ({exc})") from None
    lines = [(n, line) for n, line in enumerate(text.splitlines(), 1) if line.strip() and not line.startswith("#")]
    if not lines:
        raise CaseFileError(str(path), None, "the profile is empty")
    head_line, header = lines[0][0], [c.strip() for c in next(csv.reader([lines[0][1]]))]
    if len(header) < 2:
        raise CaseFileError(str(path), head_line, "the header needs a time column and at least one scaling column")
    if len(set(header)) != len(header):
        raise CaseFileError(str(path), head_line, "a column name appears twice")
    for name in header[1:]:
        _check_column(name, net, str(path), head_line)
    times, values, seen = [], [], {}
    for n, line in lines[1:]:
        cells = [c.strip() for c in next(csv.reader([line]))]
        if len(cells) != len(header):
            raise CaseFileError(str(path), n, f"{len(cells)} fields, the header has {len(header)}")
        row = []
        for name, cell in zip(header[1:], cells[1:]):
            try:
                x = float(cell)
            except ValueError:
                raise CaseFileError(str(path), n, f"column '{name}' is not a number ('{cell}')") from None
            if not math.isfinite(x) or x < 0:
                raise CaseFileError(str(path), n, f"column '{name}' must be a finite number ≥ 0, got {cell}")
            if name in ("wind", "solar") or name.startswith("site@"):
                if x > 1:
                    raise CaseFileError(str(path), n, f"column '{name}' is a fraction of capacity (0..1), got {cell}")
            row.append(x)
        if cells[0] in seen:
            raise CaseFileError(str(path), n, f"interval '{cells[0]}' appears twice (first on line {seen[cells[0]]})")
        seen[cells[0]] = n
        times.append(cells[0])
        values.append(row)
    if not times:
        raise CaseFileError(str(path), None, "the profile has a header but no interval")
    arr = np.array(values, dtype=float).reshape(len(times), len(header) - 1)
    return Profile(tuple(times), {name: arr[:, j] for j, name in enumerate(header[1:])}, str(path))


def _check_column(name: str, net: Network, path: str, line: int) -> None:
    if name in ("load", "wind", "solar"):
        if name != "load" and not _sites(net, name):
            raise CaseFileError(path, line, f"column '{name}': the case marks no {name} site (mpc.injection_site)")
        return
    kind, _, bus = name.partition("@")
    try:
        b = int(bus)
    except ValueError:
        b = None
    if kind not in ("load", "site") or b is None:
        raise CaseFileError(path, line, f"unknown column '{name}': use load, wind, solar, load@<bus> or site@<bus>")
    if b not in net.bus_index:
        raise CaseFileError(path, line, f"column '{name}': bus {b} is not in the network")
    if kind == "site" and (net.sites is None or b not in net.sites[:, 0]):
        raise CaseFileError(path, line, f"column '{name}': bus {b} has no marked injection site")


def _sites(net: Network, kind: str | None = None) -> list[tuple[int, str, float]]:
    if net.sites is None:
        return []
    out = [(int(b), SITE_KINDS.get(int(k), "other"), float(cap)) for b, k, cap in net.sites[:, :3]]
    return [s for s in out if kind is None or s[1] == kind]


def scaled_network(net: Network, profile: Profile, k: int) -> Network:
    """The network of interval ``k``: loads scaled, site output (unity power factor) netted from the bus load."""
    out = net.copy()
    cols = profile.columns
    factor = np.full(net.n_bus, cols["load"][k] if "load" in cols else 1.0)
    for name, vals in cols.items():
        if name.startswith("load@"):
            factor[net.bus_index[int(name[5:])]] = vals[k]
    out.bus[:, BUS_P_LOAD] *= factor
    out.bus[:, BUS_Q_LOAD] *= factor
    for bus, kind, cap in _sites(net):
        share = cols[f"site@{bus}"][k] if f"site@{bus}" in cols else cols[kind][k] if kind in cols else 0.0
        out.bus[net.bus_index[bus], BUS_P_LOAD] -= share * cap
    return out


# ------------------------------------------------------------------- one interval
@dataclass(frozen=True)
class EnvelopeSettings:
    """What each interval computes.  Bands in MW per connection; margin as a fraction of each limit's range."""

    connections: tuple[int, ...]
    import_mw: float = 50.0
    export_mw: float = 50.0
    margin: float = 0.05
    policy: Literal["slack", "distributed"] = "distributed"
    point: Literal["opf", "flow"] = "opf"
    block_intervals: int = 24


@dataclass(frozen=True)
class EnvelopeRow:
    """One connection in one interval.  MW are net injection at the bus (generation positive)."""

    interval: int
    time: str
    bus: int
    nominal_mw: float
    lower_mw: float
    upper_mw: float
    export_limit_mw: float
    import_limit_mw: float
    binding: str
    binding_export: str
    binding_import: str
    status: str
    detail: str


COLUMNS = tuple(f.name for f in fields(EnvelopeRow))


@dataclass(frozen=True)
class IntervalResult:
    """The rows of one interval and its operating point (point_to_json layout, with the recourse participation)."""

    rows: tuple[EnvelopeRow, ...]
    point: dict = field(default_factory=dict)


def _injections(settings: EnvelopeSettings, base: float, below_mw: Sequence[float] | float,
                above_mw: Sequence[float] | float) -> list[Injection]:
    n = len(settings.connections)
    lo, up = np.broadcast_to(below_mw, n), np.broadcast_to(above_mw, n)
    return [Injection(b, "p", float(lo[k]) / base, float(up[k]) / base) for k, b in enumerate(settings.connections)]


def _certify(net: Network, op: OperatingPoint, inj: list[Injection], settings: EnvelopeSettings, objective: str,
             box: tuple[np.ndarray, np.ndarray] | None = None) -> tuple[Certificate, np.ndarray]:
    nsys = build_system(net, op, inj, settings.policy)
    return certify(nsys.system, nsys.point, objective, box=box), nsys.participation  # type: ignore[arg-type]


def envelope_at(net: Network, op: OperatingPoint, settings: EnvelopeSettings, interval: int = 0,
                time: str = "") -> tuple[list[EnvelopeRow], np.ndarray]:
    """The three certificates at one operating point; returns the rows and the recourse participation."""
    base = net.base_mva
    exp, part = _certify(net, op, _injections(settings, base, 0.0, settings.export_mw), settings, "hosting")
    imp, _ = _certify(net, op, _injections(settings, base, settings.import_mw, 0.0), settings, "widths")
    down, up = -imp.lower * base, exp.upper * base  # MW, ≥ 0
    both_inj = _injections(settings, base, down, up)
    both, _ = _certify(net, op, both_inj, settings, "verify", (imp.lower, exp.upper))
    detail = "both ways as the one-way limits"
    if both.status != "certified":
        both, _ = _certify(net, op, both_inj, settings, "widths")
        detail = "mixed directions narrow the one-way limits"
    s_bus = np.zeros(net.n_bus, dtype=complex)
    np.add.at(s_bus, net.gen_bus_idx(), op.pg_pu + 1j * op.qg_pu)
    s_bus -= net.load_pu()
    rows = []
    for k, b in enumerate(settings.connections):
        nominal = float(s_bus[net.bus_index[b]].real * base)
        rows.append(EnvelopeRow(interval, time, b, nominal, nominal + float(both.lower[k]) * base,
                                nominal + float(both.upper[k]) * base, nominal + float(up[k]),
                                nominal - float(down[k]), both.binding, exp.binding, imp.binding, "certified", detail))
    return rows, part


def _operating_point(net: Network, settings: EnvelopeSettings, start: OperatingPoint | None) -> OperatingPoint:
    if settings.point == "opf":
        return solve_opf(net, settings.margin, compare_base=False, start=start).point
    work = net.copy()
    on = net.gen_on
    demand = float(work.bus[:, BUS_P_LOAD].sum())
    scheduled = float(net.gen[on, GEN_P].sum())
    if scheduled > 0:  # the case's dispatch scaled to the interval's net demand; the slack takes the losses
        work.gen[on, GEN_P] *= max(demand, 0.0) / scheduled
    return power_flow_point(work)


_STATE = ("v_mag_pu", "v_ang_rad", "pg_pu", "qg_pu")  # the exact point (JSON floats round-trip), for warm starts


def _exact_point(record: dict) -> OperatingPoint:
    st = record["state"]
    return OperatingPoint(*(np.array(st[name], dtype=float) for name in _STATE))


@dataclass(frozen=True)
class Block:
    """Consecutive intervals computed in one task (warm starts run inside it)."""

    network: Network
    profile: Profile
    intervals: tuple[int, ...]
    settings: EnvelopeSettings
    starts: tuple[OperatingPoint | None, ...] = ()  # per interval: the previous interval's point, if computed earlier


def run_block(block: Block) -> list[IntervalResult]:
    """All intervals of a block, each warm-started from the previous interval's point (cold after a failure
    or at the block's first interval); a failure is recorded with its reason."""
    out: list[IntervalResult] = []
    start, previous = None, None
    for j, k in enumerate(block.intervals):
        if previous != k - 1:  # the previous interval was computed in an earlier run (or is in another block)
            start = block.starts[j] if block.starts else None
        previous = k
        time = block.profile.times[j]
        net = scaled_network(block.network, block.profile, j)
        try:
            op = _operating_point(net, block.settings, start)
            rows, part = envelope_at(net, op, block.settings, k, time)
        except Exception as exc:  # noqa: BLE001 - recorded with its reason; one interval never stops the run
            why = str(exc) if isinstance(exc, RobustboxError) else f"internal error ({type(exc).__name__}: {exc})"
            why = why.replace("\n", " ")
            out.append(IntervalResult(tuple(EnvelopeRow(k, time, b, math.nan, math.nan, math.nan, math.nan, math.nan,
                                                        "", "", "", "failed", why) for b in block.settings.connections)))
            start = None
            continue
        point = point_to_json(net, op)
        point.update({"interval": k, "time": time, "policy_kind": block.settings.policy,
                      "participation": [float(x) for x in part],
                      "state": {name: [float(x) for x in getattr(op, name)] for name in _STATE}})
        out.append(IntervalResult(tuple(rows), point))
        start = op
    return out


# ------------------------------------------------------------------- the run
@dataclass
class EnvelopeRun:
    """Outcome of a run: where the files are and what happened."""

    folder: Path
    intervals: int
    computed: int
    skipped: int
    failed: int
    rows: list[EnvelopeRow]
    files: dict[str, Path]


def default_connections(net: Network) -> tuple[int, ...]:
    """The case's marked injection sites, else the five largest-load PQ buses."""
    sites = _sites(net)
    return tuple(b for b, _, _ in sites) if sites else tuple(largest_load_pq_buses(net, 5))


def check_settings(net: Network, settings: EnvelopeSettings) -> None:
    """Reject settings that cannot give a meaningful envelope, naming the option."""
    if not settings.connections:
        raise NetworkError("no connections given")
    for b in settings.connections:
        if b not in net.bus_index:
            raise NetworkError(f"connection at bus {b}: the network {net.source} has no such bus")
    if len(set(settings.connections)) != len(settings.connections):
        raise NetworkError("a connection bus appears twice")
    for name in ("import_mw", "export_mw"):
        v = getattr(settings, name)
        if not (math.isfinite(v) and v > 0):
            raise NetworkError(f"{name.replace('_', '-')} must be a positive number of MW, got {v}")
    if not (0 <= settings.margin < 0.5):
        raise NetworkError(f"margin must be in [0, 0.5), got {settings.margin}")
    if settings.block_intervals < 1:
        raise NetworkError(f"block size must be ≥ 1 interval, got {settings.block_intervals}")


def _fmt(x: float) -> str:
    return repr(float(x)) if math.isfinite(x) else ""


def _parse_row(rec: dict) -> EnvelopeRow:
    conv = {f.name: f.type for f in fields(EnvelopeRow)}
    vals = {}
    for name in COLUMNS:
        cell = rec[name]
        kind = conv[name]
        vals[name] = int(cell) if kind == "int" else (float(cell) if cell else math.nan) if kind == "float" else cell
    return EnvelopeRow(**vals)


def _read_table(path: Path) -> list[EnvelopeRow]:
    if not path.exists():
        return []
    with path.open(newline="", encoding="utf-8") as fh:
        reader = csv.DictReader(fh)
        if tuple(reader.fieldnames or ()) != COLUMNS:
            raise CaseFileError(str(path), None, f"not an envelope table of this version (columns {reader.fieldnames})")
        rows = []
        for rec in reader:
            try:
                rows.append(_parse_row(rec))
            except (TypeError, ValueError, KeyError):
                break  # a line cut short by an interrupted run: it and what follows are recomputed
    return rows


def _write_table(path: Path, rows: Sequence[EnvelopeRow]) -> None:
    tmp = path.with_suffix(".tmp")
    with tmp.open("w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(COLUMNS)
        for r in rows:
            w.writerow([_fmt(v) if isinstance(v, float) else v for v in asdict(r).values()])
    tmp.replace(path)


def _complete(rows: list[EnvelopeRow], n_conn: int) -> list[EnvelopeRow]:
    """Rows of the intervals that have all their connections (an interrupted write leaves a partial one)."""
    count: dict[int, int] = {}
    for r in rows:
        count[r.interval] = count.get(r.interval, 0) + 1
    return [r for r in rows if count[r.interval] == n_conn]


def run_envelopes(net: Network, profile: Profile, settings: EnvelopeSettings, folder: str | Path,
                  how: FanOut = FanOut(), fresh: bool = False, retry_failed: bool = False,
                  progress: Callable[[int, int], None] | None = None) -> EnvelopeRun:
    """Compute (or resume) the envelope table of every interval of ``profile`` into ``folder``.

    Intervals already in the folder's table are skipped (failed ones too, unless ``retry_failed``);
    ``fresh`` starts the folder anew.  Inputs differing from the folder's earlier run are an error.
    """
    check_settings(net, settings)
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    table, points, run_file = folder / TABLE, folder / POINTS, folder / RUN
    identity = {"case": str(net.source), "profile": profile.source, "profile_digest": profile.digest(),
                "settings": asdict(settings)}
    identity["settings"]["connections"] = list(settings.connections)
    if fresh:
        for p in (table, points, run_file):
            p.unlink(missing_ok=True)
    if run_file.exists():
        old = json.loads(run_file.read_text(encoding="utf-8"))
        if old != identity:
            diff = sorted(k for k in set(old) | set(identity) if old.get(k) != identity.get(k))
            raise NetworkError(f"{folder} holds a run with other inputs ({', '.join(diff)} differ): "
                               "use another output folder or start afresh (--fresh)")
    else:
        run_file.write_text(json.dumps(identity, indent=2), encoding="utf-8")
    done_rows = _complete(_read_table(table), len(settings.connections))
    if retry_failed:
        done_rows = [r for r in done_rows if r.status != "failed"]
    done = {r.interval for r in done_rows}
    _write_table(table, done_rows)
    pending = [k for k in range(len(profile)) if k not in done]
    size = settings.block_intervals
    groups: dict[int, list[int]] = {}
    for k in pending:  # fixed block layout: the same warm starts however the work is spread
        groups.setdefault(k // size, []).append(k)
    known = read_points(folder) if done else {}
    status = {r.interval: r.status for r in done_rows}

    def start_for(k: int) -> OperatingPoint | None:
        ok = k % size and status.get(k - 1) == "certified" and k - 1 in known
        return _exact_point(known[k - 1]) if ok else None

    blocks = [Block(net, profile.rows(ks), tuple(ks), settings, tuple(start_for(k) for k in ks))
              for ks in groups.values()]
    rows = list(done_rows)
    finished = [0]
    with table.open("a", newline="", encoding="utf-8") as tfh, points.open("a", encoding="utf-8") as pfh:
        writer = csv.writer(tfh)

        def keep(_: int, results: list[IntervalResult]) -> None:
            for res in results:  # the point first: an interval in the table always has its point
                if res.point:
                    pfh.write(json.dumps(res.point) + "\n")
            pfh.flush()
            for res in results:
                for r in res.rows:
                    writer.writerow([_fmt(v) if isinstance(v, float) else v for v in asdict(r).values()])
                rows.extend(res.rows)
            tfh.flush()
            finished[0] += len(results)
            if progress:
                progress(finished[0], len(pending))

        if progress:
            progress(0, len(pending))
        run_all(run_block, blocks, how, on_result=keep, name="robustbox-envelopes")
    rows.sort(key=lambda r: (r.interval, settings.connections.index(r.bus)))
    _write_table(table, rows)
    files = {"table": table, "points": points, "run": run_file}
    parquet = _write_parquet(folder, rows)
    if parquet is not None:
        files["parquet"] = parquet
    failed = len({r.interval for r in rows if r.status == "failed"})
    return EnvelopeRun(folder, len(profile), len(pending), len(done), failed, rows, files)


def _write_parquet(folder: Path, rows: Sequence[EnvelopeRow]) -> Path | None:
    try:
        import pyarrow as pa
        import pyarrow.parquet as pq
    except ImportError:
        return None
    path = folder / "envelopes.parquet"
    pq.write_table(pa.Table.from_pylist([asdict(r) for r in rows]), path)
    return path


def read_points(folder: str | Path) -> dict[int, dict]:
    """The operating point of every computed interval, by interval index."""
    path = Path(folder) / POINTS
    out: dict[int, dict] = {}
    if not path.exists():
        return out
    for line in path.read_text(encoding="utf-8").splitlines():
        try:
            rec = json.loads(line)
        except json.JSONDecodeError:
            continue  # a line cut short by an interrupted run
        out[int(rec["interval"])] = rec
    return out


# ------------------------------------------------------------------- summary
def summarize(rows: Sequence[EnvelopeRow], connections: Sequence[int], threshold_mw: float | None) -> dict:
    """Per connection: certified and failed intervals, export headroom (MW above nominal), intervals below threshold."""
    out: dict = {"threshold_mw": threshold_mw, "connections": {}, "caution": CAUTION}
    for b in connections:
        mine = [r for r in rows if r.bus == b]
        ok = [r for r in mine if r.status == "certified"]
        head = np.array([r.upper_mw - r.nominal_mw for r in ok])
        entry = {"intervals": len(mine), "certified": len(ok), "failed": len(mine) - len(ok)}
        if len(head):
            entry.update({"export_headroom_mw_min": float(head.min()), "export_headroom_mw_median": float(np.median(head)),
                          "export_headroom_mw_max": float(head.max()),
                          "import_headroom_mw_median": float(np.median([r.nominal_mw - r.lower_mw for r in ok]))})
        if threshold_mw is not None:
            low = [r.time for r in ok if r.upper_mw - r.nominal_mw < threshold_mw]
            entry.update({"intervals_below_threshold": len(low), "times_below_threshold": low[:50]})
        out["connections"][str(b)] = entry
    return out


# ------------------------------------------------------------------- demo profile
def demo_profile(net: Network, path: str | Path, hours: int = 8760, seed: int = 2027,
                 start: str = "2027-01-01T00:00") -> Path:
    """Write an invented hourly profile for ``net`` (formulas, a seeded wind process; no real data).

    load: daily shape (morning and evening peaks), weekends 8 % lower, winter 10 % higher;
    solar: a clear-sky arch from 6:00 to 18:00 (longer days in summer) times seeded cloudiness;
    wind: a seeded AR(1) process through a logistic, windier in winter.
    """
    if hours < 1:
        raise NetworkError(f"hours must be ≥ 1, got {hours}")
    rng = np.random.default_rng(seed)
    t0 = np.datetime64(start)
    h = np.arange(hours)
    hod, day = h % 24, h // 24
    season = np.cos(2 * np.pi * (day - 15) / 365.0)  # +1 mid-January, −1 mid-July
    daily = 0.78 + 0.12 * np.exp(-((hod - 8.5) / 2.5) ** 2) + 0.18 * np.exp(-((hod - 19.0) / 3.0) ** 2)
    weekday = np.where((day % 7) >= 5, 0.92, 1.0)
    load = daily * weekday * (1.0 + 0.10 * season)
    half_day = 6.0 - 1.5 * season  # hours from noon to sunset
    arch = np.clip(np.cos(np.pi * (hod + 0.5 - 12.0) / (2.0 * half_day)), 0.0, None)
    cloud = np.repeat(np.clip(rng.beta(4.0, 2.0, size=day[-1] + 1), 0.0, 1.0), 24)[:hours]
    solar = np.round(0.85 * arch * cloud, 4)
    z = np.zeros(hours)
    for k in range(1, hours):
        z[k] = 0.97 * z[k - 1] + 0.25 * rng.standard_normal()
    wind = np.round(0.95 / (1.0 + np.exp(-(z + 0.6 * season - 0.3))), 4)
    cols = ["time", "load"] + [c for c in ("wind", "solar") if _sites(net, c)]
    path = Path(path)
    with path.open("w", newline="", encoding="utf-8") as fh:
        fh.write("# invented demo profile (robustbox demo_profile); not measured data\n")
        w = csv.writer(fh)
        w.writerow(cols)
        for k in range(hours):
            vals = {"load": round(float(load[k]), 4), "wind": float(wind[k]), "solar": float(solar[k])}
            w.writerow([str(t0 + np.timedelta64(int(k), "h"))] + [vals[c] for c in cols[1:]])
    return path
