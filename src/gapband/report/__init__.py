"""The HTML report of a fill: one self-contained file, readable offline and printable.

:func:`render` turns a fill folder (``filled.nc``, ``summary.json`` and,
when present, a ``holdout.json``) into HTML; :func:`write` saves it
atomically. Every figure is a PNG embedded as a data URI; the page loads no
script, font, style sheet or image from anywhere. Every user-supplied string
(series ids, units, file names) is escaped by the template engine.
"""

from __future__ import annotations

import json
import time
from importlib.resources import files
from pathlib import Path

import jinja2
import numpy as np
import pandas as pd

from gapband import outputs
from gapband.calibration import CALIBRATION_FORMAT, CALIBRATION_VERSION
from gapband.errors import InputError
from gapband.flags import FLAG_MEANINGS
from gapband.report import content
from gapband.report.palette import FLAG_COLOURS

DEFAULT_NAME = "report.html"


def render(
    folder: str | Path,
    *,
    holdout: str | Path | None = None,
    period: str | None = None,
    capture_threshold: float = 90.0,
    title: str | None = None,
) -> str:
    """The report of the fill in ``folder`` as one HTML document.

    Parameters
    ----------
    folder : path
        The ``--out`` folder of ``gapband fill``.
    holdout : path, optional
        A ``holdout.json``; default ``folder/holdout.json`` when it exists.
    period : {"day", "month", "year"}, optional
        Period of the statistics section; default by record length (a year
        or more: year; two months or more: month; else day).
    capture_threshold : float
        Data capture (%) a series should reach, shown against the figures.
    title : str, optional
        The network's or dataset's name; default the input's NetCDF ``title``
        attribute, else the input file's name.

    Raises
    ------
    InputError
        ``folder`` holds no fill, or the holdout file cannot be read.
    """
    started = time.perf_counter()
    result, summary = outputs.open_fill(folder)
    holdout_report = _read_holdout(Path(folder), holdout)
    units = str(result["value"].attrs.get("units", ""))
    method = summary.get("method", "")
    name = title or result.attrs.get("title") or summary.get("source") or Path(folder).name
    page = {
        "title": f"Filled record: {name}",
        "summary": content.summary_section(result, summary, holdout_report, units),
        "provenance": content.provenance(result, summary),
        "threshold": capture_threshold,
        "capture": content.capture(summary, capture_threshold),
        "gap_map": content.figures.gap_map(
            result["fill_flag"].transpose("series", "time").values,
            [str(s) for s in result["series"].values], result["time"].values),
        "flag_colours": [(m.replace("_", " "), FLAG_COLOURS[m]) for m in FLAG_MEANINGS],
        "log": content.substitution_log(result, method),
        "series": content.series_figures(result, units),
        "flags": content.flag_counts(summary),
        "reasons": content.reason_counts(summary),
        "stats": content.period_statistics(result, period),
        "holdout": (content.holdout(holdout_report, summary.get("input_sha256"), units)
                    if holdout_report else None),
        "units": units,
        "method": method,
        "method_words": content.method_words(summary),
        "approximate": bool(summary.get("approximate")),
        "version": summary.get("versions", {}).get("gapband", ""),
        "made": pd.Timestamp.now("UTC").strftime("%Y-%m-%d %H:%M UTC"),
    }
    page["seconds"] = round(time.perf_counter() - started, 1)
    return _template().render(**page)


def write(
    folder: str | Path,
    out: str | Path | None = None,
    *,
    overwrite: bool = False,
    **options,
) -> Path:
    """Render the report of ``folder`` and write it (default ``folder/report.html``).

    ``options`` go to :func:`render`. Refuses to replace an existing file
    unless ``overwrite``.

    Raises
    ------
    UsageError
        The file exists and ``overwrite`` is False.
    InputError
        As :func:`render`.
    """
    target = Path(out) if out is not None else Path(folder) / DEFAULT_NAME
    outputs.prepare_dir(target.parent, [target.name], overwrite)
    html = render(folder, **options)
    with outputs.atomic_path(target) as tmp:
        tmp.write_text(html, encoding="utf-8")
    return target


def _read_holdout(folder: Path, given: str | Path | None) -> dict | None:
    path = Path(given) if given is not None else folder / "holdout.json"
    if given is None and not path.is_file():
        return None
    try:
        report = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise InputError(f"cannot read holdout file {str(path)!r} ({exc}); give the "
                         "holdout.json written by gapband holdout") from exc
    if not isinstance(report, dict) or report.get("format") != CALIBRATION_FORMAT:
        raise InputError(f"{str(path)!r} is not a gapband holdout file; give the holdout.json "
                         "written by gapband holdout")
    if report.get("format_version") != CALIBRATION_VERSION:
        raise InputError(f"holdout file {str(path)!r} has format_version "
                         f"{report.get('format_version')!r}; this gapband reports version "
                         f"{CALIBRATION_VERSION} (evidence by gap length): rerun gapband holdout")
    return report


def _template() -> jinja2.Template:
    env = jinja2.Environment(autoescape=True, undefined=jinja2.StrictUndefined,
                             trim_blocks=True, lstrip_blocks=True)
    env.filters["num"] = _number
    env.filters["pct"] = lambda v: _number(v, ".1f")
    env.filters["share"] = lambda v: _number(None if v is None else 100.0 * v, ".1f")
    text = files("gapband.report").joinpath("template.html.j2").read_text(encoding="utf-8")
    return env.from_string(text)


def _number(value: object, spec: str = ".4g") -> str:
    if value is None or (isinstance(value, float | np.floating) and not np.isfinite(value)):
        return "–"
    return format(value, spec)
