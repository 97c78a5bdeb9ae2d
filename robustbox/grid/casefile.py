"""Reader and writer for the MATPOWER case format, version 2.

The format is the open exchange format of the PGLib-OPF benchmark library:
a Matlab function file assigning ``mpc.baseMVA``, ``mpc.bus``, ``mpc.gen``,
``mpc.branch`` and ``mpc.gencost`` (matrices in ``[ ... ]`` with rows ended
by ``;`` or a newline and columns separated by blanks or ``,``).  Matlab
comments (``%``) are ignored, numbers may use any float syntax (``1e-3``,
``.5``, ``Inf``, ``NaN``), extra columns are kept but not used, and other
fields (``mpc.bus_name`` ...) are skipped.  robustbox's own optional field
``mpc.injection_site = [bus kind capacity_MW; ...]`` (kind 1 wind, 2 solar)
marks renewable injection sites.  Errors name the file and line.

Read as the format documents it (MATPOWER User's Manual, Appendix B), in
:meth:`Network.from_tables`: isolated buses (type 4) are dropped together with
every branch touching them and every generator and injection site at them,
with one note (:class:`~robustbox.grid.network.RobustboxNote`, a warning) per
group of isolated buses; the network keeps each remaining row's file line and
row number for messages.  A branch with angmin = angmax = 0 (or angmin ≤ −360,
angmax ≥ 360) has no angle-difference limit and is stored as −360 / 360.  NaN
in a column robustbox does not read (bus area, base kV and loss zone, generator
machine base) is noted once per column; elsewhere it is an error naming the line.
"""
from __future__ import annotations

import re
from pathlib import Path

import numpy as np

from ..errors import CaseFileError
from .network import BRANCH_COLS, BUS_COLS, GEN_COLS, Network

_ASSIGN = re.compile(r"^\s*mpc\.(\w+)\s*=\s*(.*)$")
_NUMBER = re.compile(r"^[+-]?(?:\d+\.?\d*|\.\d+)(?:[eEdD][+-]?\d+)?$|^[+-]?(?:inf|nan)$", re.IGNORECASE)
_MIN_COLS = {"bus": BUS_COLS, "gen": GEN_COLS, "branch": BRANCH_COLS, "gencost": 5, "injection_site": 3}


def _strip_comment(line: str) -> str:
    """Remove a Matlab comment, keeping '%' inside quoted strings."""
    out, quote = [], False
    for ch in line:
        if ch == "'":
            quote = not quote
        if ch == "%" and not quote:
            break
        out.append(ch)
    return "".join(out)


def _parse_number(token: str, path: str, line: int, column: int | None = None) -> float:
    if not _NUMBER.match(token):
        where = f" (column {column})" if column is not None else ""
        raise CaseFileError(path, line, f"expected a number, found '{token[:40]}'{where}")
    return float(token.lower().replace("d", "e"))


def _parse_matrix(lines: list[tuple[int, str]], start: int, first: str, path: str, name: str
                  ) -> tuple[np.ndarray, int, list[int]]:
    """Parse a bracketed matrix beginning at ``first``; also returns each row's line number."""
    text_rows: list[tuple[int, str]] = []
    body = first.split("[", 1)[1]
    i, lineno = start, lines[start][0]
    closed = False
    while True:
        if "]" in body:
            body, _ = body.split("]", 1)
            closed = True
        for chunk in body.split(";"):
            if chunk.strip():
                text_rows.append((lineno, chunk))
        if closed:
            break
        i += 1
        if i >= len(lines):
            raise CaseFileError(path, lines[start][0], f"matrix mpc.{name} is not closed with ']'")
        lineno, body = lines[i]
    rows: list[list[float]] = []
    for lineno, chunk in text_rows:
        tokens = [t for t in re.split(r"[\s,]+", chunk.strip()) if t]
        rows.append([_parse_number(t, path, lineno, c + 1) for c, t in enumerate(tokens)])
    if not rows:
        return np.zeros((0, _MIN_COLS.get(name, 0))), i, []
    width = max(len(r) for r in rows)
    for (lineno, _), r in zip(text_rows, rows):
        if name == "gencost":
            continue
        if len(r) != width:
            raise CaseFileError(path, lineno, f"mpc.{name}: row has {len(r)} columns, earlier rows have {width}")
    if name in _MIN_COLS and name != "gencost" and width < _MIN_COLS[name]:
        raise CaseFileError(path, text_rows[0][0], f"mpc.{name} needs at least {_MIN_COLS[name]} columns, found {width}")
    mat = np.full((len(rows), width), np.nan)
    for r, vals in enumerate(rows):
        mat[r, :len(vals)] = vals
    return mat, i, [ln for ln, _ in text_rows]


