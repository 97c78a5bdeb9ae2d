"""Render bench/results/conservativeness.json into docs/benchmarks.md with figures in docs/figures/.

Run: python bench/render_benchmarks.py
"""
from __future__ import annotations

import json
import math
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
RESULTS = Path(__import__("os").environ.get("ROBUSTBOX_BENCH_RESULTS", ROOT / "bench" / "results" / "conservativeness.json"))
DOC = ROOT / "docs" / "benchmarks.md"
FIG = ROOT / "docs" / "figures"


def _fmt(x, spec=".3g") -> str:
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "–"
    if isinstance(x, float) and math.isinf(x):
        return "∞"
    return format(x, spec)


def _targets(recs: list[dict]) -> list[str]:
    """The targets of the benchmark issue, each with what this run measured."""
    slack = [r for r in recs if r.get("policy", "slack") == "slack" and r.get("true_t_upper", 0) > 1e-6]
    viol = sum(r.get("validation_violations", 0) for r in recs)
    pts = sum(r.get("validation_points", 0) for r in recs)
    out = ["## Targets and what was measured", "",
           "| target | measured | met |", "|---|---|---|",
           f"| zero violations when validating certified boxes | {viol} violations in {pts} power flows "
           f"({len([r for r in recs if r.get('validation_points')])} boxes) | {'yes' if viol == 0 else 'NO'} |"]
    for scen, goal in (("A", 0.5), ("B", 0.7)):
        ok = [r for r in slack if r["scenario"] == scen and np.isfinite(r.get("ratio", np.nan))]
        med = float(np.median([r["ratio"] for r in ok])) if ok else float("nan")
        small = [r["ratio"] for r in ok if r["buses"] <= 300]
        part = (f" (the {len(small)} cases ≤ 300 buses: {_fmt(float(np.median(small)))})"
                if small and len(small) < len(ok) else "")
        out.append(f"| median certified/true t ≥ {goal} in scenario {scen} | {_fmt(med)} over {len(ok)} cases{part} "
                   f"| {'yes' if med >= goal else 'NO'} |")
    for cap, goal in ((300, 0.25), (2000, 1.0)):
        rs = [r for r in slack if r["buses"] <= cap]
        if not rs:
            continue
        worst = max(rs, key=lambda r: r["time_ratio"])
        by = {sc: [r["time_ratio"] for r in rs if r["scenario"] == sc] for sc in "AB"}
        med = ", ".join(f"{sc} median {_fmt(float(np.median(v)), '.2f')}" for sc, v in by.items() if v)
        out.append(f"| certificate time ≤ {goal} × one AC-OPF, every case ≤ {cap} buses | worst "
                   f"{_fmt(worst['time_ratio'], '.2f')} × ({worst['case'].replace('pglib_opf_', '')} "
                   f"{worst['scenario']}); {med} | {'yes' if worst['time_ratio'] <= goal else 'NO'} |")
    mem_file = RESULTS.parent / "certificate_memory.json"
    alone = json.loads(mem_file.read_text()) if mem_file.exists() else []
    traced = max((r.get("cert_peak_mb", 0), r["case"], r["scenario"]) for r in recs if r.get("cert_peak_mb") is not None)
    text = (f"largest traced certificate peak {traced[0] / 1024:.1f} GB ({traced[1].replace('pglib_opf_', '')} "
            f"{traced[2]})")
    worst = traced[0]
    if alone:
        big = max(alone, key=lambda r: r["peak_rss_mb"])
        worst = max(worst, big["peak_rss_mb"])
        text += (f"; a process that only reads the case and the point and certifies peaks at "
                 f"{big['peak_rss_mb'] / 1024:.1f} GB ({big['case'].replace('pglib_opf_', '')} {big['scenario']}; "
                 "`bench/certificate_memory.py`)")
    out += [f"| memory under 8 GB | {text} | {'yes' if worst < 8192 else 'NO'} |", ""]
    if alone:
        out += ["Certificate alone in its own process (`python bench/certificate_memory.py`, margin 0.1):", "",
                "| case | scenario | certified t | cert s | peak resident MB |", "|---|---|---|---|---|"]
        out += [f"| {r['case'].replace('pglib_opf_', '')} | {r['scenario']} | {_fmt(r['certified_t'], '.4g')} "
                f"| {_fmt(r['cert_time_s'], '.1f')} | {_fmt(r['peak_rss_mb'], '.0f')} |" for r in alone]
        out.append("")
    return out


