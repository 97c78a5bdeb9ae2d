"""The whole job on a case file: operating point, certificate, result file.

This is the layer the command line and the examples call.  Result files use
engineering units (MW, Mvar, pu for voltages) and net injections at buses
(generation positive, load negative); see docs/file-format.md.
"""
from __future__ import annotations

import csv
import json
import re
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import numpy as np

from .certify import Certificate, CertifyOptions, Objective, certify
from .errors import NetworkError, OperatingPointError, RobustboxNote
from .grid.casefile import read_case
from .grid.model import OPFResult, find_operating_point
from .grid.network import BUS_NUMBER, BUS_P_LOAD, GEN_AT, GEN_P, GEN_Q, GEN_Q_LOW, GEN_V_SET, Network
from .grid.powerflow import newton_power_flow
from .grid.system import (Injection, NetworkSystem, OperatingPoint, build_system, largest_load_pq_buses,
                          load_injections, recourse_record, recourse_roles, site_injections, split_q)
from .validate import ValidationReport, validate_box

FORMAT_VERSION = 2  # 2: the box file states the complete recourse policy ("recourse")


@dataclass(eq=False)
class CaseCertificate:
    """A certificate on a network, with the operating point it was built around."""

    network: Network
    nsys: NetworkSystem
    certificate: Certificate
    opf: OPFResult | None
    band: float
    scenario: str
    max_fraction: float = 1.0


def scenario_injections(net: Network, uncertain: str | Sequence[int], band: float,
                        site_mw: float = 100.0) -> tuple[list[Injection], str]:
    """Injections for 'loads', 'renewables' or an explicit list of bus numbers (sites 0..band × site_mw MW)."""
    if not (site_mw > 0 and np.isfinite(site_mw)):
        raise NetworkError(f"site size must be a positive number of MW, got {site_mw}")
    if not band > 0 or not np.isfinite(band):
        raise NetworkError(f"band must be a positive number, got {band}")
    injections, scenario = _scenario(net, uncertain, band, site_mw)
    if not injections:
        raise NetworkError(f"{net.source}: '{uncertain}' gives no uncertain injection here (no load, or no PQ bus "
                           "with load for default sites); name the buses, e.g. --uncertain 5,9")
    return injections, scenario


def _scenario(net: Network, uncertain: str | Sequence[int], band: float,
              site_mw: float) -> tuple[list[Injection], str]:
    if isinstance(uncertain, str) and uncertain == "loads":
        return load_injections(net, band), f"loads: P and Q of every load within ±{band:g} × nominal"
    if isinstance(uncertain, str) and uncertain == "renewables":
        if net.sites is not None:
            inj = [Injection(int(b), "p", 0.0, band * cap / net.base_mva) for b, _, cap in net.sites[:, :3]]
            return inj, f"renewables: the case's {len(inj)} marked sites, each 0..{band:g} × capacity above nominal"
        buses, where = largest_load_pq_buses(net, 5), "PQ buses"
        if not buses:  # every bus carries a unit: the largest loads elsewhere than at the slack bus
            others = [i for i in np.argsort(-net.bus[:, BUS_P_LOAD], kind="stable")
                      if i != net.slack and net.bus[i, BUS_P_LOAD] > 0][:5]
            buses, where = [int(net.bus[i, BUS_NUMBER]) for i in others], "buses other than the slack (no PQ bus)"
        return site_injections(net, buses, band, site_mw), (f"renewables: {len(buses)} site(s) at the largest-load "
                                                            f"{where} {buses}, each injecting 0..{band * site_mw:g} MW")
    if isinstance(uncertain, str):
        raise NetworkError(f"unknown uncertainty '{uncertain}': use loads, renewables or a list of bus numbers")
    return (site_injections(net, list(uncertain), band, site_mw),
            f"sites at buses {list(uncertain)}, each 0..{band * site_mw:g} MW")


