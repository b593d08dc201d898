"""Writing the fill outputs: ``filled.nc``, the long table and JSON summaries.

:func:`open_fill` reads a fill folder back for ``gapband stats`` and
``gapband report``.

Every writer goes through :func:`atomic_path`: the file is written under a
temporary name in the target folder and renamed onto the target only once
complete, so a crash, an error or an interruption never leaves a half-written
output, and an existing output survives a failed rewrite. :func:`atomic_paths`
does the same for a set of files that belong together.
"""

from __future__ import annotations

import json
import math
import os
import secrets
import signal
import threading
from collections.abc import Iterable, Iterator
from contextlib import contextmanager
from datetime import date, datetime, timedelta
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

from gapband.errors import InputError, UsageError
from gapband.flags import FLAG_MEANINGS, OWN_WIDTH, interval_levels, reason_names

CONVENTIONS = "CF-1.10"

_LONG_NAMES = {
    "filled": "observed value, or posterior median where missing",
    "fill_draws": "joint posterior predictive draws of the filled cells",
    "fill_mean": "posterior predictive mean",
    "fill_median": "posterior predictive median",
    "fill_sd": "posterior predictive standard deviation",
    OWN_WIDTH: "width of the flag level's central posterior predictive interval before "
               "calibration",
}
_TABLE_SUFFIXES = (".csv", ".parquet")

#: Most decimals the long table rounds fills to (see :func:`input_decimals`).
MAX_DECIMALS = 10


@contextmanager
def atomic_path(path: str | os.PathLike) -> Iterator[Path]:
    """Yield a temporary path next to ``path``; move it onto ``path`` on success.

    See :func:`atomic_paths`; the temporary file is removed when the block
    raises, and ``path`` is then left as it was.
    """
    with atomic_paths([path]) as (tmp,):
        yield tmp


@contextmanager
def atomic_paths(paths: Iterable[str | os.PathLike]) -> Iterator[list[Path]]:
    """Yield temporary paths next to ``paths``; move each onto its target on success.

    A temporary file is named ``.<name>.tmp-<random><suffix>`` in the target's
    folder: hidden, plainly temporary, ending like the target (writers choose
    the format by the suffix), and on the same file system, so the final
    :func:`os.replace` is a rename. When the block raises — an error, or
    SIGINT/SIGTERM turned into an exception — every temporary file is removed
    and every target left as it was. The renames run with SIGINT and SIGTERM
    held back (delivered right after), so a set of files is replaced whole.
    """
    targets = [Path(p) for p in paths]
    tmps = [t.with_name(f".{t.name}.tmp-{secrets.token_hex(6)}{t.suffix}") for t in targets]
    try:
        yield tmps
        with _signals_held():
            for tmp, target in zip(tmps, targets, strict=True):
                os.replace(tmp, target)
    except BaseException:
        for tmp in tmps:
            tmp.unlink(missing_ok=True)
        raise


