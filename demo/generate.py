"""Generate the invented Tolmere Basin network: hourly no2 and temp, with gaps.

Deterministic for a given config (its seed). Writes one long CSV per
quantity with the gaps punched in, and a CSV with the true values of every
hidden cell so the demo can show how good the fills were. A slice (fewer
days or stations) is cut from the whole simulated network, so it holds the
same values and gaps as the full run::

    python demo/generate.py --out demo/output            # the full year
    python demo/generate.py --out /tmp/x --quick         # the slice of gapband demo --quick
    python demo/generate.py --out /tmp/x --first-day 100 --days 21 --stations QUILL,BRASS
"""

from __future__ import annotations

import argparse
import tomllib
from pathlib import Path

import numpy as np
import pandas as pd
from scipy.signal import lfilter

from gapband.errors import UsageError
from gapband.outputs import atomic_path

CONFIG = Path(__file__).with_name("network.toml")
QUANTITIES = {"no2": "µg/m³", "temp": "°C"}


def load_config(path: Path = CONFIG) -> dict:
    """The network description (stations, levels, gap pattern)."""
    with open(path, "rb") as f:
        return tomllib.load(f)


def ar1(rng: np.random.Generator, phi: float, sd: float, shape: tuple[int, int]) -> np.ndarray:
    """Stationary AR(1) paths along the last axis with marginal sd ``sd``."""
    shocks = rng.normal(0.0, sd * np.sqrt(1 - phi**2), shape)
    shocks[..., 0] = rng.normal(0.0, sd, shape[:-1])
    return lfilter([1.0], [1.0, -phi], shocks, axis=-1)


def simulate(config: dict) -> dict[str, pd.DataFrame]:
    """True hourly values of the whole network, one wide frame (time × station) per quantity."""
    rng = np.random.default_rng(config["seed"])
    stations = config["station"]
    times = pd.date_range(config["start"], periods=24 * config["days"], freq="h")
    n, t = len(stations), len(times)
    hour = times.hour.to_numpy()
    yearly = 2 * np.pi * (times.day_of_year.to_numpy() - 1) / 365.25
    weekend = (times.day_of_week.to_numpy() >= 5).astype(float)

    weather = ar1(rng, 0.995, 3.0, (1, t))[0]  # the basin's shared weather anomaly, °C
    stagnation = ar1(rng, 0.99, 0.35, (1, t))[0]  # shared air-mass build-up, log units
    temp_offset = np.array([s["temp_offset"] for s in stations])[:, None]
    temp = (
        10.0
        - 8.0 * np.cos(yearly - 0.35)
        + 4.0 * np.cos(2 * np.pi * (hour - 15) / 24)
        + weather
        + temp_offset
        + ar1(rng, 0.9, 0.6, (n, t))
        + rng.normal(0.0, 0.15, (n, t))
    )
    rush = 0.45 * np.exp(-((hour - 8) ** 2) / 4.0) + 0.35 * np.exp(-((hour - 18) ** 2) / 6.0)
    level = np.log([s["no2_level"] for s in stations])[:, None]
    log_no2 = (
        level
        - 0.2
        + 0.35 * np.cos(yearly - 0.2)
        + rush * (1 - 0.5 * weekend)
        - 0.25 * weekend
        + stagnation
        - 0.03 * weather
        + ar1(rng, 0.85, 0.2, (n, t))
        + rng.normal(0.0, 0.08, (n, t))
    )
    ids = [s["id"] for s in stations]
    return {
        "no2": pd.DataFrame(np.round(np.exp(log_no2), 1).T, index=times, columns=ids),
        "temp": pd.DataFrame(np.round(temp, 2).T, index=times, columns=ids),
    }