def point_to_json(net: Network, op: OperatingPoint) -> dict:
    """The operating point in engineering units (generator rows 0-based as in the gen table)."""
    on = net.gen_on
    return {
        "cost_per_h": op.objective_per_h,
        "generators": [{"bus": int(net.gen[g, GEN_AT]), "index": int(g), "output_mw": float(op.pg_pu[k] * net.base_mva),
                        "output_mvar": float(op.qg_pu[k] * net.base_mva), "voltage_pu": float(op.v_mag_pu[net.bus_index[net.gen[g, GEN_AT]]])}
                       for k, g in enumerate(on)],
        "buses": [{"bus": int(b), "voltage_pu": float(op.v_mag_pu[i]), "angle_deg": float(np.degrees(op.v_ang_rad[i]))}
                  for i, b in enumerate(net.bus[:, BUS_NUMBER])],
    }


def point_from_json(net: Network, data: dict, source: str = "point file") -> OperatingPoint:
    """Operating point from a file: full bus voltages if given, else a power flow from the generator set-points."""
    try:
        gens = {int(g["index"]): g for g in data["generators"]}
    except (KeyError, TypeError, ValueError):
        raise OperatingPointError(f"{source}: needs \"generators\": [{{\"index\": ..., \"output_mw\": ..., \"voltage_pu\": ...}}]") from None
    on = net.gen_on
    missing = [int(g) for g in on if int(g) not in gens]
    if missing:
        raise OperatingPointError(f"{source}: no entry for in-service generator rows {missing[:10]}")
    try:
        pg = np.array([float(gens[int(g)]["output_mw"]) for g in on]) / net.base_mva
    except (KeyError, TypeError, ValueError) as exc:
        raise OperatingPointError(f"{source}: a generator's output_mw is missing or not a number ({exc!r})") from None
    if "buses" in data and all("output_mvar" in gens[int(g)] for g in on):
        idx = net.bus_index
        vm, va = np.zeros(net.n_bus), np.zeros(net.n_bus)
        try:
            for k, b in enumerate(data["buses"]):
                if b["bus"] not in idx:
                    raise OperatingPointError(f"{source}: bus {b['bus']} is not in the network")
                vm[idx[b["bus"]]], va[idx[b["bus"]]] = float(b["voltage_pu"]), np.radians(float(b["angle_deg"]))
            qg = np.array([float(gens[int(g)]["output_mvar"]) for g in on]) / net.base_mva
        except (KeyError, TypeError, ValueError) as exc:
            raise OperatingPointError(f"{source}: bus entry {k} or a generator's output_mvar is missing or not a number "
                                      f"({exc!r}); each bus needs \"bus\", \"voltage_pu\", \"angle_deg\"") from None
        return OperatingPoint(vm, va, pg, qg, data.get("cost_per_h"))
    work = net.copy()
    for k, g in enumerate(on):
        work.gen[g, GEN_P] = pg[k] * net.base_mva
        try:
            work.gen[g, GEN_V_SET] = float(gens[int(g)]["voltage_pu"])
        except (KeyError, TypeError, ValueError):
            raise OperatingPointError(f"{source}: generator row {int(g)} needs a numeric \"voltage_pu\"") from None
    return power_flow_point(work)


def power_flow_point(net: Network) -> OperatingPoint:
    """The power flow of the case's set-points (generator P and |V|, loads), read by the slack policy.

    The slack bus's units share its output beyond their set-points in proportion to their P ranges;
    per-unit Q follows :func:`~robustbox.grid.system.split_q`.
    """
    roles = recourse_roles(net, "slack")
    gb = net.gen_bus_idx()
    on = net.gen_on
    sg = np.zeros(net.n_bus, dtype=complex)
    fixed_q = np.where(roles.fixed_q, net.gen[on, GEN_Q_LOW], 0.0)
    np.add.at(sg, gb, (net.gen[on, GEN_P] + 1j * fixed_q) / net.base_mva)
    vm = np.ones(net.n_bus)
    vm[gb] = net.gen[on, GEN_V_SET]
    res = newton_power_flow(net.admittance()[0], sg - net.load_pu(), vm.astype(complex), roles.slack, roles.pv,
                            roles.pq)
    if not res.converged:
        raise OperatingPointError(f"{net.source}: the power flow for the given set-points does not converge "
                                  f"(mismatch {res.mismatch_pu:.3g} pu)")
    v = res.voltage
    s_bus = v * np.conj(net.admittance()[0] @ v) + net.load_pu()
    pg = net.gen[on, GEN_P] / net.base_mva
    pg = pg + roles.share * (s_bus[roles.slack].real - sg[roles.slack].real)
    return OperatingPoint(np.abs(v), np.angle(v), pg, split_q(net, roles, s_bus.imag, net.gen[on, GEN_Q] / net.base_mva), None)


