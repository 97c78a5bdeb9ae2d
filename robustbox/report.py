"""Figures and a self-contained HTML report of a certified box on a network."""
from __future__ import annotations

import base64
import html
import re
from pathlib import Path
from typing import TYPE_CHECKING

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import networkx as nx  # noqa: E402
import numpy as np  # noqa: E402

from .errors import NetworkError  # noqa: E402
from .grid.network import BUS_NUMBER, BUS_V_HIGH, BUS_V_LOW  # noqa: E402
from .study import CAUTION, CaseCertificate, result_to_json, write_box_csv  # noqa: E402
from .validate import ValidationReport, evaluate_points  # noqa: E402

if TYPE_CHECKING:
    from .envelopes import EnvelopeRow, EnvelopeRun, EnvelopeSettings


FIGURE_ROWS = 30  # components drawn in the envelope figure and listed in the HTML table (common practice, no source)
SAFE = {"band": "#cccccc", "box": "#0072b2", "bad": "#d55e00", "good": "#009e73", "site": "#e69f00"}  # Okabe-Ito


def _share(e: dict) -> float:
    """Certified width over requested width of one box entry (1 when nothing was requested)."""
    asked = e["requested_upper"] - e["requested_lower"]
    return (e["upper"] - e["lower"]) / asked if asked > 0 else 1.0


def tightest(box: list[dict], count: int = FIGURE_ROWS) -> list[dict]:
    """The ``count`` box entries with the smallest certified share of their requested band."""
    return sorted(box, key=_share)[:count]


def envelope_figure(data: dict, path: Path) -> Path:
    """Certified share of the requested band per component, tightest first, at most FIGURE_ROWS rows."""
    rows = tightest(data["box"])
    shares = np.array([_share(e) for e in rows])
    fig, ax = plt.subplots(figsize=(8, 0.28 * len(rows) + 1.6))
    y = np.arange(len(rows))[::-1]
    ax.barh(y, np.ones(len(rows)), color=SAFE["band"], label="requested band (= 1)")
    ax.barh(y, shares, height=0.55, color=SAFE["box"], label="certified share")
    ax.set_yticks(y, [f"bus {e['bus']} {e['quantity'].upper()}  {e['lower']:.4g}…{e['upper']:.4g} {e['unit']}"
                      for e in rows], fontsize=7)
    ax.set_xlim(0, max(1.05, float(shares.max(initial=1.0)) * 1.05))
    ax.set_xlabel("certified width / requested width")
    more = len(data["box"]) - len(rows)
    ax.set_title("Certified share of the requested band, tightest first"
                 + (f" ({len(rows)} of {len(data['box'])}; all in the CSV)" if more > 0 else ""), fontsize=9)
    ax.legend(loc="lower right", fontsize=7)
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
    ax.scatter(pts[ok, i] * base, pts[ok, j] * base, s=10, c=SAFE["good"], label="AC feasible (sampled)")
    ax.scatter(pts[~ok, i] * base, pts[~ok, j] * base, s=10, c=SAFE["bad"], marker="x",
               label="infeasible or limit violated")
    lo, hi = cert.lower * base, cert.upper * base
    ax.add_patch(plt.Rectangle((lo[i], lo[j]), hi[i] - lo[i], hi[j] - lo[j], fill=False, lw=2, ec=SAFE["box"],
                               label="certified box"))
    ax.set_xlabel(f"Δ {inj[i].name} ({'MW' if inj[i].quantity == 'p' else 'Mvar'})")
    ax.set_ylabel(f"Δ {inj[j].name} ({'MW' if inj[j].quantity == 'p' else 'Mvar'})")
    ax.legend(fontsize=7, loc="lower left")
    ax.set_title("Certified box inside the sampled feasible region\n(all other injections held at nominal)",
                 fontsize=9)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def _binding_element(condition: str) -> tuple[str, object] | None:
    """("bus", number) or ("branch", (from, to)) named by a certificate condition, if any."""
    m = re.search(r"S[ft]\[(\d+)-(\d+)#|angle(?:max|min)\[(\d+)-(\d+)#", condition)
    if m:
        a, b = (m[1], m[2]) if m[1] else (m[3], m[4])
        return "branch", (int(a), int(b))
    m = re.search(r"(?:Qgen|V2|P|Q)\[(\d+)\]|Pgen\[(?:generator row \d+ at bus )?(\d+)\]", condition)
    if m:
        return "bus", int(m[1] or m[2])
    return None


