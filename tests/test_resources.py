"""The memory estimate against a real fit, and the refusal of a fill that would not fit."""

from __future__ import annotations

import os

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from gapband import filling, inference, resources, spec
from gapband.cli import cli
from gapband.errors import MemoryLimitError
from gapband.panel import make_panel

SMALL = {"base": "hourly", "rank": 2, "seasonal": [{"period": "1D", "harmonics": 2}]}


def _panel(n_series: int = 3, n_time: int = 72):
    rng = np.random.default_rng(5)
    t = np.arange(n_time)
    values = np.array([10 + (i + 1) * np.sin(2 * np.pi * t / 24) + rng.normal(0, 0.3, n_time)
                       for i in range(n_series)])
    values[0, 20:30] = np.nan
    values[2, rng.choice(n_time, 9, replace=False)] = np.nan
    return make_panel(values, [f"s{i}" for i in range(n_series)],
                      pd.date_range("2024-01-01", periods=n_time, freq="h"), "h", source="p.csv")


@pytest.mark.parametrize("own_ar", [True, False])
def test_kept_draws_match_the_gibbs_posterior_byte_for_byte(own_ar):
    model = spec.parse({**SMALL, "own_ar": own_ar})
    panel = _panel()
    fit = inference.fit(panel, model, method="gibbs", draws=15, tune=5, chains=2, cores=1)
    measured = sum(var.nbytes for var in fit.posterior.data_vars.values())
    n_missing = int(panel["value"].isnull().sum())
    kept = resources.kept_draws(3, 72, n_missing, model, method="gibbs", draws=15, chains=2,
                                rank=fit.built.rank)
    assert sum(kept.values()) == measured


def test_estimate_grows_with_draws_and_own_paths_weigh_on_nuts():
    model = spec.parse(SMALL)
    sizes = {"n_series": 100, "n_time": 8760, "n_missing": 80_000}
    gibbs = resources.estimate(**sizes, spec=model, method="gibbs", draws=1000, chains=2,
                               cores=2, keep_draws=200, n_levels=4)
    fewer = resources.estimate(**sizes, spec=model, method="gibbs", draws=100, chains=2,
                               cores=2, keep_draws=200, n_levels=4)
    nuts = resources.estimate(**sizes, spec=model, method="nuts", draws=1000, chains=2,
                              cores=2, keep_draws=200, n_levels=4)
    assert fewer.total < gibbs.total < nuts.total
    # NUTS keeps every own path: 3 copies × 2,000 draws × 100 × 8,760 float64 at least.
    assert nuts.parts["posterior draws"] >= 3 * 2000 * 100 * 8760 * 8


def test_available_memory_is_positive_and_below_physical_memory():
    available = resources.available_memory()
    physical = os.sysconf("SC_PHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    assert available is not None and 0 < available <= physical


def test_fill_that_would_not_fit_is_refused_before_the_fit(monkeypatch):
    monkeypatch.setattr(resources, "available_memory", lambda: 1 << 20)  # 1 MiB

    def no_fit(*args, **kwargs):
        raise AssertionError("the fit should not start")

    monkeypatch.setattr(inference, "fit", no_fit)
    options = filling.FillOptions(draws=500, chains=2, keep_draws=100, progress=False)
    with pytest.raises(MemoryLimitError, match=r"p\.csv: this fill needs about [\d.]+ MiB of "
                       r"memory \(.*posterior draws.*\), but 1\.0 MiB is available.*"
                       r"--draws \d+.*--chains 1.*--keep-draws, now 100.*blocks.*Dask"):
        filling.fill(_panel(), model=spec.parse(SMALL), options=options)


def test_fill_within_memory_goes_ahead(monkeypatch):
    monkeypatch.setattr(resources, "available_memory", lambda: 1 << 40)
    result, _ = filling.fill(_panel(), model=spec.parse(SMALL),
                             options=filling.FillOptions(draws=20, tune=10, progress=False))
    assert int(result["fill_flag"].isin([1, 2]).sum()) == int(_panel()["value"].isnull().sum())


def test_cli_refusal_is_a_usage_error_with_the_estimate(monkeypatch, tmp_path):
    monkeypatch.setattr(resources, "available_memory", lambda: 1 << 16)
    panel = _panel()
    frame = panel["value"].to_pandas().T
    frame.index.name = "time"
    path = tmp_path / "p.csv"
    frame.to_csv(path)
    result = CliRunner().invoke(cli, ["fill", str(path), "--out", str(tmp_path / "out"),
                                      "--quiet", "--draws", "50"])
    assert result.exit_code == 2, result.output
    assert "usage error: p.csv: this fill needs about" in result.output
    assert "64.0 KiB is available" in result.output
    assert not (tmp_path / "out" / "filled.nc").exists()