def certify_case(case: str | Path | Network, uncertain: str | Sequence[int] = "loads", band: float = 0.05,
                 objective: Objective = "uniform", margin: float | None = None, point: dict | None = None,
                 policy: str = "slack", options: CertifyOptions = CertifyOptions(),
                 point_source: str = "point file", say=None, site_mw: float = 100.0) -> CaseCertificate:
    """Operating point (``point``, else the margin AC-OPF: ``margin``, or by default the largest margin of
    :data:`~robustbox.grid.model.MARGIN_LADDER` that solves; ``say`` gets one line per attempt), then the
    certificate for the chosen uncertainty."""
    net = case if isinstance(case, Network) else read_case(case)
    injections, scenario = scenario_injections(net, uncertain, band, site_mw)
    opf = None
    if point is None:
        opf = find_operating_point(net, margin, say)
        op = opf.point
    else:
        op = point_from_json(net, point, point_source)
    nsys = build_system(net, op, injections, policy)  # type: ignore[arg-type]
    if say:
        say(f"certificate: {len(injections)} uncertain injections, {nsys.system.equations.n_rows} equations, "
            f"{nsys.system.limits.n_rows} monitored rows; searching the {objective} box")
    try:
        cert = certify(nsys.system, nsys.point, objective, options=options)
    except OperatingPointError as exc:
        if not exc.violations:
            raise
        words = [plain_violation(v, net) for v in exc.violations]
        hint = (" At margin 0 the least-cost point sits on its limits (within the solver's tolerance): leave "
                "--margin out to get a point with room." if opf is not None and opf.margin == 0 else "")
        raise OperatingPointError(f"the operating point violates {len(words)} limit(s), so the box is empty: "
                                  + "; ".join(words[:6]) + (" ..." if len(words) > 6 else "") + "." + hint,
                                  exc.violations) from None
    if say:
        say(f"certificate: {cert.status} in {cert.timings_s['total_s']:.1f} s")
    return CaseCertificate(net, nsys, cert, opf, band, scenario, options.max_fraction)


def result_to_json(res: CaseCertificate) -> dict:
    """The result file (see docs/file-format.md)."""
    net, cert, nsys = res.network, res.certificate, res.nsys
    base = net.base_mva
    op = nsys.operating_point
    s_bus = np.zeros(net.n_bus, dtype=complex)
    np.add.at(s_bus, net.gen_bus_idx(), op.pg_pu + 1j * op.qg_pu)
    s_bus -= net.load_pu()
    idx = net.bus_index
    box = []
    for k, inj in enumerate(nsys.injections):
        nominal = (s_bus[idx[inj.bus]].real if inj.quantity == "p" else s_bus[idx[inj.bus]].imag) * base
        box.append({"bus": inj.bus, "quantity": inj.quantity, "unit": "MW" if inj.quantity == "p" else "Mvar",
                    "nominal": float(nominal), "lower": float(nominal + cert.lower[k] * base),
                    "upper": float(nominal + cert.upper[k] * base),
                    "requested_lower": float(nominal - inj.lower_pu * base),
                    "requested_upper": float(nominal + inj.upper_pu * base)})
    pt = point_to_json(net, op)
    pt.update({"slack_bus": int(net.bus[nsys.slack, BUS_NUMBER]), "policy": nsys.describe_policy()})
    out = {
        "format_version": FORMAT_VERSION, "case": str(net.source), "case_sha256": net.fingerprint(), "base_mva": base, "scenario": res.scenario,
        "objective": cert.objective, "status": cert.status, "certified_fraction": min(cert.certified_fraction, 1e12),
        "box": box, "operating_point": pt, "recourse": recourse_record(net, nsys.roles, op), "binding_limit": plain_condition(cert.binding, cert.certified_fraction, res.max_fraction, net),
        "binding_condition": cert.binding, "worst_margin_fraction": cert.worst_margin,
        "timings_s": cert.timings_s,
        "caution": CAUTION,
    }
    if res.opf is not None:
        out["opf"] = {"cost_per_h": res.opf.objective_per_h, "margin_fraction": res.opf.margin,
                      "untightened_cost_per_h": res.opf.base_objective_per_h,
                      "cost_increase_per_h": res.opf.cost_increase_per_h, "time_s": res.opf.time_s}
    return out


