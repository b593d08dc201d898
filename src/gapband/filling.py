"""The fill job: fit the model, summarise the predictive, flag, and write.

``fill`` takes a Panel and returns it with every missing cell filled (a
posterior median with credible intervals) and flagged; ``write_fill`` writes
``filled.nc``, ``filled.csv`` (or ``.parquet``) and ``summary.json``
atomically. The command line and the demo call these two.
"""

from __future__ import annotations

import dataclasses
import json
import logging
import time
from dataclasses import dataclass, field
from importlib.metadata import version
from pathlib import Path
from typing import Literal

import numpy as np
import pandas as pd
import xarray as xr

from gapband import flags, outputs
from gapband.errors import GapbandError, InputError, UsageError
from gapband.panel import step_of
from gapband.spec import ModelSpec, check_against, load, preset_for

log = logging.getLogger(__name__)

Method = Literal["gibbs", "nuts", "advi"]
DEFAULT_LEVELS: tuple[float, ...] = (50, 80, 90, 95)
_VERSIONED = ("gapband", "numpy", "scipy", "pandas", "xarray", "pymc", "pytensor", "arviz")


@dataclass(frozen=True)
class FlagRules:
    """When a fill is flagged uncertain or not made (see :func:`gapband.flags.assign`)."""

    level: float = 90
    max_width: float | None = None
    max_rel_width: float | None = None
    max_gap: str | None = None
    min_observed: int = flags.MIN_OBSERVED


@dataclass
class FillOptions:
    """Settings of one fill run."""

    method: Method = "gibbs"
    draws: int = 1000
    tune: int = 1000
    chains: int = 2
    levels: tuple[float, ...] = DEFAULT_LEVELS
    seed: int = 0
    rules: FlagRules = field(default_factory=FlagRules)
    progress: bool = True


def resolve_spec(
    panel: xr.Dataset, model: str | Path | ModelSpec | None, transform: str | None = None
) -> tuple[ModelSpec, str]:
    """The model spec to use and a label saying where it came from.

    ``model`` may be a spec, a TOML path, or None for the preset matching the
    Panel's step. ``transform`` overrides the spec's transform.
    """
    if isinstance(model, ModelSpec):
        spec, label = model, "given spec"
    elif model is None:
        spec, name = preset_for(panel)
        label = f"preset {name} (chosen for step {panel.attrs['step']})"
        spec, dropped = fit_seasons_to_span(spec, panel)
        if dropped:
            label += f", without cycles longer than the data ({', '.join(dropped)})"
    else:
        spec, label = load(model), str(model)
    if transform is not None:
        spec = dataclasses.replace(spec, transform=transform)
    check_against(spec, panel)
    return spec, label


def fit_seasons_to_span(spec: ModelSpec, panel: xr.Dataset) -> tuple[ModelSpec, list[str]]:
    """Drop a preset's seasonal cycles that the record is too short to show.

    A preset is chosen for the user, so a weekly cycle on four days of data
    is left out (and said) rather than refused; a spec the user wrote is
    checked strictly by :func:`gapband.spec.check_against`.
    """
    step, n_time = step_of(panel), panel.sizes["time"]
    kept = tuple(s for s in spec.seasonal if s.steps(step) <= n_time)
    dropped = [str(s.period) for s in spec.seasonal if s not in kept]
    return dataclasses.replace(spec, seasonal=kept), dropped


def check_levels(levels: tuple[float, ...]) -> tuple[float, ...]:
    """Validate interval levels: percentages strictly between 0 and 100."""
    bad = [lv for lv in levels if not 0 < lv < 100]
    if bad or not levels:
        raise UsageError(
            f"interval levels must lie strictly between 0 and 100, got {list(levels)}; "
            "e.g. --levels 50,80,90,95"
        )
    return tuple(sorted(set(levels)))