@contextmanager
def _signals_held() -> Iterator[None]:
    """Record SIGINT and SIGTERM during the block and deliver them after it.

    Python runs signal handlers in the main thread only; elsewhere there is
    nothing to hold back.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    caught: list[int] = []
    # A handler installed outside Python (getsignal gives None) cannot be put back.
    held = [sig for sig in (signal.SIGINT, signal.SIGTERM) if signal.getsignal(sig) is not None]
    previous = {sig: signal.signal(sig, lambda signum, frame: caught.append(signum))
                for sig in held}
    try:
        yield
    finally:
        for sig, handler in previous.items():
            signal.signal(sig, handler)
        for signum in caught[:1]:
            signal.raise_signal(signum)


def prepare_dir(out_dir: str | os.PathLike, names: Iterable[str], overwrite: bool) -> Path:
    """Create the output folder, refusing to replace existing outputs.

    Parameters
    ----------
    out_dir : path
        The output folder; created with its parents when absent.
    names : iterable of str
        File names the run will write into it.
    overwrite : bool
        Allow replacing files that already exist.

    Returns
    -------
    Path
        The output folder.

    Raises
    ------
    UsageError
        ``out_dir`` is a file, or some of ``names`` exist and ``overwrite`` is False.
    """
    folder = Path(out_dir)
    if folder.exists() and not folder.is_dir():
        raise UsageError(f"output folder {str(folder)!r} is a file; choose a folder path")
    existing = [n for n in names if (folder / n).exists()]
    if existing and not overwrite:
        raise UsageError(
            f"{str(folder)!r} already holds {', '.join(existing)}; pass --overwrite to "
            "replace them, or choose another output folder"
        )
    folder.mkdir(parents=True, exist_ok=True)
    return folder


def write_netcdf(result: xr.Dataset, path: str | os.PathLike) -> Path:
    """Write the whole result as a CF-1.10 NetCDF-4 file (engine h5netcdf).

    Units of ``value`` are copied to ``filled`` and every fill summary, a
    ``long_name`` is added where absent, time is encoded as integer offsets
    ("<unit> since <date>"), and attributes that are not strings, numbers or
    numeric arrays (dicts, lists, booleans, None) are stored as JSON text,
    because NetCDF attributes can hold only those.
    """
    ds = _cf_dataset(result)
    encoding = {
        name: {"zlib": True, "complevel": 4, "shuffle": True}
        for name, var in ds.data_vars.items()
        if var.ndim and var.dtype.kind in "iuf"
    }
    encoding["time"] = {"dtype": "int64", "calendar": "proleptic_gregorian"}
    with atomic_path(path) as tmp:
        ds.to_netcdf(tmp, engine="h5netcdf", encoding=encoding)
    return Path(path)


def open_fill(folder: str | os.PathLike) -> tuple[xr.Dataset, dict]:
    """Read ``filled.nc`` and ``summary.json`` from a folder written by ``gapband fill``.

    Returns
    -------
    result : Dataset
        ``filled.nc``, loaded into memory (the file is closed).
    summary : dict
        ``summary.json``.

    Raises
    ------
    InputError
        The folder does not exist, lacks either file, or a file cannot be read.
    """
    root = Path(folder)
    if not root.is_dir():
        raise InputError(f"{str(root)!r} is not a folder; give the --out folder of a "
                         "gapband fill run")
    absent = [name for name in ("filled.nc", "summary.json") if not (root / name).is_file()]
    if absent:
        raise InputError(f"{str(root)!r} holds no {' or '.join(absent)}: it is not the output "
                         "of a fill; run gapband fill INPUT --out " f"{root} first")
    try:
        with xr.open_dataset(root / "filled.nc", engine="h5netcdf") as ds:
            result = ds.load()
        summary = json.loads((root / "summary.json").read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise InputError(f"cannot read the fill in {str(root)!r} ({exc}); rerun gapband "
                         "fill") from exc
    if "fill_flag" not in result or "value" not in result:
        raise InputError(f"{str(root / 'filled.nc')!r} is not a gapband fill (no fill_flag); "
                         "rerun gapband fill")
    return result, summary


def long_table(result: xr.Dataset, decimals: int | str = "input") -> pd.DataFrame:
    """Return the result as a long table, one row per cell, series by series.

    Columns: ``time, series, units, observed, filled, sd, lower_<L>, upper_<L>``
    (per level, increasing), ``flag`` (the flag meaning as text),
    ``flag_code`` (its number, as in filled.nc) and ``reason`` (the reasons
    of ``fill_reason`` as words joined by ``;``, empty for observed cells
    and plain fills). ``sd`` and the bounds are empty for observed and
    not-filled cells; ``units`` is empty when the input did not state them.

    ``decimals``: ``"input"`` rounds each series' fills and bounds to the
    resolution of its observed values (:func:`input_decimals`; the sd gets
    one decimal more), an integer rounds every series to that many decimals,
    ``"full"`` keeps full precision. Observed values are never rounded.
    """
    absent = [n for n in ("value", "filled", "fill_sd", "fill_flag") if n not in result]
    if absent:
        raise UsageError(
            f"the result lacks {', '.join(absent)}; write the Dataset returned by flags.assign"
        )
    ds = result.transpose("series", "time", ...)
    n_series, n_time = ds.sizes["series"], ds.sizes["time"]
    values = ds["value"].values
    missing = np.isnan(values)
    places = _places(values, decimals)

    def fill_only(name: str, extra: int = 0) -> np.ndarray:
        return _rounded(np.where(missing, ds[name].values, np.nan), places, extra).ravel()

    codes = ds["fill_flag"].values.ravel()
    columns: dict[str, np.ndarray] = {
        "time": np.tile(ds["time"].values, n_series),
        "series": np.repeat(ds["series"].values.astype(str), n_time),
        "units": np.full(n_series * n_time, ds["value"].attrs.get("units") or ""),
        "observed": values.ravel(),
        "filled": np.where(missing, _rounded(ds["filled"].values, places), values).ravel(),
        "sd": fill_only("fill_sd", extra=1),
    }
    for level in interval_levels(ds):
        columns[f"lower_{level}"] = fill_only(f"lower_{level}")
        columns[f"upper_{level}"] = fill_only(f"upper_{level}")
    columns["flag"] = np.asarray(FLAG_MEANINGS)[codes]
    columns["flag_code"] = codes
    columns["reason"] = (reason_names(ds["fill_reason"].values.ravel()) if "fill_reason" in ds
                         else np.full(codes.size, "", dtype=object))
    return pd.DataFrame(columns)


def input_decimals(values: np.ndarray) -> np.ndarray:
    """Per series (rows of ``values``), the decimals its observed values are given to.

    The fewest decimals d (0 to :data:`MAX_DECIMALS`) at which every observed
    value times 10^d is a whole number to within 1e-6: 1 for values read from
    "32.8", 0 for "1200". -1 where no d fits (values beyond the resolution of
    a few decimals, or none observed): such a series is not rounded.
    """
    found = np.full(values.shape[0], -1)
    for n, row in enumerate(values):
        seen = row[~np.isnan(row)]
        if not seen.size or np.abs(seen).max() >= 1e9:
            continue
        for d in range(MAX_DECIMALS + 1):
            scaled = seen * 10.0**d
            if np.abs(scaled - np.rint(scaled)).max() <= 1e-6:
                found[n] = d
                break
    return found


def _places(values: np.ndarray, decimals: int | str) -> np.ndarray:
    """Decimals per series for :func:`long_table`'s ``decimals`` (-1: not rounded)."""
    if decimals == "input":
        return input_decimals(values)
    if decimals == "full":
        return np.full(values.shape[0], -1)
    if isinstance(decimals, int | np.integer) and not isinstance(decimals, bool) \
            and 0 <= decimals <= MAX_DECIMALS:
        return np.full(values.shape[0], int(decimals))
    raise UsageError(f"decimals must be 'input', 'full' or a whole number from 0 to "
                     f"{MAX_DECIMALS}, not {decimals!r}")


