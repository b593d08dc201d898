from __future__ import annotations

import json
import re

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from gapband import flags, outputs
from gapband.errors import UsageError
from gapband.panel import make_panel

DIMS = ("series", "time")
LEVELS = ("97.5", "50", "90", "80")  # deliberately out of order
TABLE_COLUMNS = [
    "time", "series", "units", "observed", "filled", "sd",
    "lower_50", "upper_50", "lower_80", "upper_80",
    "lower_90", "upper_90", "lower_97.5", "upper_97.5", "flag", "flag_code", "reason",
]


@pytest.fixture
def result():
    """A flagged result holding every flag and awkward floats in observed cells."""
    rng = np.random.default_rng(7)
    n_time = 16
    values = rng.standard_normal((3, n_time)) * 10.0 ** rng.integers(-300, 300, (3, n_time))
    values[0, :7] = [-0.0, 5e-324, 0.1 + 0.2, 1e308, np.nextafter(1.0, 2.0), -1 / 3, 1e-7]
    values[0, [7, 8]] = np.nan
    values[1, 10:14] = np.nan
    values[2, 3:] = np.nan  # three observations: not filled
    time = pd.date_range("2024-03-30 22:00", periods=n_time, freq="h")
    panel = make_panel(
        values, ["north", "süd", "east-3"], time, "h", units="µg m-3",
        attrs={"spec": {"rank": 2, "periods": [24, 168]}, "seed": 11},
    )
    missing = np.isnan(values)
    median = np.where(missing, rng.standard_normal(values.shape) / 3, np.nan)
    panel["fill_median"] = (DIMS, median)
    panel["fill_mean"] = (DIMS, median + 1 / 7)
    panel["fill_sd"] = (DIMS, np.where(missing, 0.3, np.nan))
    for level in LEVELS:
        half = float(level) / 100
        panel[f"lower_{level}"] = (DIMS, median - half)
        panel[f"upper_{level}"] = (DIMS, median + half)
    return flags.assign(panel, max_gap="3h")


def bits(a):
    return np.asarray(a, dtype="float64").view("uint64")


def test_result_fixture_holds_every_flag(result):
    assert set(np.unique(result["fill_flag"].values)) == {0, 1, 2, 3}


def test_netcdf_round_trip_is_bit_exact(result, tmp_path):
    path = outputs.write_netcdf(result, tmp_path / "filled.nc")
    with xr.open_dataset(path, engine="h5netcdf") as back:
        back = back.load()
    for name in ["value", "filled", "fill_mean", "fill_median", "fill_sd", "lower_97.5"]:
        assert np.array_equal(bits(back[name].values), bits(result[name].values)), name
    np.testing.assert_array_equal(back["fill_flag"].values, result["fill_flag"].values)
    assert back["fill_flag"].dtype == np.int8
    np.testing.assert_array_equal(back["time"].values, result["time"].values)
    assert list(back["series"].values) == ["north", "süd", "east-3"]


def test_netcdf_carries_cf_attributes(result, tmp_path):
    path = outputs.write_netcdf(result, tmp_path / "filled.nc")
    # Read with the netCDF-C library too: the file must not depend on h5netcdf.
    with xr.open_dataset(path, engine="netcdf4", decode_times=False) as raw:
        assert raw.attrs["Conventions"] == "CF-1.10"
        time_attrs = raw["time"].attrs
        # Source: CF Conventions 1.10, section 4.4 Time Coordinate ("<unit> since <date>").
        assert re.fullmatch(r"(seconds|minutes|hours|days) since \d{4}-\d\d-\d\d.*",
                            time_attrs["units"])
        assert time_attrs["calendar"] == "proleptic_gregorian"
        assert raw["time"].dtype == np.int64
        flag = raw["fill_flag"]
        # Source: CF Conventions 1.10, section 3.5 Flags: one flag_meanings word
        # per flag_values entry, and flag_values of the flag variable's type.
        assert len(flag.attrs["flag_values"]) == len(flag.attrs["flag_meanings"].split())
        assert flag.attrs["flag_values"].dtype == flag.dtype == np.int8
        for name in ["filled", "fill_mean", "fill_median", "fill_sd", "lower_50", "upper_90"]:
            assert raw[name].attrs["units"] == "µg m-3", name
            assert raw[name].attrs["ancillary_variables" if name == "filled" else "long_name"]
        assert all("long_name" in raw[name].attrs for name in raw.data_vars)
        assert raw["upper_97.5"].attrs["long_name"] == (
            "upper bound of the central 97.5% posterior predictive interval"
        )


