"""Small shared fixtures: a reference panel and a file writer in tmp_path."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest


@pytest.fixture
def write(tmp_path: Path):
    """Write ``text`` to ``tmp_path / name`` (UTF-8) and return the path."""

    def _write(name: str, text: str) -> Path:
        path = tmp_path / name
        path.write_text(text, encoding="utf-8")
        return path

    return _write


@pytest.fixture
def reference() -> dict:
    """Three hourly series over eight steps, with gaps.

    Time step 3 is missing for every series (so a long file that leaves out
    missing rows has no row at all for it), and series "C" shows a run of 3.
    The first and last steps are observed, so every layout spans the same grid.
    """
    nan = np.nan
    values = np.array(
        [
            [1.5, 2.25, nan, nan, 4.0, -0.5, 6.0, 7.125],
            [10.0, nan, 12.0, nan, 14.0, 15.0, nan, 1e-7],
            [3.0e5, nan, nan, nan, 0.0, 2.0, 3.0, 4.0],
        ]
    )
    return {
        "series": ["A", "B", "C"],
        "time": pd.date_range("2024-03-01T00:00", periods=8, freq="h"),
        "values": values,
    }