def main() -> None:
    allrecs = json.loads(RESULTS.read_text())
    recs = [r for r in allrecs if "error" not in r]
    for r in recs:  # no room at the operating point (true t ≈ 0): a ratio says nothing there
        if not r.get("true_t_upper", 0) > 1e-6:
            r["ratio"] = r["axis_ratio_median"] = r["axis_ratio_min"] = float("nan")
            r["binding_class"] = "no room at the operating point"
    done = {(r["case"], r["scenario"], r.get("policy", "slack")) for r in recs}
    # an error record counts only when no later run of the same case (and scenario) produced a result
    errors = [r for r in allrecs if "error" in r and not any(
        c == r["case"] and (r.get("scenario") in (None, sc)) for c, sc, _ in done)]
    FIG.mkdir(parents=True, exist_ok=True)
    # figure 1: certified vs true per case
    fig, axes = plt.subplots(1, 2, figsize=(11, 4.5), sharey=False)
    for ax, scen in zip(axes, "AB"):
        rs = [r for r in recs if r["scenario"] == scen and r.get("policy", "slack") == "slack"
              and np.isfinite(r.get("true_t_upper", np.nan)) and r["true_t_upper"] > 1e-6]
        x = np.arange(len(rs))
        ax.bar(x - 0.2, [r["true_t_upper"] for r in rs], 0.4, label="true t (empirical upper bound)", color="#cccccc")
        ax.bar(x + 0.2, [r["certified_t"] for r in rs], 0.4, label="certified t", color="#2b8cbe")
        ax.set_xticks(x, [r["case"].replace("pglib_opf_", "") for r in rs], rotation=75, fontsize=7)
        ax.set_yscale("log")
        ax.set_title(f"Scenario {scen}: {'loads ± t × nominal' if scen == 'A' else 'five sites 0..t × 100 MW'}")
        ax.legend(fontsize=7)
    fig.tight_layout()
    fig.savefig(FIG / "certified_vs_true.png", dpi=110)
    plt.close(fig)
    # figure 2: time vs buses
    fig, ax = plt.subplots(figsize=(6, 4.5))
    exps = {}
    for scen, marker in (("A", "o"), ("B", "s")):
        rs = [r for r in recs if r["scenario"] == scen and r.get("policy", "slack") == "slack" and r.get("cert_time_s")
              and r.get("true_t_upper", 0) > 1e-6]  # cases without room end at once: no timing information
        b = np.array([r["buses"] for r in rs], dtype=float)
        tc = np.array([r["cert_time_s"] for r in rs])
        ax.loglog(b, tc, marker, label=f"certificate, scenario {scen}")
        if len(b) > 2:
            exps[scen] = float(np.polyfit(np.log(b), np.log(tc), 1)[0])
    rs = {r["case"]: r for r in recs if r.get("true_t_upper", 0) > 1e-6}
    b = np.array([r["buses"] for r in rs.values()], dtype=float)
    to = np.array([r["opf_time_s"] for r in rs.values()])
    ax.loglog(b, to, "k^", label="one AC-OPF (Ipopt bridge)")
    exps["OPF"] = float(np.polyfit(np.log(b), np.log(to), 1)[0]) if len(b) > 2 else float("nan")
    ax.set_xlabel("buses")
    ax.set_ylabel("wall time (s)")
    ax.set_title("Time vs network size (fitted exponents: " + ", ".join(f"{k} {v:.2f}" for k, v in exps.items()) + ")",
                 fontsize=8)
    ax.legend(fontsize=7)
    fig.tight_layout()
    fig.savefig(FIG / "time_vs_buses.png", dpi=110)
    plt.close(fig)

    lines = ["# Benchmarks", "",
             "Generated by `python bench/conservativeness.py` and `python bench/render_benchmarks.py` on the "
             "PGLib-OPF v23.07 cases (TYP and API) in `../shared/data/pglib-opf/`, on a 2-core machine. "
             "Operating point: the margin AC-OPF (first of margins 0.1, 0.05, 0.02, 0.01 that solves; congested "
             "cases where none solves get the same ladder with untightened generator P and Q limits, shown as 'gen: 0'); "
             "recourse policy: slack bus absorbs, PV voltages held. 'true t' is an empirical **upper** bound "
             "(sampling can miss infeasible points), so the ratio certified/true is a lower bound on the real "
             "ratio.", "",
             "Results depend on the model data; they are not a substitute for grid codes, protection studies or "
             "licensed engineering judgment.", ""]
    prov = RESULTS.parent / "provenance.txt"
    if prov.exists():
        lines += [" ".join(prov.read_text().split()), ""]
    lines += _targets(recs)
    sections = [("A", "slack"), ("B", "slack"), ("B", "distributed"), ("A", "distributed")]
    for scen, policy in sections:
        rs = [r for r in recs if r["scenario"] == scen and r.get("policy", "slack") == policy]
        if not rs:
            continue
        ratios = [r["ratio"] for r in rs if np.isfinite(r.get("ratio", np.nan))]
        lines += [f"## Scenario {scen}: " + ("P and Q of every load within ± t × nominal" if scen == "A"
                                             else "five sites at the largest-load PQ buses, 0 .. t × 100 MW")
                  + ("" if policy == "slack" else " — distributed-slack policy"), "",
                  f"Median certified/true: **{_fmt(float(np.median(ratios)) if ratios else float('nan'))}** over "
                  f"{len(ratios)} cases (target {'0.5' if scen == 'A' else '0.7'}); "
                  f"violations in validation runs of certified boxes: "
                  f"**{sum(r.get('validation_violations', 0) for r in rs)}**.", "",
                  "| case | buses | margin | cost +% vs published | certified t | true t ≤ | ratio | axis median / min "
                  "| linear t | share of linear-box points violating | naive shrunk | cert s | cert/OPF time | peak MB "
                  "| binding |",
                  "|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|"]
        for r in rs:
            lines.append(
                f"| {r['case'].replace('pglib_opf_', '')} | {r['buses']} | {r['margin']:g}"
                f"{'' if r.get('margin_gen', r['margin']) == r['margin'] else ' (gen: ' + format(r['margin_gen'], 'g') + ')'}"
                f" | {_fmt(r['cost_increase_pct'], '.2f')} "
                f"| {_fmt(r['certified_t'], '.4g')} | {_fmt(r['true_t_upper'], '.4g')} | {_fmt(r['ratio'], '.3f')} "
                f"| {_fmt(r['axis_ratio_median'], '.2f')} / {_fmt(r['axis_ratio_min'], '.2f')} | {_fmt(r['linear_t'], '.4g')} "
                f"| {_fmt(r.get('linear_box_violating_share'), '.2f')} | {'empty' if r['naive_shrunk_empty'] else _fmt(r['naive_shrunk_t'])} "
                f"| {_fmt(r['cert_time_s'], '.2f')} | {_fmt(r['time_ratio'], '.2f')} | {_fmt(r['cert_peak_mb'], '.0f')} "
                f"| {r['binding_class']} |")
        lines.append("")
    if errors:
        lines += ["## Cases without a result", ""] + [f"- {e['case']} {e.get('scenario', '')}: {e['error']}" for e in errors] + [""]
    for part in ("default_point.md", "envelopes.md"):  # written by bench/default_point.py, bench/envelopes.py
        path = RESULTS.parent / part
        if path.exists():
            lines += path.read_text(encoding="utf-8").splitlines() + [""]
    lines += ["## Figures", "", "![certified vs true](figures/certified_vs_true.png)", "",
              "![time vs buses](figures/time_vs_buses.png)", "",
              "Columns: *cost +%* — margin-OPF cost over the published AC optimum; *axis* — certified/true extent "
              "along single injections (6 axes, cases ≤ 1000 buses); *linear t* — the box from the linearisation at "
              "the operating point (what is used today, uncertified) and the share of its sampled vertices/points "
              "that violate a limit; *naive shrunk* — that box after shrinking every limit by the worst-case "
              "linearisation error over the whole voltage region; *cert/OPF time* — certificate wall time over one "
              "plain AC-OPF solve with our Ipopt bridge, each the better of two runs; *peak MB* — peak memory traced "
              "during the certificate (numpy allocations; the resident peak of a certificate alone is in the "
              "targets section).", ""]
    DOC.write_text("\n".join(lines), encoding="utf-8")
    print(f"wrote {DOC}")


if __name__ == "__main__":
    main()
