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
import os
import time
from dataclasses import dataclass, field
from importlib.metadata import version
from pathlib import Path
from typing import TYPE_CHECKING, Literal

import numpy as np
import pandas as pd
import xarray as xr

from gapband import causes, flags, outputs, resources
from gapband.calibration import Calibration, read, widen, widen_draws
from gapband.chains import DEFAULT_CHAINS, TIME_BUDGET
from gapband.errors import GapbandError, InputError, UsageError
from gapband.panel import run_lengths, step_of
from gapband.spec import ModelSpec, check_against, load, preset_for

if TYPE_CHECKING:
    from gapband.inference import Fit

log = logging.getLogger(__name__)

Method = Literal["gibbs", "nuts", "advi"]
DEFAULT_LEVELS: tuple[float, ...] = (50, 80, 90, 95)
#: Joint predictive draws of the missing cells ``fill`` keeps for period statistics.
DEFAULT_KEEP_DRAWS = 200
#: Missing cells whose joint draws are computed at a time (bounds working memory).
DRAW_CHUNK_CELLS = 4096
COMPONENTS: tuple[str, ...] = ("trend", "seasonal", "short_term", "own")
_VERSIONED = ("gapband", "numpy", "scipy", "pandas", "xarray", "pymc", "pytensor", "arviz")


@dataclass(frozen=True)
class FlagRules:
    """When a fill is flagged uncertain or not made (see :func:`gapband.flags.assign`)."""

    level: float = 90
    max_width: float | None = None
    max_rel_width: float | None = None
    #: Multiple of the interval the series' variability around its daily and
    #: weekly cycle gives (:func:`gapband.flags.variability_width`); None: off.
    max_var_width: float | None = flags.MAX_VAR_WIDTH
    max_gap: str | None = None
    min_observed: int = flags.MIN_OBSERVED
    #: Keep the fills of a fit whose chains did not converge as ``filled``.
    accept_unconverged: bool = False
    #: With a calibration: flag fills in gaps longer than its holdout tested.
    flag_untested: bool = True
    #: Fill the cells before a series' first or after its last observation
    #: (flagged uncertain, reason ``extrapolated``); by default they stay empty.
    extrapolate: bool = False

    def width_rules(self) -> bool:
        """Whether any rule reads the interval width (and so needs ``level`` computed)."""
        return any(r is not None for r in (self.max_width, self.max_rel_width,
                                           self.max_var_width))


