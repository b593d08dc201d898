"""Readers: station files (CSV, Parquet, NetCDF) into a Panel.

Every reader turns its file into one long table (time, series, value, where)
and hands it to :func:`gapband.panel.from_long`, so validation and alignment
are the same whatever the format. Cells are parsed here, with messages that
name the file, the line (or row) and the column.
"""

from __future__ import annotations

import gzip
import hashlib
import re
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Literal

import numpy as np
import pandas as pd
import xarray as xr

from gapband.errors import InputError, TimestampError, UsageError, ValueParseError
from gapband.panel import from_long

#: Cell texts read as missing (compared case-insensitively, after trimming).
DEFAULT_MISSING_TOKENS: tuple[str, ...] = ("", "NA", "NaN", "null")

_TIME_NAMES = ("time", "timestamp", "datetime", "date_time", "time_hour", "date")
_SERIES_NAMES = ("series", "station", "station_id", "site", "site_id", "sensor", "id")
_VALUE_NAMES = ("value", "val", "measurement", "reading", "obs", "observation")
_ZONE = re.compile(r"(?:(?<=\d)Z|[+-]\d{2}:?\d{2})$", re.IGNORECASE)

Layout = Literal["auto", "long", "wide"]


@dataclass(frozen=True)
class ReadOptions:
    """How to read one file (all optional; the defaults detect what they can)."""

    layout: Layout = "auto"
    time_col: str | None = None
    series_col: str | None = None
    value_col: str | None = None
    variable: str | None = None
    step: str | None = None
    duplicates: Literal["error", "mean"] = "error"
    snap: str | None = None
    missing_tokens: tuple[str, ...] = DEFAULT_MISSING_TOKENS
    units: str | None = None


def read(
    path: str | Path,
    *,
    layout: Layout = "auto",
    time_col: str | None = None,
    series_col: str | None = None,
    value_col: str | None = None,
    variable: str | None = None,
    step: str | None = None,
    duplicates: Literal["error", "mean"] = "error",
    snap: str | None = None,
    missing_tokens: Sequence[str] = (),
    units: str | None = None,
) -> xr.Dataset:
    """Read a station file into a Panel.

    Parameters
    ----------
    path : str or Path
        A ``.csv`` (optionally ``.csv.gz``), ``.parquet`` or ``.nc`` file.
    layout : {"auto", "long", "wide"}
        Long: one row per (time, series, value). Wide: a time column and one
        column per series. "auto" picks long when a series column is found.
    time_col, series_col, value_col : str, optional
        Column names; detected from common names when not given.
    variable : str, optional
        NetCDF variable to read (default: the only one with a time dimension).
    step : str, optional
        Grid step (pandas frequency such as "h", "30min", "D", "MS");
        default: the most common difference between timestamps.
    duplicates : {"error", "mean"}
        Repeated (time, series) pairs are an error, or averaged.
    snap : str, optional
        Tolerance for moving off-grid timestamps to the grid, e.g. "5min".
    missing_tokens : sequence of str
        Extra cell texts meaning "missing" (e.g. "-9999"), added to
        :data:`DEFAULT_MISSING_TOKENS`.
    units : str, optional
        Units of the values, recorded on the Panel (NetCDF files carry theirs).

    Returns
    -------
    Dataset
        The Panel; ``attrs["alignment"]`` says what alignment did.

    Raises
    ------
    InputError
        With the file, line/row and column named, and what to do.
    UsageError
        An option has an invalid value (layout, step, snap, duplicates).
    """
    if layout not in ("auto", "long", "wide"):
        raise UsageError(f"layout={layout!r}: use 'auto', 'long' or 'wide'")
    path = Path(path)
    options = ReadOptions(
        layout=layout,
        time_col=time_col,
        series_col=series_col,
        value_col=value_col,
        variable=variable,
        step=step,
        duplicates=duplicates,
        snap=snap,
        missing_tokens=DEFAULT_MISSING_TOKENS + tuple(str(t) for t in missing_tokens),
        units=units,
    )
    if not path.exists():
        raise InputError(f"{path}: no such file")
    if path.is_dir():
        raise InputError(f"{path}: is a folder; give a data file (.csv, .parquet or .nc)")
    suffixes = "".join(path.suffixes[-2:]).lower()
    if path.suffix.lower() == ".nc":
        table, attrs, file_units = _netcdf_table(path, options)
    elif path.suffix.lower() == ".parquet":
        frame = _read_parquet(path)
        where = np.array([f"row {i + 1}" for i in range(len(frame))], dtype=object)
        (table, attrs), file_units = _frame_table(frame, where, path, options), None
    elif suffixes.endswith((".csv", ".csv.gz", ".txt", ".tsv")):
        frame, lines = _read_csv(path)
        where = np.array([f"line {n}" for n in lines], dtype=object)
        (table, attrs), file_units = _frame_table(frame, where, path, options), None
    else:
        raise InputError(
            f"{path}: unknown file type {path.suffix!r}; use .csv, .parquet or .nc"
        )
    panel, _ = from_long(
        table,
        source=path.name,
        step=options.step,
        duplicates=options.duplicates,
        snap=options.snap,
        units=options.units or file_units,
        attrs=attrs,
    )
    panel.attrs["input_sha256"] = _sha256(path)
    return panel


