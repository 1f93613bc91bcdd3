"""Readers for the reference data under tests/data (comment lines start with '#')."""

from __future__ import annotations

import csv
from pathlib import Path

import pytest

DATA = Path(__file__).resolve().parent.parent / "data"


def _read(name: str) -> list[dict[str, str]]:
    lines = (DATA / name).read_text(encoding="utf-8").splitlines()
    kept = [ln for ln in lines if ln.strip() and not ln.lstrip().startswith("#")]
    return list(csv.DictReader(kept))


@pytest.fixture(scope="session")
def read_table():
    """Return a function reading a tests/data CSV (skipping '#' lines) into dicts."""
    return _read


@pytest.fixture(scope="session")
def aiag_cube(read_table):
    """The AIAG MSA 4th ed. example as a parts x appraisers x trials nested list."""
    rows = read_table("aiag_msa4_average_range_example.csv")
    cube = [[[0.0] * 3 for _ in range(3)] for _ in range(10)]
    for r in rows:
        part, who, trial = int(r["part"]) - 1, "ABC".index(r["appraiser"]), int(r["trial"]) - 1
        cube[part][who][trial] = float(r["value"])
    return cube
