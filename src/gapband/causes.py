"""Known causes of gaps: read from a small CSV, carried into the fill's outputs.

A data manager often knows why a station was silent (a planned calibration,
a power failure). A causes file lists them, one row per known outage::

    series,start,end,cause,planned
    QUILL,2025-02-14T08:00,2025-02-14T16:00,planned calibration,yes
    BRASS,2025-03-01,2025-03-04T12:00,power failure,no

``start`` and ``end`` are inclusive time stamps (zone-aware ones are
converted to UTC, as the data's); ``planned`` is optional (yes/no, true/
false, 1/0; default no). :func:`attach` adds the table to a fill result as
variables along a ``cause`` dimension, so ``filled.nc`` keeps it; the
report's substitution log names the cause of each filled run, and the
capture figures show measured capture with planned maintenance left out of
the expected time steps, since capture rules often treat it apart.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

from gapband.errors import InputError
from gapband.io import parse_times

COLUMNS = ("series", "start", "end", "cause")
NOT_GIVEN = "not given"
_YES = {"yes", "true", "1", "y"}
_NO = {"no", "false", "0", "n", ""}


def read(path: str | Path, series: list[str]) -> pd.DataFrame:
    """Read and check a causes file against the fill's ``series``.

    Raises
    ------
    InputError
        The file cannot be read, lacks a column, names an unknown series, has
        an unreadable time or ``planned`` value, or a row ending before it starts.
    """
    source = str(path)
    try:
        table = pd.read_csv(path, dtype=str, keep_default_na=False, skipinitialspace=True)
    except (OSError, ValueError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot read the causes file {source!r} ({exc}); give a CSV with "
                         f"columns {', '.join(COLUMNS)} and optionally planned") from exc
    table.columns = [str(c).strip().lower() for c in table.columns]
    absent = [c for c in COLUMNS if c not in table.columns]
    if absent:
        raise InputError(f"{source}: the causes file lacks the column(s) {', '.join(absent)}; "
                         f"its columns are {list(table.columns)}")
    where = np.array([f"row {i + 2}" for i in range(len(table))], dtype=object)
    unknown = ~table["series"].str.strip().isin(series)
    if unknown.any():
        i = int(np.flatnonzero(unknown)[0])
        raise InputError(f"{source}, {where[i]}: series {table['series'].iloc[i]!r} is not in "
                         f"the data (series: {', '.join(series)})")
    planned_text = (table["planned"] if "planned" in table else pd.Series([""] * len(table)))
    planned_text = planned_text.str.strip().str.lower()
    bad = ~planned_text.isin(_YES | _NO)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise InputError(f"{source}, {where[i]}: planned = {planned_text.iloc[i]!r}; "
                         "use yes or no")
    start = parse_times(table["start"], where, source, "start")
    end = parse_times(table["end"], where, source, "end")
    backwards = end < start
    if backwards.any():
        i = int(np.flatnonzero(backwards)[0])
        raise InputError(f"{source}, {where[i]}: end {table['end'].iloc[i]!r} is before start "
                         f"{table['start'].iloc[i]!r}")
    return pd.DataFrame({"series": table["series"].str.strip(), "start": start, "end": end,
                         "cause": table["cause"].str.strip(),
                         "planned": planned_text.isin(_YES).to_numpy()})


def attach(result: xr.Dataset, table: pd.DataFrame) -> xr.Dataset:
    """``result`` with the causes as variables ``cause_*`` along a ``cause`` dimension."""
    return result.assign(
        cause_series=("cause", table["series"].to_numpy(dtype=str)),
        cause_start=("cause", table["start"].to_numpy(dtype="datetime64[ns]")),
        cause_end=("cause", table["end"].to_numpy(dtype="datetime64[ns]")),
        cause_text=("cause", table["cause"].to_numpy(dtype=str)),
        cause_planned=("cause", table["planned"].to_numpy(dtype=np.int8)),
    )


def planned_mask(result: xr.Dataset) -> np.ndarray | None:
    """(series, time) True where a planned cause covers the step; None without causes."""
    if "cause_series" not in result:
        return None
    names = [str(s) for s in result["series"].values]
    times = result["time"].values
    mask = np.zeros((len(names), times.size), dtype=bool)
    for name, start, end, planned in _rows(result):
        if planned:
            mask[names.index(name)] |= (times >= start) & (times <= end)
    return mask


def of_run(result: xr.Dataset, series: str, start: np.datetime64, end: np.datetime64) -> str:
    """The causes whose span overlaps a run of ``series`` from ``start`` to ``end``, in words."""
    texts = [text + (" (planned)" if planned else "")
             for name, (s, e, planned), text in _spans(result)
             if name == series and s <= end and e >= start]
    return "; ".join(dict.fromkeys(texts)) or NOT_GIVEN


def _rows(result: xr.Dataset):
    return zip((str(s) for s in result["cause_series"].values), result["cause_start"].values,
               result["cause_end"].values, result["cause_planned"].values.astype(bool),
               strict=True)


def _spans(result: xr.Dataset):
    if "cause_series" not in result:
        return []
    return [(name, (start, end, planned), str(text)) for (name, start, end, planned), text
            in zip(_rows(result), result["cause_text"].values, strict=True)]