def _sha256(path: Path) -> str:
    """SHA-256 of the input file, recorded for provenance."""
    digest = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def _read_csv(path: Path) -> tuple[pd.DataFrame, np.ndarray]:
    """Every cell as text, and the file line of each row, so each cell can be judged and located.

    Rows whose cells are all blank are left out; a column without a name is
    dropped when it is blank too (a trailing separator) and refused otherwise.
    """
    sep = "\t" if ".tsv" in path.suffixes else ","
    for encoding in ("utf-8-sig", "latin-1"):
        try:
            # No header row and no skipped lines: pandas then neither renames
            # repeated or blank column names nor moves a column into the index,
            # and row i of the result is line i + 1 of the file.
            raw = pd.read_csv(
                path, sep=sep, dtype=str, keep_default_na=False, encoding=encoding,
                header=None, skip_blank_lines=False,
            )
        except UnicodeDecodeError:
            continue
        except pd.errors.EmptyDataError:
            raise InputError(_empty_csv_message(path)) from None
        except pd.errors.ParserError as err:
            raise InputError(f"{path.name}: not a readable CSV table ({err})") from None
        break
    else:  # pragma: no cover - Latin-1 decodes any byte
        raise InputError(f"{path.name}: cannot decode the text as UTF-8 or Latin-1")
    header = [str(c).strip() for c in raw.iloc[0].fillna("")]
    body = raw.iloc[1:].fillna("")
    blank = body.apply(lambda column: column.str.strip() == "")
    kept_rows = ~blank.all(axis=1)
    body, blank = body[kept_rows], blank[kept_rows]
    unnamed = [i for i, name in enumerate(header) if name == ""]
    for i in unnamed:
        filled = ~blank.iloc[:, i].to_numpy()
        if filled.any():
            line = int(body.index[filled][0]) + 1
            raise InputError(
                f"{path.name}, line {line}: column {i + 1} has values but no name on line 1; "
                "name it in the header or remove it"
            )
    kept = [i for i in range(len(header)) if i not in unnamed]
    frame = body.iloc[:, kept].copy()
    frame.columns = [header[i] for i in kept]
    _unique_columns(frame, path.name, "on line 1")
    return frame.reset_index(drop=True), body.index.to_numpy() + 1


def _empty_csv_message(path: Path) -> str:
    opener = gzip.open if path.suffix.lower() == ".gz" else open
    with opener(path, "rb") as f:
        has_text = any(line.strip() for line in f)
    if has_text:
        return f"{path.name}, line 1: the first line is blank; the column names must come first"
    return f"{path.name}: the file is empty; it needs a header and rows"


def _unique_columns(frame: pd.DataFrame, source: str, where: str) -> None:
    names = pd.Series(frame.columns)
    repeated = names[names.duplicated(keep=False)]
    if not repeated.empty:
        name = repeated.iloc[0]
        positions = [i + 1 for i in np.flatnonzero(names == name)]
        raise InputError(
            f"{source}: the column name {name!r} appears {len(positions)} times {where} "
            f"(columns {', '.join(map(str, positions))}); give every column its own name"
        )