@dataclass
class FillOptions:
    """Settings of one fill run."""

    method: Method = "gibbs"
    #: Kept draws per chain; None: the Gibbs sampler runs until its chains
    #: agree (or ``budget`` is spent), NUTS and ADVI take their default.
    draws: int | None = None
    #: Burn-in sweeps (warm-up for NUTS); None: the method's default.
    tune: int | None = None
    chains: int = DEFAULT_CHAINS
    #: Seconds of sampling after which the Gibbs sampler stops, converged or not.
    budget: float = TIME_BUDGET
    levels: tuple[float, ...] = DEFAULT_LEVELS
    seed: int = 0
    rules: FlagRules = field(default_factory=FlagRules)
    progress: bool = True
    keep_draws: int = DEFAULT_KEEP_DRAWS
    #: Shared factors to use; None: chosen from the data under the spec's
    #: ``rank`` and ``rank_share``. Blocks take the whole Panel's choice.
    rank: int | None = None


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
    calibration: str | Path | Calibration | None = None,
    gap_length: xr.DataArray | None = None,
    outside: xr.DataArray | None = None,
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
    calibration : path or Calibration, optional
        A ``holdout.json`` written by :func:`gapband.holdout.run`, checked
        against the method, levels and spec (:meth:`Calibration.check`; a
        :class:`~gapband.calibration.Calibration` object is taken as checked):
        each interval is widened by the factor of its level and gap-length
        bucket (:func:`gapband.calibration.widen`) before the flags are
        computed, and the joint draws with it
        (:func:`gapband.calibration.widen_draws`); fills in gaps longer than
        the holdout tested are flagged uncertain unless
        ``options.rules.flag_untested`` is False.
    gap_length : DataArray of int, dims (series, time), optional
        Length of the real missing run each cell sits in; default: the
        Panel's own. A block of a larger Panel passes the whole Panel's.
    outside : DataArray of bool, dims (series, time), optional
        Cells before a series' first or after its last observation
        (:func:`gapband.flags.extrapolated`); default: the Panel's own. A
        block of a larger Panel passes the whole Panel's.

    Returns
    -------
    result : Dataset
        The Panel plus ``filled``, ``fill_mean``, ``fill_median``,
        ``fill_sd``, ``lower_<L>``/``upper_<L>``, ``fill_flag`` and
        ``fill_reason`` (with a calibration also
        :data:`gapband.flags.OWN_WIDTH`, the model's own width at the flag
        level, which the width rules read when it is the larger), the
        component contributions ``component_<name>`` and ``component_offset``
        (:func:`component_means`), and unless ``options.keep_draws`` is 0 the
        joint draws ``fill_draws`` (:func:`joint_draws`), with provenance
        attributes (``gapband_calibration`` when widened).
    summary : dict
        JSON-ready: capture before and after, flag counts, diagnostics,
        timings, the calibration applied (or None).

    Raises
    ------
    InputError
        Nothing observed, no series with enough observations, or a
        calibration file that is unreadable or made with another method,
        transform or spec.
    UsageError, SpecError
        Bad options or spec, or a calibration file without a level.
    """
    from gapband import predict  # PyMC is imported only when a fit runs

    options = options or FillOptions()
    levels = check_levels(tuple(options.levels))
    keep = options.keep_draws
    if isinstance(keep, bool) or not isinstance(keep, int | np.integer) or keep < 0:
        raise UsageError(f"keep_draws = {keep!r} must be a whole number, 0 or more "
                         "(--keep-draws; 0 keeps none)")
    check_flag_level(options.rules, levels)
    spec, spec_label = resolve_spec(panel, model, transform)
    widening, calibration_warning = (None, None) if calibration is None else (
        (calibration, None) if isinstance(calibration, Calibration)
        else checked_calibration(calibration, panel, spec, options.method, levels))
    if gap_length is None:
        gap_length = real_gap_length(panel)
    fitted = dataclasses.replace(fit_panel(panel, model=spec, options=options),
                                 spec_label=spec_label)
    log.info("fit done in %.1f s; summarising the posterior predictive", fitted.seconds)
    started = time.perf_counter()
    summaries = predict.summarise(fitted.fit, fitted.panel, levels=levels, seed=options.seed,
                                  progress=options.progress)
    if widening is not None:
        own = own_width(summaries, options.rules.level, levels)
        summaries = widen(summaries, widening, levels,
                          gap_length.sel(series=fitted.panel["series"]))
        if own is not None:
            summaries[flags.OWN_WIDTH] = own

    result = panel.merge(summaries.drop_vars("value"), join="left")
    unusable = int(flags.no_fill(result).sel(series=fitted.panel["series"]).sum())
    result = flags.assign(result, **dataclasses.asdict(options.rules),
                          unconverged=not fitted.fit.diagnostics["converged"],
                          tested_gap=None if widening is None else widening.longest_tested,
                          gap_length=gap_length, outside=outside)
    result = result.merge(component_means(fitted, panel))
    if options.keep_draws:
        draws = joint_draws(fitted, result, options.keep_draws, options.seed)
        if widening is not None:
            draws = widen_draws(draws, result["fill_median"], widening, levels, gap_length)
        result = result.merge(draws)
    predict_seconds = time.perf_counter() - started
    if not observed_unchanged(panel, result):  # a guard on our own code, never expected
        raise GapbandError("internal error: an observed value changed during the fill")
    diagnostics = fitted.fit.diagnostics
    if calibration_warning is not None:
        diagnostics = {**diagnostics, "warnings": [*diagnostics.get("warnings", []),
                                                   calibration_warning]}
    if unusable:
        diagnostics = {**diagnostics, "warnings": [*diagnostics.get("warnings", []), (
            f"{unusable} missing cells got no finite predictive summary (values "
            "beyond the float64 range after back-transforming?); they are flagged not_filled. "
            "Rescale the data (e.g. other units) or check the fit's diagnostics")]}
    summary = record_run(result, panel, fitted.spec, fitted.spec_label, options, levels,
                         fitted.fit.method, diagnostics, widening, timings={
                             **fitted.fit.timings,
                             "fit_total_s": round(fitted.seconds, 2),
                             "predict_s": round(predict_seconds, 2),
                         })
    return result, summary


def check_flag_level(rules: FlagRules, levels: tuple[float, ...]) -> None:
    """Refuse width rules that look at an interval level the fill does not compute.

    Raises
    ------
    UsageError
        Saying the three ways out.
    """
    if rules.width_rules() and rules.level not in levels:
        raise UsageError(
            f"the flag rule looks at the {rules.level:g} % interval, which is not among the "
            f"levels {list(levels)}; add it to --levels or change --flag-level (or turn the "
            "width rules off: the default one with --max-var-width off)"
        )


def own_width(summaries: xr.Dataset, level: float,
              levels: tuple[float, ...]) -> xr.DataArray | None:
    """The model's own width of the ``level`` % interval, kept before a calibration.

    Stored as :data:`gapband.flags.OWN_WIDTH` so the width rules never read a
    width a calibration narrowed below the model's own; None when ``level``
    is not computed.
    """
    if level not in levels:
        return None
    key = f"{level:g}".replace(".", "_")
    if f"upper_{key}" not in summaries or f"lower_{key}" not in summaries:
        return None
    width = summaries[f"upper_{key}"] - summaries[f"lower_{key}"]
    width.attrs = {"long_name": f"width of the central {level:g}% posterior predictive "
                   "interval before calibration (the model's own)", "level": float(level),
                   "comment": "the flag rules on interval width read the larger of this and "
                   "the calibrated width"}
    return width


def record_run(result: xr.Dataset, panel: xr.Dataset, spec: ModelSpec, spec_label: str,
               options: FillOptions, levels: tuple[float, ...], method: str, diagnostics: dict,
               widening: Calibration | None, timings: dict) -> dict:
    """Record how ``result`` was made in its attributes; return the ``summary.json`` content.

    Shared by :func:`fill` and :func:`gapband.parallel.fill_blocks`, which
    adds its blocks to both.
    """
    result.attrs.update(provenance(spec, spec_label, options, levels, method, diagnostics))
    calibration_record = None if widening is None else widening.record(levels)
    if calibration_record is not None:
        result.attrs["gapband_calibration"] = json.dumps(calibration_record)
    return {
        "source": panel.attrs.get("source"),
        "input_sha256": panel.attrs.get("input_sha256"),
        "method": method,
        "approximate": method == "advi",
        "spec": spec_label,
        "seed": options.seed,
        "levels": list(levels),
        "flag_rules": dataclasses.asdict(options.rules),
        "calibration": calibration_record,
        "joint_draws": int(result.sizes.get("fill_draw", 0)),
        "capture": capture_before_after(result),
        "flags": flags.flag_counts(result),
        "flag_reasons": flags.reason_counts(result),
        "diagnostics": diagnostics,
        "timings": timings,
        "versions": versions(),
    }


def checked_calibration(path: str | Path, panel: xr.Dataset, spec: ModelSpec, method: str,
                        levels: tuple[float, ...]) -> tuple[Calibration, str | None]:
    """Read a ``holdout.json`` and refuse a fill it was not made for.

    Returns the calibration and a warning when the Panel's input differs from
    the one the holdout used, else None.

    Raises
    ------
    InputError, UsageError
        As :func:`gapband.calibration.read` and :meth:`Calibration.check`.
    """
    found = read(path)
    found.check(method, levels, spec)
    return found, found.data_warning(panel.attrs.get("input_sha256"))


def real_gap_length(panel: xr.Dataset) -> xr.DataArray:
    """Length in steps of the missing run each cell of a Panel sits in (0 where observed)."""
    missing = panel["value"].transpose("series", "time").isnull()
    return xr.DataArray(run_lengths(missing.values), coords=missing.coords, dims=missing.dims,
                        name="gap_length")


@dataclass(frozen=True)
class Fitted:
    """A fit of a Panel's fittable series, with the spec it used and its run time."""

    fit: Fit
    panel: xr.Dataset
    spec: ModelSpec
    spec_label: str
    seconds: float