_QUANTITY = {"P": "active-power balance", "Q": "reactive-power balance", "V2": "voltage set-point"}
_SIDE = {"Sf": "from", "St": "to"}


def _units_at(net: Network | None, bus: str) -> str:
    """'the generator at bus B (row R of the generator table)' or 'the N generators at bus B (rows ...; their total)'."""
    if net is None:
        return f"the generators at bus {bus} (their total)"
    rows = [net.file_row("gen", int(g)) for g in net.gen_on if int(net.gen[g, GEN_AT]) == int(bus)]
    if len(rows) == 1:
        return f"the generator at bus {bus} (row {rows[0]} of the generator table)"
    return f"the {len(rows)} generators at bus {bus} (rows {', '.join(map(str, rows))} of the generator table; their total)"


def plain_condition(condition: str, fraction: float | None = None, max_fraction: float = 1.0,
                    net: Network | None = None) -> str:
    """The certificate's binding condition in a power engineer's words (bus numbers, table rows, what limits).

    ``condition`` is :attr:`Certificate.binding` ("upper limit 'Qgen[92]'", "self-mapping of equation
    'Q[24]'", ...); with ``fraction`` ≥ ``max_fraction`` nothing limited the box.
    """
    if fraction is not None and fraction >= max_fraction * (1.0 - 1e-9):
        return "no limit binds: the whole requested band is certified"
    m = re.fullmatch(r"self-mapping of equation '(\w+)\[(\d+)\]'", condition)
    if m:
        return (f"solvability of the {_QUANTITY.get(m[1], m[1])} at bus {m[2]}: the box is limited by the power-flow "
                "equations' nonlinearity, not by an operating limit")
    m = re.fullmatch(r"(upper|lower) limit '(.+)'", condition)
    if not m:
        return condition
    side, row = m[1], m[2]
    for pattern, words in (
            (r"V2\[(\d+)\]", lambda g: f"voltage {side} limit at bus {g[1]}"),
            (r"Pgen\[(generator row \d+ at bus \d+)\]", lambda g: f"active-power {side} limit of {g[1]}"),
            (r"Pgen\[(\d+)\]", lambda g: f"active-power {side} limit at the slack bus: {_units_at(net, g[1])}"),
            (r"Qgen\[(\d+)\]", lambda g: f"reactive-power {side} limit of {_units_at(net, g[1])}"),
            (r"(S[ft])\[(\d+)-(\d+)#(\d+)\]@\d+deg", lambda g: f"apparent-power rating of branch {g[2]}-{g[3]} "
                                                           f"(row {g[4]} of the branch table) at its {_SIDE[g[1]]} end"),
            (r"angle(max|min)\[(\d+)-(\d+)#(\d+)\]", lambda g: f"angle-difference {'upper' if g[1] == 'max' else 'lower'}"
                                                       f" limit of branch {g[2]}-{g[3]} (row {g[4]} of the branch table)")):
        g = re.fullmatch(pattern, row)
        if g:
            return words(g)
    return condition


def plain_violation(text: str, net: Network) -> str:
    """A violated limit row ("'Qgen[8]' = 0.1 outside [-0.4, 0.1] by 1e-8", per unit) in words and MW/Mvar/pu."""
    m = re.fullmatch(r"'(.+)' = (\S+) (?:outside \[(\S+), (\S+)\]|above (\S+)) by (\S+)", text)
    if not m:
        return text
    name, value = m[1], float(m[2])
    low, high = (float(m[3]), float(m[4])) if m[3] is not None else (None, float(m[5]))
    side = "upper" if low is None or value > high else "lower"
    what = plain_condition(f"{side} limit '{name}'", net=net)
    base = net.base_mva
    if name.startswith("V2["):
        unit, scale = "pu", None
    elif name.startswith(("Pgen", "Qgen", "S")):
        unit, scale = ("MW" if name.startswith("Pgen") else "Mvar" if name.startswith("Qgen") else "MVA"), base
    else:
        return f"{what}: {value:.6g} against {high if side == 'upper' else low:.6g}"
    if scale is None:  # |V|² rows: report |V|
        value, bound = float(np.sqrt(max(value, 0.0))), float(np.sqrt(max(high if side == "upper" else low, 0.0)))
    else:
        value, bound = value * scale, (high if side == "upper" else low) * scale
    return f"{what}: {value:.6g} {unit} against {bound:.6g} {unit} (by {abs(value - bound):.3g} {unit})"