def _read_parquet(path: Path) -> pd.DataFrame:
    try:
        frame = pd.read_parquet(path)
    except Exception as err:  # pyarrow raises many types for a bad file
        raise InputError(f"{path.name}: not a readable Parquet file ({err})") from None
    frame = frame.reset_index(drop=isinstance(frame.index, pd.RangeIndex))
    frame.columns = [str(c).strip() for c in frame.columns]
    _unique_columns(frame, path.name, "in the file")
    return frame


def _frame_table(
    frame: pd.DataFrame, where: np.ndarray, path: Path, options: ReadOptions
) -> tuple[pd.DataFrame, dict]:
    """Long table (time, series, value, where) from a long or wide frame, and attrs.

    ``where`` locates each row of ``frame`` in the file ("line 12", "row 3").
    """
    name = path.name
    if frame.shape[0] == 0:
        raise InputError(f"{name}: no data rows; the file holds only a header")
    time_col = _pick(frame, options.time_col, _TIME_NAMES, "time", name)
    times = parse_times(frame[time_col], where, name, time_col)
    attrs = {}
    offsets = utc_offsets(frame[time_col])
    if offsets:
        attrs = {"timezone": "UTC", "input_utc_offsets": ", ".join(offsets)}
    layout = options.layout
    series_col = options.series_col
    if layout == "auto":
        series_col = series_col or _find(frame, _SERIES_NAMES)
        layout = "long" if series_col else "wide"
    if layout == "long":
        series_col = _pick(frame, series_col, _SERIES_NAMES, "series", name)
        rest = [c for c in frame.columns if c not in (time_col, series_col)]
        value_col = options.value_col or _find(frame[rest], _VALUE_NAMES)
        if value_col is None:
            if len(rest) != 1:
                raise InputError(
                    f"{name}: long layout, but which column holds the values? "
                    f"Candidates: {rest}; pass --value-col"
                )
            value_col = rest[0]
        _require(frame, value_col, name, "value")
        ids = frame[series_col].astype(str).str.strip()
        blank = (ids == "") | frame[series_col].isna().to_numpy()
        if blank.any():
            raise InputError(
                f"{name}, {where[np.flatnonzero(blank)[0]]}: empty series id in column "
                f"{series_col!r}; every row needs a series"
            )
        values = parse_values(frame[value_col], where, name, value_col, options.missing_tokens)
        table = pd.DataFrame(
            {"time": times, "series": ids.to_numpy(), "value": values, "where": where}
        )
        return table, attrs
    series_cols = [c for c in frame.columns if c != time_col]
    if not series_cols:
        raise InputError(
            f"{name}: wide layout needs one column per series besides {time_col!r}; "
            "found none"
        )
    parts = [
        pd.DataFrame(
            {
                "time": times,
                "series": col,
                "value": parse_values(frame[col], where, name, col, options.missing_tokens),
                "where": where,
            }
        )
        for col in series_cols
    ]
    return pd.concat(parts, ignore_index=True), attrs


def _is_datetime(column: pd.Series) -> bool:
    return pd.api.types.is_datetime64_any_dtype(column)


def _find(frame: pd.DataFrame, names: Sequence[str]) -> str | None:
    lower = {c.lower(): c for c in frame.columns}
    return next((lower[n] for n in names if n in lower), None)


def _pick(
    frame: pd.DataFrame, given: str | None, names: Sequence[str], role: str, source: str
) -> str:
    if given is not None:
        _require(frame, given, source, role)
        return given
    found = _find(frame, names)
    if found is None:
        raise InputError(
            f"{source}: no {role} column found among {list(frame.columns)}; "
            f"name it with --{role}-col"
        )
    return found


def _require(frame: pd.DataFrame, column: str, source: str, role: str) -> None:
    if column not in frame.columns:
        raise InputError(
            f"{source}: the {role} column {column!r} is not in the file; "
            f"columns are {list(frame.columns)}"
        )