def fit_panel(
    panel: xr.Dataset,
    *,
    model: str | Path | ModelSpec | None = None,
    transform: str | None = None,
    options: FillOptions | None = None,
) -> Fitted:
    """Fit the model to the series of a Panel with enough observations.

    The fitting half of :func:`fill`, shared with :mod:`gapband.holdout`;
    ``Fitted.panel`` holds the series that were fitted, in the Panel's order.

    Raises
    ------
    InputError
        Nothing observed, no series with enough observations, or values out
        of float64's reach (:func:`check_magnitudes`).
    SpecError
        A bad spec.
    MemoryLimitError
        The fit would need more memory than is available (:func:`check_memory`).
    """
    from gapband import inference  # PyMC is imported only when a fit runs

    options = options or FillOptions()
    spec, spec_label = resolve_spec(panel, model, transform)
    to_fit = fittable(panel, options.rules.min_observed)
    if spec.transform == "none":
        check_magnitudes(to_fit)
    check_memory(to_fit, spec, options)
    log.info(
        "model: %s; method: %s; %d of %d series fitted",
        spec_label, options.method, to_fit.sizes["series"], panel.sizes["series"],
    )
    started = time.perf_counter()
    fitted = inference.fit(
        to_fit, spec, method=options.method, draws=options.draws, tune=options.tune,
        chains=options.chains, seed=options.seed, progress=options.progress, rank=options.rank,
        budget=options.budget,
    )
    return Fitted(fitted, to_fit, spec, spec_label, time.perf_counter() - started)