def test_netcdf_serialises_structured_attributes_as_json(result, tmp_path):
    result.attrs.update({"flagged": True, "note": None, "levels": (50, 90)})
    result["n_draws"] = 200  # a scalar variable is written uncompressed
    path = outputs.write_netcdf(result, tmp_path / "filled.nc")
    with xr.open_dataset(path, engine="h5netcdf") as back:
        assert json.loads(back.attrs["spec"]) == {"rank": 2, "periods": [24, 168]}
        assert json.loads(back.attrs["levels"]) == [50, 90]
        assert back.attrs["flagged"] == "true" and back.attrs["note"] == "null"
        assert back.attrs["seed"] == 11 and back.attrs["step"] == "h"
        assert int(back["n_draws"]) == 200


def test_netcdf_writer_leaves_the_result_alone(result, tmp_path):
    before = result.copy(deep=True)
    outputs.write_netcdf(result, tmp_path / "filled.nc")
    xr.testing.assert_identical(result, before)


@pytest.mark.parametrize("suffix", [".csv", ".parquet"])
def test_table_columns_and_bit_exact_values(result, tmp_path, suffix):
    path = outputs.write_table(result, tmp_path / f"filled{suffix}")
    back = pd.read_csv(path) if suffix == ".csv" else pd.read_parquet(path)
    assert list(back.columns) == TABLE_COLUMNS
    long = result.transpose(*DIMS)
    observed = long["value"].notnull().values.ravel()
    assert np.array_equal(bits(back["observed"]), bits(long["value"].values.ravel()))
    assert np.array_equal(bits(back["filled"]), bits(long["filled"].values.ravel()))
    assert np.array_equal(
        bits(back["filled"][observed]), bits(long["value"].values.ravel()[observed])
    )
    assert back.loc[observed, ["sd", "lower_50", "upper_97.5"]].isna().all().all()
    fill = long["fill_flag"].values.ravel() == 1
    assert np.array_equal(bits(back["lower_90"][fill]), bits(long["lower_90"].values.ravel()[fill]))
    meanings = np.array(flags.FLAG_MEANINGS)[long["fill_flag"].values.ravel()]
    assert list(back["flag"]) == list(meanings)
    assert list(back["series"][:2]) == ["north", "north"]
    assert list(back["series"].unique()) == ["north", "süd", "east-3"]


def test_csv_time_is_iso_8601_and_empty_cells_are_blank(result, tmp_path):
    path = outputs.write_table(result, tmp_path / "filled.csv")
    lines = path.read_text(encoding="utf-8").splitlines()
    assert lines[0] == ",".join(TABLE_COLUMNS)
    assert lines[1].startswith("2024-03-30T22:00:00,north,µg m-3,-0.0,-0.0,,,")
    assert lines[1].endswith(",observed,0,")
    back = pd.read_csv(path, dtype={"time": str})
    assert back["time"].iloc[2] == "2024-03-31T00:00:00"


def test_flag_code_is_the_netcdf_flag_value_of_the_text(result, tmp_path):
    back = pd.read_csv(outputs.write_table(result, tmp_path / "filled.csv"))
    # Source: CF Conventions 1.10, section 3.5 Flags: flag_meanings[i] names flag_values[i].
    meanings = result["fill_flag"].attrs["flag_meanings"].split()
    values = list(result["fill_flag"].attrs["flag_values"])
    assert [meanings[values.index(code)] for code in back["flag_code"]] == list(back["flag"])


def _one_decimal(tmp_path):
    """A result whose observed values were read from one-decimal text."""
    text = ["32.8", "45.3", "", "", "0.1", "-7.0", "12.4", "", "3.3", "8.0", "1.1", "2.5",
            "40.0", "7.7", "9.9", ""]
    values = np.array([[float(v) if v else np.nan for v in text]])
    time = pd.date_range("2025-01-01", periods=values.shape[1], freq="h")
    panel = make_panel(values, ["quill"], time, "h")
    missing = np.isnan(values)
    noisy = np.where(missing, 20.367257901297474, np.nan)
    panel["fill_median"] = (DIMS, noisy)
    panel["fill_mean"] = (DIMS, noisy)
    panel["fill_sd"] = (DIMS, np.where(missing, 1.23456, np.nan))
    panel["lower_90"] = (DIMS, noisy - 2.0449)
    panel["upper_90"] = (DIMS, noisy + 2.0551)
    return flags.assign(panel), text


