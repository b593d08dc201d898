"""What the report shows, as plain tables and figure URIs (no HTML here).

Each function takes the fill result (``filled.nc``), its ``summary.json`` or
a ``holdout.json`` and returns rows and figures for one section of the
template.
"""

from __future__ import annotations

import json
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from gapband import flags, stats
from gapband.errors import InputError, UsageError
from gapband.filling import COMPONENTS
from gapband.panel import gap_runs
from gapband.report import figures

#: A record at least this long gets monthly statistics, then yearly ones.
_MONTHLY_FROM = pd.Timedelta(days=56)
_YEARLY_FROM = pd.Timedelta(days=730)


def provenance(result: xr.Dataset, summary: dict) -> dict:
    """How the fill was made: input, settings, spec, diagnostics, versions."""
    attrs = result.attrs
    diagnostics = summary.get("diagnostics", {})
    spec = attrs.get("gapband_spec")
    return {
        "rows": [
            ("input file", summary.get("source")),
            ("input SHA-256", summary.get("input_sha256")),
            ("grid step", attrs.get("step")),
            ("record", f"{_day(result['time'].values[0])} to {_day(result['time'].values[-1])}"),
            ("series × time steps", f"{result.sizes['series']} × {result.sizes['time']}"),
            ("inference method", summary.get("method")
             + (" (approximate)" if summary.get("approximate") else "")),
            ("model spec", summary.get("spec")),
            ("seed", summary.get("seed")),
            ("interval levels (%)", ", ".join(f"{v:g}" for v in summary.get("levels", []))),
            ("flag rules", attrs.get("gapband_flag_rules") or json.dumps(summary.get(
                "flag_rules"))),
            ("calibration", "none" if summary.get("calibration") is None
             else json.dumps(summary["calibration"])),
            ("joint draws kept", int(result.sizes.get("fill_draw", 0))),
            ("history", attrs.get("history")),
        ],
        "diagnostics": [(key, _text(value)) for key, value in diagnostics.items()
                        if key != "warnings"],
        "warnings": list(diagnostics.get("warnings", [])),
        "verdict": verdict(diagnostics),
        "versions": list(summary.get("versions", {}).items()),
        "spec": json.dumps(json.loads(spec), indent=2) if spec else "",
    }


def verdict(diagnostics: dict) -> tuple[bool, str]:
    """Whether the fit converged, in one plain sentence for the top of the report."""
    converged = bool(diagnostics.get("converged"))
    r_hat = diagnostics.get("r_hat_max")
    if r_hat is None:
        return converged, ("The fit converged." if converged else
                           "The fit's convergence could not be checked.")
    figures = (f"largest R-hat {r_hat:.3f} (target ≤ 1.01), smallest ESS "
               f"{min(diagnostics['ess_bulk_min'], diagnostics['ess_tail_min']):.0f} "
               "(target ≥ 400)")
    if converged:
        return True, f"The sampler's chains agree: {figures}."
    why = (" when its time budget ran out" if diagnostics.get("stopped_by") == "budget"
           else "")
    return False, (f"The sampler stopped{why} before its chains agreed: {figures}. Its fills "
                   "are flagged filled_uncertain unless the run accepted unconverged fits.")


def capture(summary: dict, threshold: float) -> list[dict]:
    """Capture per series before and after filling, against ``threshold`` %."""
    shares = summary["capture"]
    return [
        {"series": name, "measured": shares["measured"][name],
         "with_fills": shares["with_fills"][name],
         "with_confident_fills": shares["with_confident_fills"][name],
         "meets_measured": shares["measured"][name] >= threshold,
         "meets_with_fills": shares["with_fills"][name] >= threshold}
        for name in shares["measured"]
    ]


def flag_counts(summary: dict) -> dict:
    """Cells per flag meaning, overall and per series."""
    counts = summary["flags"]
    return {"meanings": list(flags.FLAG_MEANINGS), "overall": counts["overall"],
            "series": counts["series"]}


def substitution_log(result: xr.Dataset, method: str) -> dict:
    """Every filled run: series, start, end, cells, method, widest interval, flag."""
    flag = result["fill_flag"].transpose("series", "time").values
    filled = (flag == flags.FILLED) | (flag == flags.FILLED_UNCERTAIN)
    level = widest_level(result)
    width = (result[f"upper_{level}"] - result[f"lower_{level}"]).transpose(
        "series", "time").values if level else np.full(flag.shape, np.nan)
    times = result["time"].values
    names = [str(s) for s in result["series"].values]
    rows = []
    for s, start, length in gap_runs(filled):
        run = slice(start, start + length)
        rows.append({
            "series": names[s], "start": _stamp(times[start]),
            "end": _stamp(times[start + length - 1]), "cells": length, "method": method,
            "widest": float(np.nanmax(width[s, run])) if level else None,
            "flag": "filled_uncertain" if (flag[s, run] == flags.FILLED_UNCERTAIN).any()
            else "filled",
        })
    return {"level": level.replace("_", ".") if level else None, "rows": rows}


def widest_level(result: xr.Dataset) -> str | None:
    """The level whose interval the log reports: the flag rules' level, else the widest."""
    levels = flags.interval_levels(result)
    if not levels:
        return None
    rules = json.loads(result.attrs.get("gapband_flag_rules", "{}") or "{}")
    wanted = f"{rules.get('level', -1):g}".replace(".", "_")
    return wanted if wanted in levels else levels[-1]