#: Largest and smallest (non-zero) magnitudes a series may hold untransformed:
#: the standardisation squares deviations from the mean, and float64 squares
#: overflow above about 1e154 and lose their digits below about 1e-154.
MAGNITUDE_LIMITS = (1e-150, 1e150)


def check_magnitudes(panel: xr.Dataset) -> None:
    """Refuse series whose values float64 cannot standardise (see :data:`MAGNITUDE_LIMITS`).

    Raises
    ------
    InputError
        Naming the series, the time and the value, and what to do.
    """
    tiny, huge = MAGNITUDE_LIMITS
    values = panel["value"].transpose("series", "time").values
    size = np.where(np.isnan(values), -np.inf, np.abs(values))
    largest = size.max(axis=1)
    for i in np.flatnonzero((largest > huge) | ((largest > 0) & (largest < tiny))):
        t = int(size[i].argmax())
        raise InputError(
            f"{panel.attrs.get('source', 'input')}: series {str(panel['series'].values[i])!r} "
            f"holds {float(values[i, t])!r} at {pd.Timestamp(panel['time'].values[t])}; values "
            f"beyond {huge:g} in magnitude, or a series whose values all lie within {tiny:g} of "
            "zero, are out of reach of the model's float64 arithmetic: rescale the data (give it "
            "in other units), or use --transform log for positive data"
        )


def check_memory(panel: xr.Dataset, spec: ModelSpec, options: FillOptions) -> None:
    """Refuse a fit the machine has not the memory for (:mod:`gapband.resources`).

    Raises
    ------
    MemoryLimitError
        The estimate exceeds the available memory; the message gives both
        and the ways to need less.
    """
    from gapband import inference  # imports PyMC: only when a fit is about to run

    n_missing = int(panel["value"].isnull().sum())
    draws = inference.kept_draws(options.method, options.draws)
    estimated = resources.estimate(
        panel.sizes["series"], panel.sizes["time"], n_missing, spec, method=options.method,
        draws=draws, chains=options.chains, cores=os.cpu_count() or 1,
        keep_draws=options.keep_draws, n_levels=len(options.levels), rank=options.rank,
    )
    log.info("memory estimate: %s", resources.size_text(estimated.total))
    resources.check(estimated, source=panel.attrs.get("source", "input"), draws=draws,
                    chains=options.chains, keep_draws=options.keep_draws)


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