def test_csv_rounds_fills_to_the_input_resolution_and_keeps_observed_text(tmp_path):
    result, text = _one_decimal(tmp_path)
    path = outputs.write_table(result, tmp_path / "filled.csv")
    back = pd.read_csv(path, dtype=str, keep_default_na=False)
    observed = [v for v in text if v]
    # Observed cells: the input's own text (its shortest form) in both columns.
    kept = back["observed"] != ""
    assert list(back.loc[kept, "observed"]) == [str(float(v)) for v in observed]
    assert list(back.loc[kept, "filled"]) == list(back.loc[kept, "observed"])
    filled = back.loc[~kept & (back["flag"] != "not_filled")]
    assert set(filled["filled"]) == {"20.4"}
    assert set(filled["sd"]) == {"1.23"} and set(filled["lower_90"]) == {"18.3"}
    assert set(filled["upper_90"]) == {"22.4"}


@pytest.mark.parametrize(("decimals", "expected"), [("full", "20.367257901297474"), (3, "20.367")])
def test_csv_decimals_can_be_chosen(tmp_path, decimals, expected):
    result, _ = _one_decimal(tmp_path)
    path = outputs.write_table(result, tmp_path / "filled.csv", decimals=decimals)
    back = pd.read_csv(path, dtype=str, keep_default_na=False)
    assert expected in set(back["filled"])
    with pytest.raises(UsageError, match="decimals must be 'input', 'full' or a whole number"):
        outputs.write_table(result, tmp_path / "x.csv", decimals=-1)


def test_input_decimals_reads_the_resolution_of_each_series():
    values = np.array([[32.8, 45.25, np.nan], [1200.0, 5.0, -3.0], [0.1 + 0.2, 0.5, 1.0],
                       [np.pi, 1.0, 2.0], [np.nan, np.nan, np.nan], [1.5e-6, 2e-6, 0.0]])
    assert list(outputs.input_decimals(values)) == [2, 0, 1, -1, -1, 7]


def test_csv_times_carry_z_when_the_input_was_zoned(result, tmp_path):
    result.attrs["timezone"] = "UTC"
    back = pd.read_csv(outputs.write_table(result, tmp_path / "filled.csv"), dtype={"time": str})
    assert back["time"].iloc[0] == "2024-03-30T22:00:00Z"
    assert pd.Timestamp(back["time"].iloc[0]) == pd.Timestamp("2024-03-30 22:00", tz="UTC")


def test_parquet_keeps_time_as_timestamps(result, tmp_path):
    back = pd.read_parquet(outputs.write_table(result, tmp_path / "filled.parquet"))
    assert pd.api.types.is_datetime64_dtype(back["time"])
    assert back["time"].iloc[0] == pd.Timestamp("2024-03-30 22:00")


def test_table_needs_a_known_suffix_and_a_flagged_result(result, tmp_path):
    with pytest.raises(UsageError, match=r"filled\.xlsx.* must end in \.csv or \.parquet"):
        outputs.write_table(result, tmp_path / "filled.xlsx")
    with pytest.raises(UsageError, match=r"lacks filled, fill_flag.*flags\.assign"):
        outputs.write_table(result.drop_vars(["filled", "fill_flag"]), tmp_path / "f.csv")
    assert list(tmp_path.iterdir()) == []