def series_figures(result: xr.Dataset, units: str) -> list[dict]:
    """Per series: the filled spans with their bands, and the component decomposition."""
    levels = flags.interval_levels(result)
    times = result["time"].values
    flag = result["fill_flag"].transpose("series", "time").values
    has_parts = all(f"component_{c}" in result for c in COMPONENTS)
    transform = (result["component_trend"].attrs.get("transform", "none") if has_parts
                 else "none")
    unit_label = units or "data units" if transform == "none" else f"{transform} units"
    out = []
    for i, name in enumerate(result["series"].values):
        row = result.isel(series=i)
        filled = (flag[i] == flags.FILLED) | (flag[i] == flags.FILLED_UNCERTAIN)
        values = {k: row[k].values for k in ("value", "fill_median")
                  } | {f"{side}_{lv}": row[f"{side}_{lv}"].values
                       for lv in levels for side in ("lower", "upper")}
        entry = {"series": str(name), "n_filled": int(filled.sum()), "spans": None,
                 "parts": None}
        if filled.any():
            entry["spans"] = figures.filled_spans(str(name), values, times, levels,
                                                  zoom_window(filled), units)
            if has_parts and np.isfinite(row["component_offset"].values):
                parts = {c: row[f"component_{c}"].values for c in COMPONENTS}
                entry["parts"] = figures.decomposition(str(name), parts, times, filled,
                                                       unit_label)
        out.append(entry)
    return out


def zoom_window(filled: np.ndarray) -> slice | None:
    """The longest filled run with context either side; None when the record is short."""
    runs = gap_runs(filled[None, :])
    if filled.size <= figures.MAX_COLUMNS // 4 or not runs:
        return None
    _, start, length = max(runs, key=lambda r: r[2])
    context = max(figures.ZOOM_CONTEXT, length)
    lo, hi = max(0, start - context), min(filled.size, start + length + context)
    if hi - lo > figures.MAX_COLUMNS:
        lo, hi = max(0, start - figures.ZOOM_CONTEXT), min(filled.size, start + figures.MAX_COLUMNS)
    return slice(lo, hi)


def period_statistics(result: xr.Dataset, period: str | None) -> dict:
    """Period means with credible intervals (or why there are none)."""
    span = pd.Timestamp(result["time"].values[-1]) - pd.Timestamp(result["time"].values[0])
    if period is None:
        period = "year" if span >= _YEARLY_FROM else "month" if span >= _MONTHLY_FROM else "day"
    try:
        computed = stats.period_stats(result, period=period, mean=True)
    except (InputError, UsageError) as err:
        return {"period": period, "rows": [], "note": str(err), "rule": ""}
    rows = stats.table(computed)
    level = f"{computed.attrs['level']:g}"
    return {
        "period": period, "level": level, "note": "",
        "rule": stats.rule_text(computed.attrs["min_capture_pct"], period),
        "rows": [{"series": r.series, "period": _day(r.period_start), "measured": r.measured,
                  "estimate": r.estimate, "lower": getattr(r, f"lower_{level}"),
                  "upper": getattr(r, f"upper_{level}"), "valid": bool(r.valid),
                  "capture": r.capture_pct, "in_record": r.in_record_pct,
                  "filled_share": r.filled_share}
                 for r in rows.itertuples(index=False)],
    }


def holdout(report: dict, input_sha256: str | None) -> dict:
    """The calibration evidence of a ``holdout.json``: tables and figures."""
    settings = report["settings"]
    levels = [f"{lv:g}" for lv in settings["levels"]]
    overall = {name: block["overall"] for name, block in report["scores"].items()}
    coverage = {name: o["coverage"] for name, o in overall.items() if o.get("coverage")}
    pit = {name: counts for name, counts in report.get("pit_histogram", {}).items()
           if name != "bins"}
    return {
        "settings": settings,
        "same_input": report.get("input_sha256") == input_sha256,
        "hidden": sum(r["hidden_total"] for r in report["repeats"]),
        "levels": levels,
        "coverage": coverage,
        "scores": overall,
        "by_gap_length": _by_gap_length(report),
        "evidence": report["evidence"],
        "widening": report["widening"],
        "reliability": figures.reliability(coverage) if coverage else None,
        "pit": figures.pit(pit) if pit else None,
        "bars": figures.score_bars(overall),
    }


def _by_gap_length(report: dict) -> list[dict]:
    """Rows of the evidence-by-gap-length table: buckets with real gaps or hidden cells."""
    rows = []
    for label, record in report["evidence"]["buckets"].items():
        if not record["real_cells"] and not record["hidden_cells"]:
            continue
        scored = {name: block["gap_length"].get(label) for name, block in
                  report["scores"].items()}
        rows.append({
            "bucket": label, **record,
            "coverage": (scored.get("gapband") or {}).get("coverage") or {},
            "score": {name: s["crps"] if s["crps"] is not None else s["mae"]
                      for name, s in scored.items() if s is not None},
        })
    return rows


def _stamp(t: np.datetime64) -> str:
    return pd.Timestamp(t).strftime("%Y-%m-%d %H:%M")


def _day(t: Any) -> str:
    return pd.Timestamp(t).strftime("%Y-%m-%d")


def _text(value: object) -> str:
    if isinstance(value, float):
        return f"{value:.4g}"
    if isinstance(value, dict | list):
        return json.dumps(value)
    return str(value)
