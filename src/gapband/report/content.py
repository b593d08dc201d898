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

from gapband import causes, flags, stats
from gapband.errors import InputError, UsageError
from gapband.filling import COMPONENTS
from gapband.panel import gap_runs
from gapband.report import figures

#: A record at least this long gets a yearly table before the monthly one.
_YEARLY_FROM = pd.Timedelta(days=730)


def summary_section(result: xr.Dataset, summary: dict, holdout_report: dict | None,
                    units: str) -> dict:
    """The report's first section: what was filled, per station, and three verdicts."""
    times = result["time"].values
    counts = summary["flags"]["series"]
    stations = []
    for name, c in counts.items():
        total = sum(c.values())
        stations.append({"series": name, "steps": total, "measured": c["observed"],
                         "measured_pct": 100.0 * c["observed"] / total if total else 0.0,
                         "filled": c["filled"], "uncertain": c["filled_uncertain"],
                         "not_filled": c["not_filled"]})
    return {
        "quantity": str(result.attrs.get("long_name") or result.attrs.get("standard_name")
                        or result.attrs.get("variable") or "Values"),
        "units": units or "not stated",
        "period": f"{_day(times[0])} to {_day(times[-1])}",
        "step": _step_words(str(result.attrs.get("step", ""))),
        "stations": stations,
        "verdicts": [verdict(summary.get("diagnostics", {})),
                     evidence_verdict(holdout_report, summary),
                     use_verdict(summary)],
    }


def evidence_verdict(report: dict | None, summary: dict) -> tuple[bool | None, str]:
    """Whether the intervals were tested on held-out values, and how they did, in words."""
    if report is None:
        return None, ("The intervals were not tested on held-out values for this report: "
                      "run gapband holdout on the same input to test them.")
    gapband = report["scores"].get("gapband", {}).get("overall", {})
    coverage = gapband.get("coverage") or {}
    level = "90" if "90" in coverage else (max(coverage, key=float) if coverage else None)
    if level is None:
        return None, "The holdout file holds no coverage figures for gapband's intervals."
    held = 100.0 * coverage[level]
    target = float(level)
    widened = summary.get("calibration") is not None
    after = (report.get("widening") or {}).get("coverage_after", {}).get(level)
    text = (f"Before widening, {level} % intervals held {held:.1f} % of {gapband.get('n', 0)} "
            f"hidden values (target {target:g} %).")
    if widened and after is not None:
        text += (f" This fill's intervals were widened by that holdout's factors; widened, "
                 f"they held {100.0 * after:.1f} %.")
    elif not widened:
        text += " This fill's intervals were not widened by it (gapband fill --calibration)."
    return abs((after if widened and after is not None else coverage[level]) * 100
               - target) <= 5.0, text


def use_verdict(summary: dict) -> tuple[bool, str]:
    """Which cells should not be used as they are, in one sentence."""
    overall = summary["flags"]["overall"]
    filled = overall["filled"] + overall["filled_uncertain"]
    uncertain, missing = overall["filled_uncertain"], overall["not_filled"]
    text = (f"{filled} missing values were filled; {uncertain} of them are flagged "
            "filled_uncertain and should not be used without their intervals")
    reasons = rule_rows(summary.get("flag_rules") or {})
    if reasons:
        text += " (rules: " + "; ".join(f"{label} {value}" for label, value in reasons) + ")"
    text += "."
    if missing:
        why = {name: n for name, n in (summary.get("flag_reasons") or {}).get("overall", {})
               .items() if n and name in ("extrapolated", "few_observations", "no_fill")}
        text += (f" {missing} were not filled ("
                 + (", ".join(f"{n} {REASON_WORDS[name]}" for name, n in why.items()) if why
                    else "a series with too few observations, or no finite prediction")
                 + "; see the flag counts).")
    return uncertain == 0 and missing == 0, text