def component_means(fitted: Fitted, panel: xr.Dataset) -> xr.Dataset:
    """Posterior-mean contribution of each model component, on the whole Panel.

    In transformed units (after the spec's transform, before the series mean
    is added back; :func:`gapband.predict.components`):
    ``component_offset + component_trend + component_seasonal +
    component_short_term + component_own`` is the posterior mean of the
    transformed value without noise. Series that were not fitted are NaN.

    Returns
    -------
    Dataset
        ``component_<name>`` dims ("series", "time") for each name in
        :data:`COMPONENTS`, and ``component_offset`` dims ("series",).
    """
    from gapband.predict import components  # PyMC is imported only when a fit runs

    transform = fitted.fit.built.transform
    parts = components(fitted.fit)
    if transform == "none":
        unit_note = {"units": panel["value"].attrs["units"]} if "units" in panel["value"].attrs \
            else {}
        meaning = "data units, relative to the series mean"
    else:
        unit_note = {}
        meaning = f"{transform}-transformed units, relative to the series mean of the transform"
    out = xr.Dataset(coords={"series": panel["series"], "time": panel["time"]})
    for name in COMPONENTS:
        out[f"component_{name}"] = parts[name].reindex(series=panel["series"]).astype("float64")
        out[f"component_{name}"].attrs = {
            "long_name": f"posterior mean {name.replace('_', '-')} contribution",
            "comment": f"{meaning}; not a filled value", "transform": transform, **unit_note,
        }
    offset = xr.DataArray(fitted.fit.built.mean.values, coords={"series": parts["series"]},
                          dims="series").reindex(series=panel["series"])
    out["component_offset"] = offset
    out["component_offset"].attrs = {
        "long_name": "series mean the component contributions are added to",
        "comment": f"{meaning.split(',')[0]}; offset plus the four contributions is the "
                   "posterior mean of the transformed value without noise",
        "transform": transform, **unit_note,
    }
    return out


def joint_draws(fitted: Fitted, result: xr.Dataset, n_draws: int, seed: int) -> xr.Dataset:
    """Joint posterior predictive draws of every filled cell, for period statistics.

    ``n_draws`` posterior draws, evenly spaced over all chains (all of them
    when there are fewer), each give one predictive value per filled cell:
    row d across cells is one joint draw, so a complete series can be put
    together per draw with the observed cells fixed. Computed
    :data:`DRAW_CHUNK_CELLS` cells at a time; stored as float32. Not widened:
    :func:`fill` widens them with a calibration
    (:func:`gapband.calibration.widen_draws`); attribute ``calibrated`` says
    whether they were.

    Returns
    -------
    Dataset
        ``fill_draws`` dims ("fill_draw", "missing_cell"), float32, data
        units; ``missing_cell`` holds the flat index series × n_time + time
        of each cell in the result (CF compression by gathering:
        ``compress = "series time"``).
    """
    from gapband.predict import Predictive  # PyMC is imported only when a fit runs

    flag = result["fill_flag"].transpose("series", "time").values
    n_time = result.sizes["time"]
    gathered = np.flatnonzero(np.isin(flag.ravel(), (flags.FILLED, flags.FILLED_UNCERTAIN)))
    series, steps = np.divmod(gathered, n_time)
    rows = pd.Index(fitted.panel["series"].values).get_indexer(result["series"].values)
    cells = rows[series] * n_time + steps
    thinned = dataclasses.replace(fitted.fit, posterior=_thin(fitted.fit.posterior, n_draws))
    predictive = Predictive.of(thinned, fitted.panel, seed=seed)
    kept = thinned.posterior.sizes["draw"]
    draws = np.empty((kept, cells.size), dtype="float32")
    for begin in range(0, cells.size, DRAW_CHUNK_CELLS):
        chunk = slice(begin, begin + DRAW_CHUNK_CELLS)
        draws[:, chunk] = predictive.draws(cells[chunk])
    units = result["value"].attrs.get("units")
    return xr.Dataset(
        {"fill_draws": (("fill_draw", "missing_cell"), draws, {
            "long_name": "joint posterior predictive draws of the filled cells",
            "comment": "row d across all cells is one joint draw; observed cells are not "
                       "stored (they are fixed); estimates, not measurements",
            "calibrated": "no",
            **({"units": units} if units is not None else {})})},
        coords={"missing_cell": ("missing_cell", gathered.astype("int64"), {
            "long_name": "flat index of the filled cell: series index × time steps + time index",
            "compress": "series time"})},
    )


