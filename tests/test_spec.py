"""The model spec: presets, validation from the key tables, checks against a Panel."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from gapband import spec
from gapband.errors import SpecError
from gapband.panel import make_panel


def _panel(step: str, n_time: int, values: np.ndarray | None = None):
    time = pd.date_range("2024-01-01", periods=n_time, freq=step)
    if values is None:
        values = np.random.default_rng(0).normal(size=(2, n_time)) + 5.0
    return make_panel(values, ["a", "b"], time, step)


@pytest.mark.parametrize("name", spec.PRESETS)
def test_every_preset_loads(name):
    loaded = spec.preset(name)
    assert loaded.description
    assert loaded.seasonal
    # presets down to daily carry each series' own persistence: the fill benchmark
    # (tests/benchmarks/bench_fill.py, daily panel) scores it better than without
    assert loaded.own_ar == (name in ("half-hourly", "hourly", "daily"))


@pytest.mark.parametrize(
    ("step", "expected"),
    [("10min", "half-hourly"), ("30min", "half-hourly"), ("h", "hourly"), ("2h", "hourly"),
     ("D", "daily"), ("2D", "daily"), ("7D", "monthly"), ("MS", "monthly")],
)
def test_preset_for_step(step, expected):
    chosen, name = spec.preset_for(_panel(step, 10))
    assert name == expected
    assert chosen == spec.preset(expected)


def test_load_file_with_base_and_overrides(tmp_path):
    path = tmp_path / "mine.toml"
    path.write_text('base = "hourly"\nrank = 1\nnoise = "student_t"\n[priors]\nnoise = 0.1\n')
    loaded = spec.load(path)
    hourly = spec.preset("hourly")
    assert (loaded.rank, loaded.noise, loaded.priors.noise) == (1, "student_t", 0.1)
    assert loaded.seasonal == hourly.seasonal
    assert loaded.priors.seasonal == hourly.priors.seasonal


def test_int_accepted_where_a_number_is_expected():
    parsed = spec.parse({"noise_df": 5, "priors": {"noise": 1}, "fixed": {"noise": 1}})
    assert parsed.noise_df == 5.0 and isinstance(parsed.noise_df, float)
    assert parsed.fixed.noise == 1.0


@pytest.mark.parametrize(
    ("data", "match"),
    [
        ({"rnak": 2}, r"unknown key 'rnak'; allowed keys: .*rank"),
        ({"priors": {"nosie": 1.0}}, r"unknown key 'priors.nosie'; allowed keys in priors"),
        ({"seasonal": [{"period": "1D", "harmonic": 2}]}, r"unknown key 'seasonal\[0\].harmonic'"),
        ({"rank": "2"}, r"rank = '2' has the wrong type; rank .* must be an integer in \[1, 20\]"),
        ({"rank": 2.0}, r"rank = 2.0 has the wrong type"),
        ({"own_ar": 1}, r"own_ar = 1 has the wrong type; .* must be true/false"),
        ({"rank": True}, r"rank = True has the wrong type"),
        ({"rank": 0}, r"rank = 0 is out of range; .* \[1, 20\]"),
        ({"ar_order": 4}, r"ar_order = 4 is out of range; .* \[1, 3\]"),
        ({"priors": {"noise": 0.0}}, r"priors.noise = 0.0 is out of range; .* > 0"),
        ({"noise": "cauchy"}, r"noise = 'cauchy' is not allowed; noise must be one of 'normal'"),
        ({"transform": "sqrt"}, r"transform = 'sqrt' is not allowed"),
        ({"seasonal": [{"period": "weekly"}]}, r"seasonal\[0\].period = 'weekly' is not a dur"),
        ({"seasonal": [{"period": "24"}]}, r"period = '24' is not a positive duration with a unit"),
        ({"seasonal": [{"period": 1}]}, r"seasonal\[0\].period = 1 is out of range"),
        ({"seasonal": [{"harmonics": 2}]}, r"seasonal\[0\].period is required"),
        ({"seasonal": {"period": "1D"}}, r"'seasonal' must be a list of tables"),
        ({"priors": 1.0}, r"'priors' must be a table"),
        ({"base": "weekly"}, r"base = 'weekly' is not a preset; use one of 'half-hourly'"),
    ],
)
def test_bad_spec_names_the_key(data, match):
    with pytest.raises(SpecError, match=match):
        spec.parse(data)


def test_load_reports_file_and_toml_errors(tmp_path):
    with pytest.raises(SpecError, match=r"cannot read model spec"):
        spec.load(tmp_path / "absent.toml")
    broken = tmp_path / "broken.toml"
    broken.write_text("rank = \n")
    with pytest.raises(SpecError, match=r"broken.toml: not valid TOML"):
        spec.load(broken)
    wrong = tmp_path / "wrong.toml"
    wrong.write_text("rank = 'three'\n")
    with pytest.raises(SpecError, match=r"wrong.toml: rank = 'three' has the wrong type"):
        spec.load(wrong)


def test_unknown_preset():
    with pytest.raises(SpecError, match=r"no preset named 'yearly'"):
        spec.preset("yearly")


def test_period_longer_than_the_data():
    daily = spec.preset("daily")  # has a 365.25-day cycle
    with pytest.raises(SpecError, match=r"seasonal\[1\].period = '365.25D' is 365.25 steps .* "
                                        r"span only 90 steps"):
        spec.check_against(daily, _panel("D", 90))
    spec.check_against(daily, _panel("D", 400))


def test_too_many_harmonics_for_the_period():
    short = spec.parse({"seasonal": [{"period": 6, "harmonics": 3}]})
    with pytest.raises(SpecError, match=r"seasonal\[0\].harmonics = 3 is too many"):
        spec.check_against(short, _panel("h", 48))


def test_period_durations_convert_to_steps():
    assert spec.Seasonal("1D", 2).steps(pd.Timedelta("30min")) == 48
    assert spec.Seasonal("7D", 2).steps(pd.Timedelta("1h")) == 168
    assert spec.Seasonal(12, 2).steps(pd.Timedelta("30D")) == 12


@pytest.mark.parametrize(("transform", "floor"), [("log", 0.0), ("log1p", -1.0)])
def test_transform_domain(transform, floor):
    values = np.full((2, 20), 3.0)
    values[1, 4] = floor
    values[0, 5] = np.nan
    checked = spec.parse({"transform": transform, "seasonal": []})
    with pytest.raises(SpecError, match=rf"transform = '{transform}' needs values above .* "
                                        r"series 'b'"):
        spec.check_against(checked, _panel("D", 20, values))
    values[1, 4] = floor + 0.5
    spec.check_against(checked, _panel("D", 20, values))


def test_spec_is_frozen_and_serialisable():
    hourly = spec.preset("hourly")
    with pytest.raises(AttributeError, match=r"cannot assign to field"):
        hourly.rank = 5
    as_dict = hourly.to_dict()
    assert as_dict["seasonal"][0] == {"period": "1D", "harmonics": 4}
    assert as_dict["fixed"]["noise"] is None