def read_case(path: str | Path) -> Network:
    """Read a MATPOWER (version 2) case file into a :class:`Network`."""
    path = Path(path)
    try:
        raw = path.read_text(encoding="utf-8", errors="replace")
    except OSError as exc:
        raise CaseFileError(str(path), None, f"cannot read the file ({exc.strerror or exc})") from None
    lines = [(n + 1, _strip_comment(t)) for n, t in enumerate(raw.splitlines())]
    fields: dict[str, np.ndarray] = {}
    base_mva: float | None = None
    version = None
    where: dict[str, int] = {}
    row_lines: dict[str, list[int]] = {}
    i = 0
    while i < len(lines):
        lineno, text = lines[i]
        m = _ASSIGN.match(text)
        if m:
            name, rhs = m.group(1), m.group(2).strip()
            where[name] = lineno
            if name == "baseMVA":
                base_mva = _parse_number(rhs.rstrip(";").strip(), str(path), lineno)
            elif name == "version":
                version = rhs.rstrip(";").strip().strip("'\"")
            elif rhs.startswith("["):
                mat, i, row_lines[name] = _parse_matrix(lines, i, rhs, str(path), name)
                if name in _MIN_COLS:
                    fields[name] = mat
            elif rhs.startswith("{"):
                while "}" not in lines[i][1] and i + 1 < len(lines):
                    i += 1
        i += 1
    if version is not None and version != "2":
        raise CaseFileError(str(path), where.get("version"), f"case format version '{version}' is not supported (only '2')")
    if base_mva is None:
        raise CaseFileError(str(path), None, "no 'mpc.baseMVA = ...;' assignment found (is this a MATPOWER case file?)")
    if not np.isfinite(base_mva) or base_mva <= 0:
        raise CaseFileError(str(path), where.get("baseMVA"), f"mpc.baseMVA must be a positive number, found {base_mva}")
    for name in ("bus", "gen", "branch"):
        if name not in fields:
            raise CaseFileError(str(path), None, f"no 'mpc.{name} = [ ... ];' matrix found")
    gencost = fields.get("gencost")
    name = path.stem
    net = Network.from_tables(name, base_mva, fields["bus"], fields["gen"], fields["branch"], gencost,
                              source=str(path), row_lines=row_lines, sites=fields.get("injection_site"))
    return net


def _fmt(x: float) -> str:
    if np.isnan(x):
        return "NaN"
    if np.isinf(x):
        return "Inf" if x > 0 else "-Inf"
    if float(x).is_integer() and abs(x) < 1e15:
        return str(int(x))
    return repr(float(x))


def write_case(network: Network, path: str | Path) -> None:
    """Write a network as a MATPOWER version-2 case file (exact round trip)."""
    path = Path(path)
    out = [f"function mpc = {re.sub(r'[^A-Za-z0-9_]', '_', path.stem)}",
           "% written by robustbox", "mpc.version = '2';", f"mpc.baseMVA = {_fmt(network.base_mva)};", ""]
    tables = [("bus", network.bus), ("gen", network.gen), ("branch", network.branch)]
    if network.gencost is not None:
        tables.append(("gencost", network.gencost))
    if network.sites is not None:
        tables.append(("injection_site", network.sites))
    for name, mat in tables:
        out.append(f"mpc.{name} = [")
        for row in mat:
            vals = row if name != "gencost" else row[:int(4 + row[3] * (2 if row[0] == 1 else 1))]
            out.append("\t" + "\t".join(_fmt(v) for v in vals) + ";")
        out.append("];")
        out.append("")
    path.write_text("\n".join(out), encoding="utf-8")