def parse_times(
    column: pd.Series, where: np.ndarray, source: str, name: str
) -> np.ndarray:
    """Parse timestamps; zone-aware input is converted to UTC (naive).

    Raises :class:`TimestampError` for unparseable cells and for a column
    mixing zone-aware and naive timestamps.
    """
    if _is_datetime(column):
        parsed = pd.DatetimeIndex(column)
        if parsed.tz is not None:
            parsed = parsed.tz_convert("UTC").tz_localize(None)
        _no_missing_times(parsed, where, source, name, column)
        return parsed.to_numpy(dtype="datetime64[ns]")
    text = column.astype(str).str.strip()
    zoned = text.str.contains(_ZONE)
    if zoned.any() and not zoned.all():
        i, j = np.flatnonzero(zoned)[0], np.flatnonzero(~zoned)[0]
        raise TimestampError(
            f"{source}: column {name!r} mixes timestamps with a time zone "
            f"({where[i]}: {text.iloc[i]!r}) and without ({where[j]}: {text.iloc[j]!r}); "
            "give every timestamp the same form"
        )
    parsed = pd.to_datetime(text, format="ISO8601", errors="coerce", utc=bool(zoned.any()))
    if parsed.isna().any():
        parsed = pd.to_datetime(text, format="mixed", errors="coerce", utc=bool(zoned.any()))
    _no_missing_times(pd.DatetimeIndex(parsed), where, source, name, text)
    index = pd.DatetimeIndex(parsed)
    if index.tz is not None:
        index = index.tz_convert("UTC").tz_localize(None)
    return index.to_numpy(dtype="datetime64[ns]")


def _no_missing_times(
    parsed: pd.DatetimeIndex, where: np.ndarray, source: str, name: str, raw: pd.Series
) -> None:
    bad = np.flatnonzero(parsed.isna())
    if bad.size:
        i = bad[0]
        raise TimestampError(
            f"{source}, {where[i]}: cannot read {raw.iloc[i]!r} in column {name!r} as a "
            f"timestamp ({bad.size} such rows); use ISO 8601, e.g. 2024-01-31T13:00 or "
            "2024-01-31T13:00+01:00"
        )


def utc_offsets(column: pd.Series) -> list[str]:
    """Return the distinct UTC offsets of a column of timestamps (text or zone-aware)."""
    if _is_datetime(column):
        if getattr(column.dt, "tz", None) is None:
            return []
        return sorted({_colon(z) for z in column.dropna().dt.strftime("%z")})
    found = column.astype(str).str.strip().str.extract(f"({_ZONE.pattern})", re.IGNORECASE,
                                                         expand=False).dropna()
    return sorted({"+00:00" if z.upper() == "Z" else _colon(z) for z in found})


def _colon(offset: str) -> str:
    return offset if ":" in offset else f"{offset[:3]}:{offset[3:]}"


def parse_values(
    column: pd.Series,
    where: np.ndarray,
    source: str,
    name: str,
    missing_tokens: Sequence[str],
) -> np.ndarray:
    """Parse a column of numbers; missing tokens become NaN, anything else is an error."""
    if pd.api.types.is_bool_dtype(column):
        raise ValueParseError(f"{source}: column {name!r} holds true/false values, not numbers")
    if pd.api.types.is_numeric_dtype(column):
        values = column.to_numpy(dtype="float64", na_value=np.nan)
    else:
        text = column.astype(str).str.strip()
        tokens = {t.strip().lower() for t in missing_tokens}
        is_missing = (text.str.lower().isin(tokens) | column.isna()).to_numpy()
        values = _numbers(text.to_numpy(dtype=object), is_missing)
        bad = np.flatnonzero(np.isnan(values) & ~is_missing)
        if bad.size:
            i = bad[0]
            raise ValueParseError(
                f"{source}, {where[i]}, column {name!r}: {text.iloc[i]!r} is not a number "
                f"({bad.size} such cells). If it marks a missing value, add it with "
                "--missing-token"
            )
    inf = np.flatnonzero(np.isinf(values))
    if inf.size:
        i = inf[0]
        raise ValueParseError(
            f"{source}, {where[i]}, column {name!r}: infinite value ({inf.size} such cells); "
            "replace them with a missing-value token or a real measurement"
        )
    return values