def _thin(posterior: xr.Dataset, n_draws: int) -> xr.Dataset:
    """Keep ``n_draws`` posterior draws evenly spaced over all chains, as one chain."""
    from gapband.model import per_draw  # PyMC is imported only when a fit runs

    n_draw = posterior.sizes["draw"]
    total = posterior.sizes["chain"] * n_draw
    keep = np.unique(np.linspace(0, total - 1, min(n_draws, total)).round().astype("int64"))
    # Pointwise indexing rather than stacking chain and draw: stack cannot
    # reshape a variable with a zero-length dim (own_gap with nothing missing).
    chain, draw = (xr.DataArray(i, dims="sample") for i in np.divmod(keep, n_draw))
    thinned = (posterior[per_draw(posterior)].isel(chain=chain, draw=draw)
               .drop_vars(["chain", "draw"], errors="ignore").rename(sample="draw")
               .expand_dims(chain=1))
    return thinned.transpose("chain", "draw", ...)


def capture_before_after(result: xr.Dataset) -> dict:
    """Capture % per series: measured only, and with fills (all, and confident only).

    With known causes attached (:mod:`gapband.causes`), also the measured
    capture with the missing steps of planned maintenance left out of the
    expected steps (``measured_excluding_planned``).
    """
    flag = result["fill_flag"].transpose("series", "time")
    names = [str(s) for s in result["series"].values]

    def pct(mask: np.ndarray, expected: np.ndarray | int) -> dict[str, float]:
        shares = 100.0 * mask.sum(axis=1) / np.maximum(expected, 1)
        return {name: round(float(v), 2) for name, v in zip(names, shares, strict=True)}

    values, steps = flag.values, flag.sizes["time"]
    observed = values == flags.OBSERVED
    shares = {
        "measured": pct(observed, steps),
        "with_fills": pct(values != flags.NOT_FILLED, steps),
        "with_confident_fills": pct(observed | (values == flags.FILLED), steps),
    }
    planned = causes.planned_mask(result)
    if planned is not None:
        excused = (planned & ~observed).sum(axis=1)
        shares["measured_excluding_planned"] = pct(observed, steps - excused)
    return shares


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
    decimals: int | str = "input",
    overwrite: bool = False,
) -> list[Path]:
    """Write ``filled.nc``, ``filled.<table>`` and ``summary.json`` into ``out_dir``.

    ``decimals`` rounds the table's fills (:func:`gapband.outputs.long_table`);
    filled.nc keeps full precision.

    The three are written under temporary names and renamed together at the
    end (:func:`gapband.outputs.atomic_paths`): an interrupted run leaves the
    previous three or the new three, never a mixture or a partial file.
    """
    names = ["filled.nc", f"filled.{table}", "summary.json"]
    out = outputs.prepare_dir(out_dir, names, overwrite)
    targets = [out / name for name in names]
    with outputs.atomic_paths(targets) as (netcdf, long_table, json_file):
        outputs.write_netcdf(result, netcdf)
        outputs.write_table(result, long_table, decimals)
        outputs.write_json(summary, json_file)
    return targets


def observed_unchanged(panel: xr.Dataset, result: xr.Dataset) -> bool:
    """True when every observed cell of ``panel`` is bit-identical in ``result``."""
    before = panel["value"].values
    after = result["filled"].transpose("series", "time").values
    seen = ~np.isnan(before)
    return bool(np.array_equal(before[seen].view("int64"), after[seen].view("int64")))
