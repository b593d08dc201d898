"""Flag reasons, extrapolation and the default width rule through a real fill, the files and
the commands that read them (stats, report), on small panels."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from click.testing import CliRunner

from gapband import calibration, filling, flags, outputs, parallel, spec
from gapband.cli import cli
from gapband.panel import make_panel

# A small model so each fit takes seconds: one factor, a daily cycle.
TINY = spec.parse({"base": "hourly", "rank": 1, "seasonal": [{"period": "1D", "harmonics": 2}]})
N_TIME = 96
LATE, EARLY = 8, 6  # "late" starts 8 hours in, "early" ends 6 hours before the record does


def _values(seed: int = 5) -> np.ndarray:
    """Three hourly series sharing a daily cycle and a slow wander, with inner gaps."""
    rng = np.random.default_rng(seed)
    t = np.arange(N_TIME)
    shared = np.sin(2 * np.pi * t / 24) + np.cumsum(rng.normal(0, 0.15, N_TIME))
    values = np.array([20 + (i + 2) * shared + rng.normal(0, 0.3, N_TIME) for i in range(3)])
    values[0, 40:52] = np.nan
    values[1, [20, 60, 61]] = np.nan
    values[1, :LATE] = np.nan
    values[2, N_TIME - EARLY:] = np.nan
    values[2, 30] = np.nan
    return values


NAMES = ["whole", "late", "early"]


@pytest.fixture(scope="module")
def panel():
    return make_panel(_values(), NAMES, pd.date_range("2024-03-01", periods=N_TIME, freq="h"),
                      "h", units="ug/m3")


@pytest.fixture(scope="module")
def cli_fill(panel, tmp_path_factory):
    root = tmp_path_factory.mktemp("reasons")
    rows = [(t.isoformat(), name, repr(float(v)) if np.isfinite(v) else "")
            for name, row in zip(NAMES, panel["value"].values, strict=True)
            for t, v in zip(pd.DatetimeIndex(panel["time"].values), row, strict=True)]
    csv = root / "stations.csv"
    pd.DataFrame(rows, columns=["time", "station", "value"]).to_csv(csv, index=False)
    model = root / "tiny.toml"
    model.write_text('base = "hourly"\nrank = 1\n\n[[seasonal]]\nperiod = "1D"\nharmonics = 2\n',
                     encoding="utf-8")
    out = root / "run"
    run = CliRunner().invoke(cli, ["fill", str(csv), "--out", str(out), "--model", str(model),
                                   "--draws", "150", "--tune", "150", "--seed", "2", "--quiet",
                                   "--max-gap", "6h", "--keep-draws", "40"])
    assert run.exit_code == 0, run.output
    return out, run.output


def test_extrapolated_cells_are_not_filled_by_the_fill_command(cli_fill):
    out, printed = cli_fill
    with xr.open_dataset(out / "filled.nc") as ds:
        ds = ds.load()
    flag, reason = ds["fill_flag"].values, ds["fill_reason"].values
    extrapolated = int(flags.REASON_MASKS[flags.REASON_NAMES.index("extrapolated")])
    for s, cells in ((1, slice(0, LATE)), (2, slice(N_TIME - EARLY, N_TIME))):
        assert (flag[s, cells] == flags.NOT_FILLED).all()
        assert (reason[s, cells] == extrapolated).all()
        for name in ("filled", "fill_median", "fill_sd", "lower_90", "upper_95"):
            assert np.isnan(ds[name].values[s, cells]).all(), name
    # the inner gaps are filled
    assert np.isin(flag[1, [20, 60, 61]], (flags.FILLED, flags.FILLED_UNCERTAIN)).all()
    assert np.isfinite(ds["filled"].values[1, [20, 60, 61]]).all()
    # the long gap: long_gap on every cell of it
    long_gap = int(flags.REASON_MASKS[flags.REASON_NAMES.index("long_gap")])
    assert ((reason[0, 40:52] & long_gap) != 0).all()
    assert (flag[0, 40:52] == flags.FILLED_UNCERTAIN).all()
    # the joint draws hold only filled cells
    assert not np.isin(np.ravel_multi_index((np.full(LATE, 1), np.arange(LATE)), flag.shape),
                       ds["missing_cell"].values).any()
    assert f"{LATE + EARLY} extrapolated" in printed


def test_reason_variable_column_and_counts_agree(cli_fill):
    out, _ = cli_fill
    with xr.open_dataset(out / "filled.nc") as ds:
        ds = ds.load()
    attrs = ds["fill_reason"].attrs
    # Source: CF Conventions 1.10, section 3.5: flag_masks of the variable's type,
    # one per blank-separated flag_meanings word.
    assert ds["fill_reason"].dtype == attrs["flag_masks"].dtype == np.int16
    assert attrs["flag_meanings"].split() == list(flags.REASON_NAMES)
    assert ds["value"].attrs["ancillary_variables"] == "fill_flag fill_reason"
    assert ds["filled"].attrs["ancillary_variables"] == "fill_flag fill_reason"
    assert "units" not in attrs
    table = pd.read_csv(out / "filled.csv")
    codes = ds["fill_reason"].transpose("series", "time").values.ravel()
    np.testing.assert_array_equal(flags.reason_codes(table["reason"]), codes)
    assert table["reason"].isna().equals(pd.Series(codes == 0))
    assert (table.loc[table["flag"].isin(["observed", "filled"]), "reason"].isna()).all()
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    assert summary["flag_reasons"] == flags.reason_counts(ds)
    assert summary["flag_reasons"]["series"]["late"]["extrapolated"] == LATE
    assert summary["flag_rules"]["max_var_width"] == flags.MAX_VAR_WIDTH
    assert summary["flag_rules"]["extrapolate"] is False


def test_parquet_table_keeps_the_reasons(cli_fill, tmp_path):
    out, _ = cli_fill
    result, _ = outputs.open_fill(out)
    outputs.write_table(result, tmp_path / "filled.parquet")
    table = pd.read_parquet(tmp_path / "filled.parquet")
    np.testing.assert_array_equal(flags.reason_codes(table["reason"]),
                                  result["fill_reason"].transpose("series", "time").values.ravel())


def test_stats_and_report_read_a_fill_with_extrapolated_cells(cli_fill, tmp_path):
    out, _ = cli_fill
    run = CliRunner().invoke(cli, ["stats", str(out), "--period", "day", "--mean",
                                   "--min-capture", "50", "--out", str(tmp_path)])
    assert run.exit_code == 0, run.output
    rows = pd.read_csv(tmp_path / "stats-day.csv")
    first = rows[(rows["series"] == "late")].iloc[0]
    # 8 of the first day's 24 steps are not filled: they count neither as observed nor
    # filled, and the day's mean is over the other 16 (15 observed, hour 20 filled)
    assert first["n_filled"] == 1 and first["n_observed"] == 24 - LATE - 1
    assert first["with_fills_pct"] == pytest.approx(100 * (24 - LATE) / 24)
    result, _ = outputs.open_fill(out)
    day = result["filled"].sel(series="late").values[:24]
    assert np.isnan(day[:LATE]).all()
    assert first["estimate"] == pytest.approx(np.mean(day[LATE:]), abs=0.5)
    assert first["lower_90"] <= first["estimate"] <= first["upper_90"]
    run = CliRunner().invoke(cli, ["report", str(out), "--out", str(tmp_path / "r.html")])
    assert run.exit_code == 0, run.output
    html = (tmp_path / "r.html").read_text(encoding="utf-8")
    assert "extrapolated" in html and "long_gap (12)" in html
    assert "before a series&#39; first or after its last observation" in html or \
        "before a series' first or after its last observation" in html


def test_extrapolate_fills_and_flags_and_width_rules_read_the_model_own_width(panel):
    # a calibration that halves every interval: the width rule must still read the model's own
    factors = {f"{lv:g}": {label: 0.5 for label in calibration.BUCKETS}
               for lv in filling.DEFAULT_LEVELS}
    narrowing = calibration.Calibration(
        "narrow.json", "0" * 64, "gibbs", "gaps", TINY.transform, {}, "", None, factors, 1000)
    plain, _ = filling.fill(panel, model=TINY, options=filling.FillOptions(
        draws=100, tune=100, seed=4, progress=False, keep_draws=0,
        rules=filling.FlagRules(extrapolate=True, accept_unconverged=True,
                                max_var_width=None)))
    own = (plain["upper_90"] - plain["lower_90"]).values
    missing = np.isnan(panel["value"].values)
    limit = float(np.quantile(own[missing], 0.5))  # half the fills are wider than this
    options = filling.FillOptions(
        draws=100, tune=100, seed=4, progress=False, keep_draws=20,
        rules=filling.FlagRules(extrapolate=True, accept_unconverged=True, max_var_width=None,
                                max_width=limit))
    result, summary = filling.fill(panel, model=TINY, options=options, calibration=narrowing)
    flag, reason = result["fill_flag"].values, result["fill_reason"].values
    # extrapolated cells: filled, uncertain, with the reason
    bit = {name: int(m) for name, m in zip(flags.REASON_NAMES, flags.REASON_MASKS, strict=True)}
    assert (flag[1, :LATE] == flags.FILLED_UNCERTAIN).all()
    assert ((reason[1, :LATE] & bit["extrapolated"]) != 0).all()
    assert np.isfinite(result["filled"].values[1, :LATE]).all()
    assert summary["flag_reasons"]["series"]["early"]["extrapolated"] == EARLY
    # narrowed intervals, but the width rule reads the model's own widths
    calibrated = (result["upper_90"] - result["lower_90"]).values
    kept = result[flags.OWN_WIDTH].values
    np.testing.assert_allclose(kept[missing], own[missing], rtol=1e-9)
    np.testing.assert_allclose(calibrated[missing], 0.5 * own[missing], rtol=1e-9)
    wide = missing & (own > limit)
    assert wide.any() and (calibrated[wide] <= limit).all()
    np.testing.assert_array_equal((reason & bit["wide_interval"]) != 0, wide)
    assert (flag[wide] == flags.FILLED_UNCERTAIN).all()
    # and the joint draws cover the extrapolated cells, now filled
    cells = np.ravel_multi_index((np.full(LATE, 1), np.arange(LATE)), flag.shape)
    assert np.isin(cells, result["missing_cell"].values).all()


def test_blocks_judge_extrapolation_on_the_whole_panel():
    # one group of three series over 16 days, two windows (cores [0, 192) and [192, 384));
    # the second window opens inside s00's gap, which the whole record closes on both sides
    rng = np.random.default_rng(8)
    hour = np.arange(24 * 16)
    factor = np.sin(2 * np.pi * hour / 24) + np.cumsum(rng.normal(0, 0.08, hour.size))
    values = 15 + 2 * factor + rng.normal(0, 0.3, (3, hour.size))
    values[0, 100:200] = np.nan
    values[1, :30] = np.nan
    panel = make_panel(values, ["s00", "s01", "s02"],
                       pd.date_range("2024-01-01", periods=hour.size, freq="h"), "h")
    plan = parallel.plan_blocks(panel, model=TINY, max_series=3, window="14D", overlap="3D")
    assert len(plan.blocks) == 2 and 100 < plan.blocks[1].window[0] < 200
    options = filling.FillOptions(draws=100, tune=100, seed=3, progress=False, keep_draws=20,
                                  rules=filling.FlagRules(accept_unconverged=True))
    result, _ = parallel.fill_blocks(panel, plan, model=TINY, options=options)
    flag, reason = result["fill_flag"].values, result["fill_reason"].values
    assert np.isin(flag[0, 100:200], (flags.FILLED, flags.FILLED_UNCERTAIN)).all()
    assert np.isfinite(result["filled"].values[0, 100:200]).all()
    assert (flag[1, :30] == flags.NOT_FILLED).all()
    assert (reason[1, :30] == flags.REASON_MASKS[flags.REASON_NAMES.index("extrapolated")]).all()