def _numbers(cells: np.ndarray, is_missing: np.ndarray) -> np.ndarray:
    """Cells as float64, NaN where missing or unreadable.

    Parsed as Python parses a float literal, which rounds correctly: pandas'
    own fast parser can land one unit in the last place off (e.g. on a
    leading "+"), and an observed value must arrive bit for bit.
    """
    values = np.full(cells.shape, np.nan)
    given = ~is_missing
    try:
        values[given] = np.asarray(cells[given], dtype=str).astype("float64")
    except ValueError:  # some cell is not a number: parse one by one to find it
        values[given] = [_number(cell) for cell in cells[given]]
    return values


def _number(cell: str) -> float:
    try:
        return float(cell)
    except ValueError:
        return np.nan


def _netcdf_table(
    path: Path, options: ReadOptions
) -> tuple[pd.DataFrame, dict, str | None]:
    """Long table from a NetCDF variable with a time and a station dimension."""
    name = path.name
    try:
        ds = xr.open_dataset(path)
    except Exception as err:  # the engines raise many types for a bad file
        raise InputError(f"{name}: not a readable NetCDF file ({err})") from None
    with ds:
        var = _netcdf_variable(ds, options.variable, name)
        da = ds[var]
        time_dim = next(d for d in da.dims if np.issubdtype(ds[d].dtype, np.datetime64))
        (series_dim,) = [d for d in da.dims if d != time_dim]
        da = da.transpose(series_dim, time_dim).load()
        series = _station_ids(ds, series_dim, da)
        times = pd.DatetimeIndex(da[time_dim].values)
        values = da.values.astype("float64")
        attrs = {k: v for k, v in da.attrs.items() if k in ("long_name", "standard_name")}
        if isinstance(ds.attrs.get("title"), str):
            attrs["title"] = ds.attrs["title"]  # the dataset's name (CF global attribute)
    n_series, n_time = values.shape
    where = np.array(
        [f"{series_dim} {s}, {time_dim} index {t}" for s in range(n_series) for t in range(n_time)],
        dtype=object,
    )
    flat = values.reshape(-1)
    inf = np.flatnonzero(np.isinf(flat))
    if inf.size:
        raise ValueParseError(
            f"{name}, variable {var!r}, {where[inf[0]]}: infinite value ({inf.size} such "
            "cells); replace them with the fill value or a real measurement"
        )
    if times.isna().any():
        raise TimestampError(f"{name}: the {time_dim!r} coordinate has missing timestamps")
    table = pd.DataFrame(
        {
            "time": np.tile(times.to_numpy(dtype="datetime64[ns]"), n_series),
            "series": np.repeat(series, n_time),
            "value": flat,
            "where": where,
        }
    )
    return table, {"variable": var, **attrs}, da.attrs.get("units")


def _netcdf_variable(ds: xr.Dataset, given: str | None, name: str) -> str:
    candidates = [
        v
        for v in ds.data_vars
        if ds[v].ndim == 2
        and any(np.issubdtype(ds[d].dtype, np.datetime64) for d in ds[v].dims if d in ds.coords)
    ]
    if given is not None:
        if given not in candidates:
            raise InputError(
                f"{name}: variable {given!r} is not a (station, time) variable; "
                f"candidates are {candidates}"
            )
        return given
    if len(candidates) != 1:
        raise InputError(
            f"{name}: {'no' if not candidates else 'several'} variables with a time and a "
            f"station dimension ({candidates}); choose one with --variable"
        )
    return candidates[0]


def _station_ids(ds: xr.Dataset, series_dim: str, da: xr.DataArray) -> np.ndarray:
    """Station ids: a CF timeseries_id variable if present, else the dimension's labels."""
    for v in ds.variables:
        if ds[v].attrs.get("cf_role") == "timeseries_id" and ds[v].dims == (series_dim,):
            return np.array([_text(x) for x in ds[v].values], dtype=object)
    return np.array([_text(x) for x in da[series_dim].values], dtype=object)


def _text(x: object) -> str:
    return x.decode() if isinstance(x, bytes) else str(x)
