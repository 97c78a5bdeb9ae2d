"""Where the benchmark scripts find the PGLib-OPF v23.07 cases (never copied into the repository)."""
from __future__ import annotations

import os
from pathlib import Path

DATA = Path(os.environ.get("ROBUSTBOX_PGLIB", Path(__file__).resolve().parents[2] / "shared" / "data" / "pglib-opf"))


def case_path(name: str) -> Path:
    """Path of a case by name; API cases (``__api``) live in the ``api`` folder."""
    return DATA / ("api" if name.endswith("__api") else "") / f"{name}.m"