def _rounded(values: np.ndarray, places: np.ndarray, extra: int = 0) -> np.ndarray:
    """Each row of ``values`` rounded to its series' decimals plus ``extra`` (-1: as is)."""
    out = values.copy()
    for n, d in enumerate(places):
        if d >= 0:
            out[n] = np.round(values[n], d + extra)
    return out


def write_table(result: xr.Dataset, path: str | os.PathLike,
                decimals: int | str = "input") -> Path:
    """Write :func:`long_table` as CSV or Parquet, chosen by the file suffix.

    CSV holds time as ISO-8601 text (with ``Z`` when the input's times were
    zoned and so converted to UTC) and floats in their shortest form
    (``repr``): an observed value reads back bit for bit, a rounded fill as
    its decimals. Empty fields are missing. Parquet keeps time as a
    timestamp. ``decimals`` as in :func:`long_table`.

    Raises
    ------
    UsageError
        The suffix is neither ``.csv`` nor ``.parquet``, or ``decimals`` is invalid.
    """
    target = Path(path)
    suffix = target.suffix.lower()
    if suffix not in _TABLE_SUFFIXES:
        raise UsageError(
            f"table file {str(target)!r} must end in {' or '.join(_TABLE_SUFFIXES)}"
        )
    table = long_table(result, decimals)
    with atomic_path(target) as tmp:
        if suffix == ".csv":
            zone = "Z" if result.attrs.get("timezone") == "UTC" else ""
            table["time"] = np.char.add(_iso(table["time"].to_numpy()).astype(str), zone)
            # float_format stays None: pandas then writes repr(), the shortest
            # text that reads back to the same double.
            table.to_csv(tmp, index=False, na_rep="", lineterminator="\n")
        else:
            table.to_parquet(tmp, index=False)
    return target