def rule_rows(rules: dict) -> list[tuple[str, str]]:
    """The flag rules in words, one (label, value) row per rule in force."""
    rows = []
    level = rules.get("level")
    if rules.get("max_width") is not None:
        rows.append((f"{level:g} % interval wider than", f"{rules['max_width']:g}"))
    if rules.get("max_rel_width") is not None:
        rows.append((f"{level:g} % interval wider than",
                     f"{rules['max_rel_width']:g} × the series' 5–95 % range"))
    if rules.get("max_var_width") is not None:
        rows.append((f"{level:g} % interval wider than",
                     f"{rules['max_var_width']:g} × the {level:g} % interval of the series' "
                     "variability around its daily and weekly cycle"))
    if rules.get("max_gap"):
        rows.append(("gap longer than", str(rules["max_gap"])))
    if rules.get("min_observed") is not None:
        rows.append(("not filled below", f"{rules['min_observed']} observations of a series"))
    if rules.get("flag_untested"):
        rows.append(("gap longer than", "the longest gap length its holdout tested "
                     "(with a calibration)"))
    if "accept_unconverged" in rules:
        rows.append(("fit not converged", "kept as filled" if rules["accept_unconverged"]
                     else "flagged uncertain"))
    if "extrapolate" in rules:
        rows.append(("before a series' first or after its last observation",
                     "filled, flagged uncertain" if rules["extrapolate"] else "not filled"))
    return rows


#: Each flag reason in a few words, for the report's sentences.
REASON_WORDS = {
    "extrapolated": "before a series' first or after its last observation",
    "few_observations": "in a series with too few observations",
    "no_fill": "without a usable prediction",
    "not_converged": "from a fit whose chains did not agree",
    "untested_gap": "in gaps longer than the holdout tested",
    "long_gap": "in gaps longer than the gap rule allows",
    "wide_interval": "with intervals wider than the set width",
    "wide_vs_range": "with intervals wider than the set share of the series' range",
    "wide_vs_variability": "with intervals wider than the series' variability around its "
                           "cycle gives",
}


def reason_counts(summary: dict) -> dict | None:
    """Cells per flag reason, overall and per series, the reasons that occur only."""
    counts = summary.get("flag_reasons")
    if not counts:
        return None
    names = [name for name, n in counts["overall"].items() if n]
    return {"names": names, "words": {name: REASON_WORDS.get(name, name) for name in names},
            "overall": counts["overall"], "series": counts["series"]}


def provenance(result: xr.Dataset, summary: dict) -> dict:
    """How the fill was made, for the appendix: input, settings, spec, diagnostics, versions."""
    attrs = result.attrs
    diagnostics = summary.get("diagnostics", {})
    spec = attrs.get("gapband_spec")
    calibration = summary.get("calibration")
    return {
        "rows": [
            ("input file", summary.get("source")),
            ("input SHA-256", summary.get("input_sha256")),
            ("grid step", attrs.get("step")),
            ("record", f"{_day(result['time'].values[0])} to {_day(result['time'].values[-1])}"),
            ("series × time steps", f"{result.sizes['series']} × {result.sizes['time']}"),
            ("method", method_words(summary)),
            ("model spec", summary.get("spec")),
            ("seed", summary.get("seed")),
            ("interval levels (%)", ", ".join(f"{v:g}" for v in summary.get("levels", []))),
            ("joint draws kept", int(result.sizes.get("fill_draw", 0))),
            ("history", attrs.get("history")),
        ],
        "rules": rule_rows(summary.get("flag_rules") or {}),
        "calibration": None if calibration is None else [
            (f"{level} %", "; ".join(f"{bucket} steps: " + ("–" if f is None else f"{f:.3f}")
                                     for bucket, f in by_bucket.items()))
            for level, by_bucket in calibration.get("factors", {}).items()],
        "calibration_source": None if calibration is None else calibration.get("file"),
        "diagnostics": [(key, _text(value)) for key, value in diagnostics.items()
                        if key != "warnings"],
        "warnings": list(diagnostics.get("warnings", [])),
        "verdict": verdict(diagnostics),
        "versions": list(summary.get("versions", {}).items()),
        "spec": _flat(json.loads(spec)) if spec else [],
    }