def fill(
    panel: xr.Dataset,
    *,
    model: str | Path | ModelSpec | None = None,
    transform: str | None = None,
    options: FillOptions | None = None,
) -> tuple[xr.Dataset, dict]:
    """Fill every missing cell of a Panel from the posterior predictive.

    Parameters
    ----------
    panel : Dataset
        A Panel (see :mod:`gapband.panel`).
    model : spec, path or None
        Model spec, a TOML file, or None for the preset matching the step.
    transform : {"none", "log", "log1p"}, optional
        Overrides the spec's transform (use "log" for positive, skewed data).
    options : FillOptions, optional
        Method, draws, levels, seed and flag rules.

    Returns
    -------
    result : Dataset
        The Panel plus ``filled``, ``fill_mean``, ``fill_median``,
        ``fill_sd``, ``lower_<L>``/``upper_<L>`` and ``fill_flag``, with
        provenance attributes.
    summary : dict
        JSON-ready: capture before and after, flag counts, diagnostics,
        timings.

    Raises
    ------
    InputError
        Nothing observed, or no series with enough observations.
    UsageError, SpecError
        Bad options or spec.
    """
    from gapband import inference, predict  # PyMC is imported only when a fit runs

    options = options or FillOptions()
    levels = check_levels(tuple(options.levels))
    if options.rules.level not in levels and (
        options.rules.max_width is not None or options.rules.max_rel_width is not None
    ):
        raise UsageError(
            f"the flag rule looks at the {options.rules.level:g} % interval, which is not "
            f"among the levels {list(levels)}; add it to --levels or change --flag-level"
        )
    spec, spec_label = resolve_spec(panel, model, transform)
    fit_panel = fittable(panel, options.rules.min_observed)
    log.info(
        "model: %s; method: %s; %d of %d series fitted",
        spec_label, options.method, fit_panel.sizes["series"], panel.sizes["series"],
    )

    started = time.perf_counter()
    fitted = inference.fit(
        fit_panel, spec, method=options.method, draws=options.draws, tune=options.tune,
        chains=options.chains, seed=options.seed, progress=options.progress,
    )
    fit_seconds = time.perf_counter() - started
    log.info("fit done in %.1f s; summarising the posterior predictive", fit_seconds)
    summaries = predict.summarise(fitted, fit_panel, levels=levels, seed=options.seed,
                                  progress=options.progress)
    predict_seconds = time.perf_counter() - started - fit_seconds

    result = panel.merge(summaries.drop_vars("value"), join="left")
    result = flags.assign(result, **dataclasses.asdict(options.rules))
    if not observed_unchanged(panel, result):  # a guard on our own code, never expected
        raise GapbandError("internal error: an observed value changed during the fill")
    diagnostics = fitted.diagnostics
    result.attrs.update(
        provenance(spec, spec_label, options, levels, fitted.method, diagnostics)
    )
    summary = {
        "source": panel.attrs.get("source"),
        "input_sha256": panel.attrs.get("input_sha256"),
        "method": fitted.method,
        "approximate": fitted.approximate,
        "spec": spec_label,
        "seed": options.seed,
        "levels": list(levels),
        "flag_rules": dataclasses.asdict(options.rules),
        "capture": capture_before_after(result),
        "flags": flags.flag_counts(result),
        "diagnostics": diagnostics,
        "timings": {
            **fitted.timings,
            "fit_total_s": round(fit_seconds, 2),
            "predict_s": round(predict_seconds, 2),
        },
        "versions": versions(),
    }
    return result, summary


def fittable(panel: xr.Dataset, min_observed: int) -> xr.Dataset:
    """The series with enough observations to be fitted; the rest stay unfilled."""
    counts = panel["value"].notnull().sum("time")
    if int(counts.sum()) == 0:
        raise InputError(
            f"{panel.attrs.get('source', 'input')}: nothing is observed; there is nothing "
            "to learn a fill from"
        )
    keep = counts >= min_observed
    if not bool(keep.any()):
        raise InputError(
            f"{panel.attrs.get('source', 'input')}: no series has {min_observed} or more "
            "observations; lower --min-observed or supply more data"
        )
    return panel.sel(series=keep)


def capture_before_after(result: xr.Dataset) -> dict:
    """Capture % per series: measured only, and with fills (all, and confident only)."""
    flag = result["fill_flag"]
    expected = flag.sizes["time"]

    def pct(mask: xr.DataArray) -> dict[str, float]:
        shares = 100.0 * mask.sum("time") / expected
        return {str(s): round(float(v), 2) for s, v in zip(result["series"].values, shares.values,
                                                            strict=True)}

    return {
        "measured": pct(flag == flags.OBSERVED),
        "with_fills": pct(flag != flags.NOT_FILLED),
        "with_confident_fills": pct((flag == flags.OBSERVED) | (flag == flags.FILLED)),
    }


def provenance(
    spec: ModelSpec,
    spec_label: str,
    options: FillOptions,
    levels: tuple[float, ...],
    method: str,
    diagnostics: dict,
) -> dict:
    """Attributes recording how a result was made (NetCDF-ready: text and numbers)."""
    return {
        "gapband_method": method,
        "gapband_seed": options.seed,
        "gapband_levels": json.dumps(list(levels)),
        "gapband_spec_source": spec_label,
        "gapband_spec": json.dumps(spec.to_dict()),
        "gapband_flag_rules": json.dumps(dataclasses.asdict(options.rules)),
        "gapband_diagnostics": json.dumps(outputs.jsonable(diagnostics)),
        "gapband_versions": json.dumps(versions()),
        "history": f"{pd.Timestamp.now('UTC').isoformat(timespec='seconds')} gapband fill",
    }


def versions() -> dict[str, str]:
    """Versions of gapband and the libraries that shape its results."""
    return {name: version(name) for name in _VERSIONED}


def write_fill(
    result: xr.Dataset,
    summary: dict,
    out_dir: str | Path,
    *,
    table: Literal["csv", "parquet"] = "csv",
    overwrite: bool = False,
) -> list[Path]:
    """Write ``filled.nc``, ``filled.<table>`` and ``summary.json`` into ``out_dir``."""
    names = ["filled.nc", f"filled.{table}", "summary.json"]
    out = outputs.prepare_dir(out_dir, names, overwrite)
    return [
        outputs.write_netcdf(result, out / names[0]),
        outputs.write_table(result, out / names[1]),
        outputs.write_json(summary, out / names[2]),
    ]


def observed_unchanged(panel: xr.Dataset, result: xr.Dataset) -> bool:
    """True when every observed cell of ``panel`` is bit-identical in ``result``."""
    before = panel["value"].values
    after = result["filled"].transpose("series", "time").values
    seen = ~np.isnan(before)
    return bool(np.array_equal(before[seen].view("int64"), after[seen].view("int64")))