def test_json_converts_numpy_nan_and_dates(tmp_path):
    obj = {
        "zeta": np.int64(3),
        "alpha": np.float32(0.5),
        "missing": float("nan"),
        "inf": np.array([1.0, np.inf]),
        "ok": np.bool_(True),
        "when": pd.Timestamp("2024-01-02 03:00"),
        "dt64": np.datetime64("2024-01-02T03:00"),
        "gap": pd.Timedelta("72h"),
        "units": "µg m-3",
        "nested": [{"t": (1, np.nan)}],
    }
    path = outputs.write_json(obj, tmp_path / "summary.json")
    text = path.read_text(encoding="utf-8")
    assert "µg m-3" in text and "NaN" not in text
    assert text.startswith('{\n  "zeta": 3,') and text.endswith("}\n")
    assert json.loads(text) == {
        "zeta": 3,
        "alpha": 0.5,
        "missing": None,
        "inf": [1.0, None],
        "ok": True,
        "when": "2024-01-02T03:00:00",
        "dt64": "2024-01-02T03:00:00",
        "gap": "P3DT0H0M0S",
        "units": "µg m-3",
        "nested": [{"t": [1, None]}],
    }


def test_json_refuses_unknown_types(tmp_path):
    with pytest.raises(TypeError, match=r"cannot write object <object .*> as JSON"):
        outputs.write_json({"x": object()}, tmp_path / "summary.json")
    assert list(tmp_path.iterdir()) == []


def test_atomic_path_uses_a_hidden_temporary_in_the_same_folder(tmp_path):
    target = tmp_path / "filled.nc"
    with outputs.atomic_path(target) as tmp:
        assert tmp.parent == tmp_path
        assert re.fullmatch(r"\.filled\.nc\.tmp-[0-9a-f]+\.nc", tmp.name)
        tmp.write_text("new")
        assert not target.exists()
    assert target.read_text() == "new"
    assert list(tmp_path.iterdir()) == [target]


def test_failed_block_leaves_no_target_and_no_temporary(tmp_path):
    target = tmp_path / "filled.csv"
    with pytest.raises(RuntimeError, match="disk full"), outputs.atomic_path(target) as tmp:
        tmp.write_text("half a fi")
        raise RuntimeError("disk full")
    assert list(tmp_path.iterdir()) == []


def test_failed_rewrite_leaves_the_existing_target_untouched(result, tmp_path, monkeypatch):
    target = tmp_path / "filled.csv"
    target.write_text("previous run\n")

    def half_write(self, path, **kwargs):
        with open(path, "w") as f:
            f.write("time,series\n2024")
        raise OSError("no space left on device")

    monkeypatch.setattr(pd.DataFrame, "to_csv", half_write)
    with pytest.raises(OSError, match="no space left"):
        outputs.write_table(result, target)
    assert target.read_text() == "previous run\n"
    assert list(tmp_path.iterdir()) == [target]


def test_netcdf_writer_failing_midway_leaves_nothing(result, tmp_path, monkeypatch):
    def half_write(self, path, **kwargs):
        with open(path, "wb") as f:
            f.write(b"\x89HDF\r\n")
        raise RuntimeError("interrupted")

    monkeypatch.setattr(xr.Dataset, "to_netcdf", half_write)
    with pytest.raises(RuntimeError, match="interrupted"):
        outputs.write_netcdf(result, tmp_path / "filled.nc")
    assert list(tmp_path.iterdir()) == []


def test_successful_write_replaces_an_existing_target(tmp_path):
    target = tmp_path / "summary.json"
    target.write_text("old")
    outputs.write_json({"a": 1}, target)
    assert json.loads(target.read_text()) == {"a": 1}


def test_prepare_dir_creates_the_folder(tmp_path):
    out = outputs.prepare_dir(tmp_path / "run" / "one", ["filled.nc"], overwrite=False)
    assert out.is_dir()


def test_prepare_dir_refuses_to_overwrite_without_permission(tmp_path):
    (tmp_path / "filled.nc").write_text("keep")
    (tmp_path / "summary.json").write_text("keep")
    names = ["filled.nc", "filled.csv", "summary.json"]
    with pytest.raises(
        UsageError, match=r"already holds filled\.nc, summary\.json; pass --overwrite"
    ):
        outputs.prepare_dir(tmp_path, names, overwrite=False)
    assert outputs.prepare_dir(tmp_path, names, overwrite=True) == tmp_path
    assert (tmp_path / "filled.nc").read_text() == "keep"


def test_prepare_dir_refuses_a_file_as_folder(tmp_path):
    (tmp_path / "out").write_text("")
    with pytest.raises(UsageError, match=r"output folder .*out' is a file"):
        outputs.prepare_dir(tmp_path / "out", ["filled.nc"], overwrite=False)
