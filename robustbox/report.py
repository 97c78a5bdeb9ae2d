"""Figures and a self-contained HTML report of a certified box on a network."""
from __future__ import annotations

import base64
import html
from pathlib import Path
from typing import TYPE_CHECKING

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import networkx as nx  # noqa: E402
import numpy as np  # noqa: E402

from .errors import NetworkError  # noqa: E402
from .grid.network import BUS_NUMBER, BUS_V_HIGH, BUS_V_LOW  # noqa: E402
from .study import CAUTION, CaseCertificate, result_to_json  # noqa: E402
from .validate import ValidationReport, evaluate_points  # noqa: E402

if TYPE_CHECKING:
    from .envelopes import EnvelopeRow, EnvelopeRun, EnvelopeSettings


def envelope_figure(data: dict, path: Path) -> Path:
    """Per-injection bars: requested band, certified range, nominal value."""
    box = data["box"]
    fig, ax = plt.subplots(figsize=(8, 0.35 * len(box) + 1.5))
    for k, e in enumerate(box):
        ax.barh(k, e["requested_upper"] - e["requested_lower"], left=e["requested_lower"], color="#d9d9d9",
                label="requested band" if k == 0 else None)
        ax.barh(k, e["upper"] - e["lower"], left=e["lower"], height=0.5, color="#2b8cbe",
                label="certified range" if k == 0 else None)
        ax.plot([e["nominal"]], [k], "k|", markersize=12, label="nominal" if k == 0 else None)
    ax.set_yticks(range(len(box)), [f"bus {e['bus']} {e['quantity'].upper()} ({e['unit']})" for e in box])
    ax.set_xlabel("net injection (generation positive)")
    ax.set_title(f"Certified injection envelope — {data['certified_fraction']:.3g} of the requested band")
    ax.legend(loc="best", fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def slice_figure(res: CaseCertificate, path: Path, pair: tuple[int, int] = (0, 1), grid: int = 21) -> Path:
    """2-D slice through two injections: sampled AC-feasible points and the certified box."""
    nsys, cert = res.nsys, res.certificate
    inj = nsys.injections
    i, j = pair
    base = res.network.base_mva
    span = lambda k: (-max(inj[k].lower_pu, cert.upper[k]) * 1.6, max(inj[k].upper_pu, cert.upper[k]) * 1.6)  # noqa: E731
    xs, ys = np.linspace(*span(i), grid), np.linspace(*span(j), grid)
    pts = np.zeros((grid * grid, len(inj)))
    gx, gy = np.meshgrid(xs, ys)
    pts[:, i], pts[:, j] = gx.ravel(), gy.ravel()
    out = evaluate_points(res.network, nsys.operating_point, inj, pts, nsys.policy, nsys.participation)
    ok = np.array([m is not None and min(v for v, _ in m.values()) >= 0 for m in out])
    fig, ax = plt.subplots(figsize=(5.5, 5))
    ax.scatter(pts[ok, i] * base, pts[ok, j] * base, s=10, c="#74c476", label="AC feasible (sampled)")
    ax.scatter(pts[~ok, i] * base, pts[~ok, j] * base, s=10, c="#fb6a4a", label="infeasible or limit violated")
    lo, hi = cert.lower * base, cert.upper * base
    ax.add_patch(plt.Rectangle((lo[i], lo[j]), hi[i] - lo[i], hi[j] - lo[j], fill=False, lw=2, ec="#08519c",
                               label="certified box"))
    ax.set_xlabel(f"Δ {inj[i].name} ({'MW' if inj[i].quantity == 'p' else 'Mvar'})")
    ax.set_ylabel(f"Δ {inj[j].name} ({'MW' if inj[j].quantity == 'p' else 'Mvar'})")
    ax.legend(fontsize=7, loc="lower left")
    ax.set_title("Certified box inside the sampled feasible region")
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def network_figure(res: CaseCertificate, path: Path) -> Path:
    """Network sketch coloured by the voltage margin at the operating point (pu)."""
    net = res.network
    op = res.nsys.operating_point
    graph = nx.Graph()
    f, t = net.branch_ends()
    graph.add_nodes_from(range(net.n_bus))
    graph.add_edges_from(zip(f.tolist(), t.tolist()))
    pos = nx.kamada_kawai_layout(graph) if net.n_bus <= 400 else nx.spring_layout(graph, seed=1)
    margin = np.minimum(net.bus[:, BUS_V_HIGH] - op.vm_pu, op.vm_pu - net.bus[:, BUS_V_LOW])
    fig, ax = plt.subplots(figsize=(6.5, 5.5))
    nx.draw_networkx_edges(graph, pos, ax=ax, edge_color="#999999")
    nodes = nx.draw_networkx_nodes(graph, pos, ax=ax, node_color=margin, cmap="RdYlGn", node_size=120)
    if net.n_bus <= 60:
        nx.draw_networkx_labels(graph, pos, {i: str(int(b)) for i, b in enumerate(net.bus[:, BUS_NUMBER])}, font_size=6, ax=ax)
    fig.colorbar(nodes, ax=ax, label="voltage margin (pu)")
    ax.set_title("Voltage margin at the operating point")
    ax.axis("off")
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def write_report(res: CaseCertificate, folder: str | Path, validation: ValidationReport | None = None,
                 pair: tuple[str, str] | None = None) -> Path:
    """Write PNG figures and ``report.html`` (figures embedded) into ``folder``; returns the HTML path.

    ``pair`` names the two injections of the 2-D slice (e.g. ("p[9]", "p[17]"); default: the first two).
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    data = result_to_json(res)
    figs = [envelope_figure(data, folder / "envelope.png"), network_figure(res, folder / "network.png")]
    names = [inj.name for inj in res.nsys.injections]
    if pair is not None:
        missing = [p for p in pair if p not in names]
        if missing or len(pair) != 2 or pair[0] == pair[1]:
            raise NetworkError(f"slice: need two different uncertain injections among {', '.join(names[:12])}"
                               f"{' ...' if len(names) > 12 else ''}; got {', '.join(pair)}")
        idx = (names.index(pair[0]), names.index(pair[1]))
    else:
        idx = (0, 1)
    if len(names) >= 2:
        figs.insert(1, slice_figure(res, folder / "slice.png", idx))
    rows = "".join(f"<tr><td>{e['bus']}</td><td>{e['quantity'].upper()}</td><td>{e['nominal']:.2f}</td>"
                   f"<td>{e['lower']:.2f}</td><td>{e['upper']:.2f}</td><td>{e['unit']}</td></tr>" for e in data["box"])
    imgs = _embedded(figs)
    val = ""
    if validation is not None:
        val = (f"<h2>Independent validation</h2><p>{validation.points} power flows ({validation.vertices} vertices): "
               f"{validation.violations} with a violated limit, {validation.not_converged} not converged.</p>")
    opf = data.get("opf")
    opf_html = ""
    if opf:
        inc = opf["cost_increase_per_h"]
        opf_html = (f"<p>Operating point: AC-OPF with margin {opf['margin_fraction']:g}, cost {opf['cost_per_h']:.2f} $/h"
                    + (f" (+{inc:.2f} $/h over the untightened optimum)" if inc is not None else "") + ".</p>")
    page = _page(f"robustbox report — {res.network.name}", f"""<h1>Certified injection box — {html.escape(res.network.name)}</h1>
<p class="caution"><b>Caution.</b> {html.escape(CAUTION)}</p>
<p>{html.escape(res.scenario)}.</p><p>Status: <b>{data['status']}</b>; certified fraction of the requested band:
<b>{data['certified_fraction']:.4g}</b>; binding condition: {html.escape(data['binding_limit'])}.</p>
<p>Recourse policy: {html.escape(data['operating_point']['policy'])}.</p>{opf_html}
<table><tr><th>bus</th><th>quantity</th><th>nominal</th><th>certified lower</th><th>certified upper</th><th>unit</th></tr>
{rows}</table>{val}{imgs}""")
    out = folder / "report.html"
    out.write_text(page, encoding="utf-8")
    return out


def _embedded(figs: list[Path]) -> str:
    return "".join(f'<p><img alt="{p.stem}" src="data:image/png;base64,{base64.b64encode(p.read_bytes()).decode()}"/></p>'
                   for p in figs)


def _page(title: str, body: str) -> str:
    """A self-contained HTML page with the reports' style."""
    return f"""<!doctype html><html><head><meta charset="utf-8"><title>{html.escape(title)}</title>
<style>body{{font-family:sans-serif;max-width:60em;margin:2em auto}}td,th{{padding:2px 8px;text-align:right}}
.caution{{border:1px solid #c60;padding:.5em;background:#fff6ee}}</style></head><body>
{body}</body></html>"""


def envelopes_figure(rows: "list[EnvelopeRow]", connections: tuple[int, ...], path: Path) -> Path:
    """Each connection's certified envelope against time (EnvelopeRow list; failed intervals marked)."""
    n = len(connections)
    fig, axes = plt.subplots(n, 1, figsize=(10, 1.9 * n + 0.8), sharex=True, squeeze=False)
    for ax, b in zip(axes[:, 0], connections):
        mine = [r for r in rows if r.bus == b]
        x = np.array([r.interval for r in mine])
        get = lambda name: np.array([getattr(r, name) for r in mine], dtype=float)  # noqa: E731
        ax.fill_between(x, get("lower_mw"), get("upper_mw"), step="mid", color="#2b8cbe", alpha=0.55,
                        label="certified both ways")
        ax.step(x, get("export_limit_mw"), where="mid", color="#08519c", lw=0.7, label="export limit (all exporting)")
        ax.step(x, get("import_limit_mw"), where="mid", color="#6a51a3", lw=0.7, label="import limit (all importing)")
        ax.step(x, get("nominal_mw"), where="mid", color="k", lw=0.6, ls="--", label="operating point")
        bad = x[[r.status != "certified" for r in mine]]
        if len(bad):
            ax.plot(bad, np.zeros(len(bad)), "|", color="#d62728", ms=8, label="failed interval")
        ax.set_ylabel(f"bus {b}\nMW")
    handles, labels = axes[0, 0].get_legend_handles_labels()
    fig.legend(handles, labels, loc="lower center", fontsize=8, ncol=5, frameon=False)
    times = {r.interval: r.time for r in rows}
    ticks = sorted(times)[:: max(1, len(times) // 8)]
    axes[-1, 0].set_xticks(ticks, [times[t] for t in ticks], rotation=20, fontsize=7, ha="right")
    axes[-1, 0].set_xlabel("interval")
    axes[0, 0].set_title("Certified operating envelopes per connection (net injection, generation positive)")
    fig.tight_layout(rect=(0, 0.04, 1, 1))
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def write_envelope_report(run: "EnvelopeRun", settings: "EnvelopeSettings", summary: dict, folder: str | Path) -> Path:
    """``envelopes.png`` and ``report.html`` (figure, per-connection summary, caution) for an envelope run."""
    folder = Path(folder)
    fig = envelopes_figure(run.rows, settings.connections, folder / "envelopes.png")
    thr = summary["threshold_mw"]
    head = "".join(f"<th>{h}</th>" for h in ["bus", "intervals", "certified", "failed", "median export headroom MW",
                                             "min export headroom MW", "median import headroom MW"]
                   + ([f"below {thr:g} MW export"] if thr is not None else []))
    body_rows = []
    for b, e in summary["connections"].items():
        cells = [b, e["intervals"], e["certified"], e["failed"]] + [
            f"{e[k]:.2f}" if k in e else "–" for k in ("export_headroom_mw_median", "export_headroom_mw_min",
                                                        "import_headroom_mw_median")]
        if thr is not None:
            cells.append(e["intervals_below_threshold"])
        body_rows.append("<tr>" + "".join(f"<td>{c}</td>" for c in cells) + "</tr>")
    page = _page("robustbox operating envelopes", f"""<h1>Certified operating envelopes</h1>
<p class="caution"><b>Caution.</b> {html.escape(CAUTION)}</p>
<p>{run.intervals} intervals ({run.computed} computed in this run, {run.skipped} already in the folder,
{run.failed} failed with a recorded reason). Connections: {", ".join(map(str, settings.connections))}; requested
import {settings.import_mw:g} MW and export {settings.export_mw:g} MW per connection; operating point
{html.escape(settings.point)} (margin {settings.margin:g}), recourse {html.escape(settings.policy)}.
Within the blue band, every combination of the connections' injections is certified at once.</p>
<table><tr>{head}</tr>{"".join(body_rows)}</table>{_embedded([fig])}""")
    out = folder / "report.html"
    out.write_text(page, encoding="utf-8")
    return out