def gap_mask(config: dict, ids: list[str], n_steps: int, seed_offset: int) -> np.ndarray:
    """Missing cells (station × hour) in the pattern the config describes."""
    gaps = config["gaps"]
    rng = np.random.default_rng(config["seed"] + seed_offset)
    mask = rng.random((len(ids), n_steps)) < gaps["single_hour_rate"]
    lo, hi = gaps["failure_hours"]
    for i in range(len(ids)):
        for _ in range(gaps["failures_per_station"]):
            start = rng.integers(0, n_steps)
            mask[i, start : start + rng.integers(lo, hi + 1)] = True
    for kind in ("outage", "offline", "calibration"):
        event = gaps[kind]
        if event["station"] in ids:
            first = 24 * event["first_day"]
            mask[ids.index(event["station"]), first : first + 24 * event["days"]] = True
    late = gaps["late_start"]
    if late["station"] in ids:
        mask[ids.index(late["station"]), : 24 * late["first_day"]] = True
    return mask


def long_table(wide: pd.DataFrame) -> pd.DataFrame:
    """Long layout (time, station, value), missing cells written as empty."""
    table = wide.rename_axis("time").reset_index().melt(
        id_vars="time", var_name="station", value_name="value"
    )
    table["time"] = table["time"].dt.strftime("%Y-%m-%dT%H:%M")
    return table


def quick_slice(config: dict) -> dict:
    """The ``[quick]`` table of the config as keywords of :func:`write_network`."""
    quick = config["quick"]
    return {"first_day": quick["first_day"], "days": quick["days"],
            "stations": list(quick["stations"])}


def write_network(
    out: Path, *, first_day: int = 0, days: int | None = None, stations: list[str] | None = None
) -> list[Path]:
    """Write ``tolmere_<quantity>.csv`` and ``tolmere_truth.csv`` into ``out``.

    The slice ``first_day`` to ``first_day + days`` of the listed ``stations``
    (default: the whole record, every station) is cut from the whole network.
    """
    config = load_config()
    ids = [s["id"] for s in config["station"]]
    unknown = sorted(set(stations or ()) - set(ids))
    if unknown:
        raise UsageError(f"no station {unknown[0]!r} in the demo network; its stations are "
                         f"{', '.join(ids)}")
    days = config["days"] - first_day if days is None else days
    if not (0 <= first_day and 0 < days and first_day + days <= config["days"]):
        raise UsageError(f"days {first_day} to {first_day + days} are not inside the demo "
                         f"network's record, days 0 to {config['days']}")
    keep = [ids.index(s) for s in stations] if stations else list(range(len(ids)))
    rows = slice(24 * first_day, 24 * (first_day + days))
    out.mkdir(parents=True, exist_ok=True)
    written, hidden = [], []
    for k, (quantity, whole) in enumerate(simulate(config).items()):
        # Station-wide events hit both instruments; short drops differ per instrument.
        mask = gap_mask(config, ids, len(whole), seed_offset=k)[keep, rows]
        wide = whole.iloc[rows, keep]
        gapped = wide.mask(mask.T)
        path = out / f"tolmere_{quantity}.csv"
        with atomic_path(path) as tmp:
            long_table(gapped).to_csv(tmp, index=False)
        written.append(path)
        truth_long = long_table(wide)
        truth_long = truth_long[mask.reshape(-1)]
        hidden.append(truth_long.assign(quantity=quantity, units=QUANTITIES[quantity]))
    truth_path = out / "tolmere_truth.csv"
    with atomic_path(truth_path) as tmp:
        pd.concat(hidden).to_csv(tmp, index=False)
    return [*written, truth_path]


def main() -> None:
    """Command-line entry: write the network's CSV files."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, required=True, help="output folder")
    parser.add_argument("--quick", action="store_true",
                        help="the config's [quick] slice (what gapband demo --quick runs on)")
    parser.add_argument("--first-day", type=int, default=0, help="first day of the slice")
    parser.add_argument("--days", type=int, help="days in the slice (default: to the end)")
    parser.add_argument("--stations", help="comma-separated station ids (default: all)")
    args = parser.parse_args()
    if args.quick:
        chosen = quick_slice(load_config())
    else:
        chosen = {"first_day": args.first_day, "days": args.days,
                  "stations": args.stations.split(",") if args.stations else None}
    for path in write_network(args.out, **chosen):
        print(path)


if __name__ == "__main__":
    main()