def write_json(obj: object, path: str | os.PathLike) -> Path:
    """Write ``obj`` as UTF-8 JSON, indented 2, keys in their given order.

    numpy scalars and arrays become Python numbers and lists, dates ISO-8601
    text, NaN and infinities ``null`` (JSON has no NaN).
    """
    text = json.dumps(jsonable(obj), indent=2, ensure_ascii=False, allow_nan=False) + "\n"
    with atomic_path(path) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return Path(path)


def jsonable(obj: object) -> object:
    """Convert ``obj`` into plain JSON types (see :func:`write_json`).

    Raises
    ------
    TypeError
        An object of a type JSON cannot represent.
    """
    if isinstance(obj, dict):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return jsonable(obj.tolist())
    if obj is None or obj is pd.NaT:
        return None
    if isinstance(obj, np.datetime64):
        return None if np.isnat(obj) else pd.Timestamp(obj).isoformat()
    if isinstance(obj, np.timedelta64):
        return None if np.isnat(obj) else pd.Timedelta(obj).isoformat()
    if isinstance(obj, np.generic):
        return jsonable(obj.item())
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, str | int):
        return obj
    if isinstance(obj, datetime | date):
        return obj.isoformat()
    if isinstance(obj, timedelta):
        return pd.Timedelta(obj).isoformat()
    if isinstance(obj, os.PathLike):
        return os.fspath(obj)
    raise TypeError(f"cannot write {type(obj).__name__} {obj!r} as JSON")


def _cf_dataset(result: xr.Dataset) -> xr.Dataset:
    ds = result.drop_encoding()
    units = result["value"].attrs.get("units") if "value" in result else None
    for name in ds.variables:
        attrs = {k: _netcdf_attr(v) for k, v in ds[name].attrs.items()}
        if _is_fill_variable(str(name)):
            attrs.setdefault("long_name", _long_name(str(name)))
            if units is not None:
                attrs["units"] = units
        ds[name].attrs = attrs
    ds["time"].attrs.update({"standard_name": "time", "long_name": "time", "axis": "T"})
    ds["series"].attrs.setdefault("long_name", "series id")
    ds.attrs = {k: _netcdf_attr(v) for k, v in result.attrs.items()}
    ds.attrs["Conventions"] = CONVENTIONS
    return ds


def _is_fill_variable(name: str) -> bool:
    return name not in ("fill_flag", "fill_reason") and (
        name == "filled" or name.startswith(("fill_", "lower_", "upper_"))
    )


def _long_name(name: str) -> str:
    if name in _LONG_NAMES:
        return _LONG_NAMES[name]
    side, level = name.split("_", 1)
    return f"{side} bound of the central {level}% posterior predictive interval"


def _netcdf_attr(value: object) -> object:
    if isinstance(value, np.ndarray) and value.dtype.kind in "iuf":
        return value
    if isinstance(value, str | int | float | np.integer | np.floating) and not isinstance(
        value, bool
    ):
        return value
    plain = jsonable(value)
    return plain if isinstance(plain, str) else json.dumps(plain, ensure_ascii=False)


def _iso(times: np.ndarray) -> np.ndarray:
    whole_seconds = (times.astype("datetime64[ns]").astype("int64") % 1_000_000_000 == 0).all()
    return np.datetime_as_string(times, unit="s" if whole_seconds else "ns")