def network_figure(res: CaseCertificate, path: Path, condition: str = "") -> Path:
    """Network sketch: voltage margin at the operating point, the uncertain sites, the binding element."""
    net = res.network
    op = res.nsys.operating_point
    number = [int(b) for b in net.bus[:, BUS_NUMBER]]
    graph = nx.Graph()
    f, t = net.branch_ends()
    graph.add_nodes_from(range(net.n_bus))
    graph.add_edges_from(zip(f.tolist(), t.tolist()))
    pos = nx.kamada_kawai_layout(graph) if net.n_bus <= 400 else nx.spring_layout(graph, seed=1)
    margin = np.minimum(net.bus[:, BUS_V_HIGH] - op.v_mag_pu, op.v_mag_pu - net.bus[:, BUS_V_LOW])
    big = net.n_bus > 300
    fig, ax = plt.subplots(figsize=(7.5, 6.2))
    nx.draw_networkx_edges(graph, pos, ax=ax, edge_color="#bbbbbb", width=0.4 if big else 1.0)
    nodes = nx.draw_networkx_nodes(graph, pos, ax=ax, node_color=margin, cmap="cividis",
                                   node_size=8 if big else 120)
    index = net.bus_index
    sites = sorted({index[i.bus] for i in res.nsys.injections})
    nx.draw_networkx_nodes(graph, pos, nodelist=sites, ax=ax, node_shape="s", node_color="none",
                           edgecolors=SAFE["site"], linewidths=1.5, node_size=40 if big else 220,
                           label="uncertain injection")
    labels = {i: str(number[i]) for i in range(net.n_bus)} if net.n_bus <= 60 else \
        {i: str(number[i]) for i in sites[:FIGURE_ROWS]}
    element = _binding_element(condition)
    if element and element[0] == "bus" and element[1] in index:
        k = index[element[1]]
        nx.draw_networkx_nodes(graph, pos, nodelist=[k], ax=ax, node_shape="*", node_color=SAFE["bad"],
                               node_size=260, label=f"binding: bus {element[1]}")
        labels[k] = str(element[1])
    elif element and element[0] == "branch":
        a, b = element[1]  # type: ignore[misc]
        if a in index and b in index:
            nx.draw_networkx_edges(graph, pos, edgelist=[(index[a], index[b])], ax=ax, edge_color=SAFE["bad"],
                                   width=3.0, label=f"binding: branch {a}-{b}")
            labels[index[a]], labels[index[b]] = str(a), str(b)
    nx.draw_networkx_labels(graph, pos, labels, font_size=6, ax=ax,
                            bbox={"boxstyle": "round,pad=0.1", "fc": "white", "ec": "none", "alpha": 0.8})
    fig.colorbar(nodes, ax=ax, label="voltage margin at the operating point (pu)")
    ax.set_title("Network: voltage margin, uncertain injections, binding element", fontsize=9)
    ax.legend(loc="lower left", fontsize=7)
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
    figs = [envelope_figure(data, folder / "envelope.png"),
            network_figure(res, folder / "network.png", data["binding_condition"])]
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
    write_box_csv(data, folder / "box.csv")
    shown = tightest(data["box"])
    rows = "".join(f"<tr><td>{e['bus']}</td><td>{e['quantity'].upper()}</td><td>{e['nominal']:.6g}</td>"
                   f"<td>{e['lower']:.6g}</td><td>{e['upper']:.6g}</td><td>{e['unit']}</td><td>{_share(e):.4g}</td></tr>"
                   for e in shown)
    if len(shown) < len(data["box"]):
        rows += (f"<tr><td colspan=7>… {len(data['box']) - len(shown)} more injections in box.csv "
                 "(the tightest are listed)</td></tr>")
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
<h2>Box (tightest first)</h2>
<table><tr><th>bus</th><th>quantity</th><th>nominal</th><th>certified lower</th><th>certified upper</th><th>unit</th><th>share of band</th></tr>
{rows}</table>{val}{imgs}""")
    out = folder / "report.html"
    out.write_text(page, encoding="utf-8")
    return out


CAPTIONS = {
    "envelope": "Certified width of each injection over its requested width, tightest first.",
    "slice": "A 2-D slice through two injections (all other injections held at nominal): sampled AC power "
             "flows and the certified box.",
    "network": "Voltage margin at the operating point; squares mark uncertain injections, red the binding element.",
}


def _embedded(figs: list[Path]) -> str:
    return "".join(f'<figure><img alt="{p.stem}" src="data:image/png;base64,{base64.b64encode(p.read_bytes()).decode()}"/>'
                   f'<figcaption>{html.escape(CAPTIONS.get(p.stem, ""))}</figcaption></figure>' for p in figs)


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