def method_words(summary: dict) -> str:
    """The inference method in plain words, with gapband's version."""
    words = {"gibbs": "Bayesian low-rank model, sampled by Gibbs sampling",
             "nuts": "Bayesian low-rank model, sampled by NUTS (PyMC)",
             "advi": "Bayesian low-rank model, approximated by variational inference (PyMC)"}
    method = summary.get("method", "")
    version = summary.get("versions", {}).get("gapband", "")
    return f"{words.get(method, method)} (gapband {version})".strip()


def verdict(diagnostics: dict) -> tuple[bool, str]:
    """Whether the fit converged, in one plain sentence for the top of the report."""
    converged = bool(diagnostics.get("converged"))
    r_hat = diagnostics.get("r_hat_max")
    if r_hat is None:
        return converged, ("The fit converged." if converged else
                           "The fit's convergence could not be checked.")
    sizes = [diagnostics[k] for k in ("ess_bulk_min", "ess_tail_min")
             if diagnostics.get(k) is not None]
    figures = f"largest R-hat {r_hat:.3f} (target ≤ 1.01)" + (
        f", smallest ESS {min(sizes):.0f} (target ≥ 400)" if sizes else "")
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
         "excluding_planned": shares.get("measured_excluding_planned", {}).get(name),
         "meets_measured": shares["measured"][name] >= threshold}
        for name in shares["measured"]
    ]


def flag_counts(summary: dict) -> dict:
    """Cells per flag meaning, overall and per series."""
    counts = summary["flags"]
    return {"meanings": list(flags.FLAG_MEANINGS), "overall": counts["overall"],
            "series": counts["series"]}


def substitution_log(result: xr.Dataset, method: str) -> dict:
    """Every filled run: where, how many cells (and how many uncertain), its mean and sources.

    The run's mean fill has the central interval of the flag level over the
    joint draws (``fill_draws``) when kept. The informing stations are the
    two most correlated with the run's series (Pearson, over common observed
    steps) among those observed through most of the run.
    """
    flag = result["fill_flag"].transpose("series", "time").values
    filled = (flag == flags.FILLED) | (flag == flags.FILLED_UNCERTAIN)
    reason = (result["fill_reason"].transpose("series", "time").values.astype("int64")
              if "fill_reason" in result else None)
    level = widest_level(result)
    values = result["value"].transpose("series", "time").values
    median = result["filled"].transpose("series", "time").values
    times = result["time"].values
    names = [str(s) for s in result["series"].values]
    correlation = pd.DataFrame(values.T).corr(min_periods=10).to_numpy()
    run_means = _run_mean_draws(result, flag.shape)
    share = 1.0 - float(level.replace("_", ".")) / 100 if level else None
    rows = []
    for s, start, length in gap_runs(filled):
        run = slice(start, start + length)
        draws = run_means(s, run) if share is not None else None
        rows.append({
            "series": names[s], "start": _stamp(times[start]),
            "end": _stamp(times[start + length - 1]), "cells": length,
            "uncertain": int((flag[s, run] == flags.FILLED_UNCERTAIN).sum()),
            "reasons": "" if reason is None else _reasons_text(reason[s, run]),
            "mean": float(np.mean(median[s, run])),
            "lower": None if draws is None else float(np.quantile(draws, share / 2)),
            "upper": None if draws is None else float(np.quantile(draws, 1 - share / 2)),
            "informed_by": ", ".join(_informants(correlation, values, s, run, names)) or "–",
            "cause": causes.of_run(result, names[s], times[start], times[start + length - 1]),
        })
    return {"level": level.replace("_", ".") if level else None, "rows": rows,
            "method": method}


def _reasons_text(bits: np.ndarray) -> str:
    """The flag reasons among a run's cells, each with its count of cells."""
    return ", ".join(f"{name} ({n})" for name, n in flags.cells_per_reason(bits).items() if n)


def _run_mean_draws(result: xr.Dataset, shape: tuple[int, int]):
    """A function (series, run slice) -> each joint draw's mean over the run, or None."""
    if "fill_draws" not in result:
        return lambda s, run: None
    draws = result["fill_draws"].values
    where = np.full(shape[0] * shape[1], -1)
    where[result["missing_cell"].values] = np.arange(draws.shape[1])

    def means(s: int, run: slice) -> np.ndarray | None:
        columns = where[s * shape[1] + np.arange(run.start, run.stop)]
        return None if (columns < 0).any() else draws[:, columns].mean(axis=1)

    return means