CAUTION = ("Results depend on the model data (impedances, limits, the operating point and the uncertainty you "
           "chose). They are not a substitute for grid codes, protection studies or licensed engineering judgment.")


def check_box(net: Network, data: dict, samples: int = 300, seed: int = 0, source: str = "box file",
              progress=None) -> ValidationReport:
    """Independent sampling validation of a saved result file against ``net``.

    The recourse policy is read from the file's ``recourse`` record alone.  A file of another format
    version, for another case, or with an entry whose bounds are not numbers around the nominal
    value is refused with the entry named.
    """
    if not isinstance(samples, int) or samples < 1:
        raise NetworkError(f"samples must be a whole number ≥ 1, got {samples}")
    if not isinstance(data, dict) or data.get("format_version") != FORMAT_VERSION:
        got = data.get("format_version") if isinstance(data, dict) else None
        raise OperatingPointError(f"{source}: format_version {got!r}; this robustbox reads version {FORMAT_VERSION} "
                                  "(certify again to write it)")
    try:
        record = data["recourse"]
        units = {int(u["index"]) for u in record["units"]}
        if units != {int(g) for g in net.gen_on} or any(e["bus"] not in net.bus_index for e in record["voltage_buses"]):
            raise OperatingPointError(f"{source}: the box was made for another case ({data.get('case')}) or with "
                                      f"other generators in service than {net.source}")
        op = point_from_json(net, data["operating_point"], source)
        base = net.base_mva
        injections, lower, upper = [], [], []
        for k, e in enumerate(data["box"]):
            q = e["quantity"]
            if q not in ("p", "q"):
                raise OperatingPointError(f"{source}: box entry {k} at bus {e['bus']}: quantity must be p or q")
            nominal, lo, up = float(e["nominal"]), float(e["lower"]), float(e["upper"])
            if not (np.isfinite(nominal) and np.isfinite(lo) and np.isfinite(up) and lo <= nominal <= up):
                raise OperatingPointError(f"{source}: box entry {k} ({q} at bus {e['bus']}): needs finite numbers "
                                          f"lower ≤ nominal ≤ upper, got {lo:g} / {nominal:g} / {up:g}")
            if e["bus"] not in net.bus_index:
                raise OperatingPointError(f"{source}: box entry {k} at bus {e['bus']}, which is not in the network: "
                                          f"the box was made for another case ({data.get('case')})")
            injections.append(Injection(int(e["bus"]), q, (nominal - lo) / base, (up - nominal) / base))
            lower.append((lo - nominal) / base)
            upper.append((up - nominal) / base)
    except (KeyError, TypeError, ValueError) as exc:
        raise OperatingPointError(f"{source}: not a robustbox result file (missing or bad field: {exc})") from None
    if data.get("case_sha256") != net.fingerprint():
        warnings.warn(f"{source}: the case data differ from those the box was certified on ({data.get('case')}); "
                      f"the check validates the box against {net.source} as given", RobustboxNote, stacklevel=2)
    return validate_box(net, op, injections, np.array(lower), np.array(upper), record, samples=samples,
                        seed=seed, progress=progress)


def save_json(data: dict, path: str | Path) -> None:
    Path(path).write_text(json.dumps(data, indent=2, default=float), encoding="utf-8")


def write_box_csv(data: dict, path: str | Path) -> None:
    """The box of a result file as CSV: one row per uncertain injection, MW or Mvar."""
    keys = ("bus", "quantity", "unit", "nominal", "lower", "upper", "requested_lower", "requested_upper")
    with open(path, "w", newline="", encoding="utf-8") as fh:
        out = csv.writer(fh)
        out.writerow(keys)
        for e in data["box"]:
            out.writerow([e[k] for k in keys])
