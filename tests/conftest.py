"""Shared fixtures: where the PGLib-OPF benchmark data lives."""
from __future__ import annotations

import os
from pathlib import Path

import pytest

PGLIB = Path(os.environ.get("ROBUSTBOX_PGLIB", Path(__file__).resolve().parents[1].parent / "shared" / "data" / "pglib-opf"))


def pglib_case(name: str) -> Path:
    """Path of a PGLib-OPF v23.07 case; skips the test with a reason when the data is absent."""
    sub = "api" if name.endswith("__api") else ""
    path = PGLIB / sub / f"{name}.m"
    if not path.exists():
        pytest.skip(f"PGLib-OPF data not found at {path} (set ROBUSTBOX_PGLIB to the folder holding the cases)")
    return path