def _informants(correlation: np.ndarray, values: np.ndarray, s: int, run: slice,
                names: list[str]) -> list[str]:
    """The two series most correlated with series ``s``, observed through most of ``run``."""
    present = np.isfinite(values[:, run]).mean(axis=1) >= 0.5
    candidates = [(abs(correlation[s, m]), m) for m in range(len(names))
                  if m != s and present[m] and np.isfinite(correlation[s, m])]
    return [f"{names[m]} (r = {correlation[s, m]:.2f})" for _, m in sorted(candidates)[::-1][:2]]


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
    """Period means with credible intervals, as tables (or why there are none), calibrated or not.

    With ``period`` given, one table of every such period. By default: the
    year for records of two years or more, then a summary per month, then
    only the days touched by substitution (a filled cell in the day).
    """
    if period is not None:
        tables = [_period_table(result, period)]
    else:
        span = pd.Timestamp(result["time"].values[-1]) - pd.Timestamp(result["time"].values[0])
        tables = [_period_table(result, "year")] if span >= _YEARLY_FROM else []
        tables += [_period_table(result, "month"), _period_table(result, "day", touched=True)]
    notes = [t["note"] for t in tables if t["note"]]
    tables = [t for t in tables if not t["note"]]
    return {"tables": tables, "note": "; ".join(dict.fromkeys(notes)),
            "calibration": tables[0]["calibration"] if tables else ""}


def _period_table(result: xr.Dataset, period: str, touched: bool = False) -> dict:
    """One table of period means; ``touched``: only periods with a filled cell."""
    try:
        computed = stats.period_stats(result, period=period, mean=True)
    except (InputError, UsageError) as err:
        return {"period": period, "rows": [], "note": str(err), "rule": "", "touched": touched,
                "calibration": ""}
    rows = stats.table(computed)
    level = f"{computed.attrs['level']:g}"
    kept = [r for r in rows.itertuples(index=False) if not touched or r.filled_pct > 0]
    return {
        "period": period, "level": level, "note": "", "touched": touched,
        "rule": stats.rule_text(computed),
        "calibration": stats.calibration_text(computed),
        "rows": [{"series": r.series, "period": _day(r.period_start), "measured": r.measured,
                  "estimate": r.estimate, "lower": getattr(r, f"lower_{level}"),
                  "upper": getattr(r, f"upper_{level}"), "valid": bool(r.valid),
                  "capture": r.capture_pct, "in_record": r.in_record_pct,
                  "filled_pct": r.filled_pct}
                 for r in kept],
    }


def holdout(report: dict, input_sha256: str | None, units: str = "") -> dict:
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
        "bars": figures.score_bars(overall, units),
    }


def _flat(spec: dict, prefix: str = "") -> list[tuple[str, str]]:
    """A spec as (key, value) rows: tables flattened to dotted keys, lists in words."""
    rows = []
    for key, value in spec.items():
        name = f"{prefix}{key}"
        if isinstance(value, dict):
            rows += _flat(value, name + ".")
        elif isinstance(value, list):
            rows.append((name, "; ".join(", ".join(f"{k} {v}" for k, v in item.items())
                                         if isinstance(item, dict) else str(item)
                                         for item in value)))
        elif value is not None:
            rows.append((name, _text(value)))
    return rows


def _step_words(step: str) -> str:
    """A grid step code in words ('h' -> 'hourly')."""
    return {"h": "hourly", "D": "daily", "30min": "half-hourly", "MS": "monthly",
            "M": "monthly", "W": "weekly"}.get(step, f"every {step}" if step else "")


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
    """A diagnostic or spec value as short text: rounded numbers, no JSON."""
    if isinstance(value, bool) or value is None:
        return {True: "yes", False: "no", None: "–"}[value]
    if isinstance(value, float):
        return f"{value:.4g}"
    if isinstance(value, dict):
        return "; ".join(f"{k}: {_text(v)}" for k, v in value.items()) or "none"
    if isinstance(value, list):
        return "; ".join(_text(v) for v in value) or "none"
    return str(value)
