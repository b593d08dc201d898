"""The model specification: what the TOML presets in ``models/`` may say.

A spec is read from TOML into a frozen :class:`ModelSpec`. Every key, its
type, its allowed range or choices and its default are declared once, in the
tables below, so every bad key, type or value gets the same kind of message
naming the key and what is allowed. Unknown keys are errors.

A spec file may start from a preset with ``base = "hourly"`` and override
single keys; tables (``[priors]``, ``[fixed]``) merge key by key, a given
``[[seasonal]]`` list replaces the preset's.
"""

from __future__ import annotations

import dataclasses
import tomllib
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import Any, Literal

import numpy as np
import pandas as pd
import xarray as xr

from gapband.errors import SpecError
from gapband.panel import step_of

PRESETS = ("half-hourly", "hourly", "daily", "monthly")

#: Where the scale priors stop, in standardised units (a series' sd is 1). The
#: noise sd and each series' own sd are at least SCALE_FLOOR (a thousandth of
#: the series' spread), the trend step sd at least STEP_FLOOR, and each own
#: AR(1) coefficient at most OWN_RHO_MAX: below (above) them a precision of the
#: sampler becomes numerically singular, and a density evaluated there grows
#: without bound. The model (PyMC) and the Gibbs sampler share these bounds:
#: they are part of the priors (HalfNormals truncated below, a Uniform on
#: [0, OWN_RHO_MAX]).
SCALE_FLOOR = 1e-3
STEP_FLOOR = 1e-5
OWN_RHO_MAX = 0.999


@dataclass(frozen=True)
class Key:
    """One allowed key: its types, range or choices, default and meaning."""

    types: tuple[type, ...]
    default: Any
    help: str
    low: float | None = None
    high: float | None = None
    choices: tuple[str, ...] | None = None
    low_open: bool = False  # True: the value must be > low, not >= low

    def allowed(self) -> str:
        """Describe the allowed values in words, for messages."""
        if self.choices:
            return "one of " + ", ".join(repr(c) for c in self.choices)
        kind = " or ".join(_TYPE_NAMES[t] for t in self.types)
        if self.low is not None and self.high is not None:
            left = "(" if self.low_open else "["
            return f"{kind} in {left}{self.low:g}, {self.high:g}]"
        if self.low is not None:
            return f"{kind} {'>' if self.low_open else '>='} {self.low:g}"
        return kind


_TYPE_NAMES = {int: "an integer", float: "a number", bool: "true/false", str: "a string"}

#: Top-level keys. Tables (priors, fixed) and the seasonal list have their own.
TOP_KEYS: dict[str, Key] = {
    "description": Key((str,), "", "free text shown in reports"),
    "rank": Key((int,), 3, "maximum number of shared factors", 1, 20),
    "rank_share": Key(
        (float,), 0.05,
        "a factor counts when it explains at least this share of the variance (and over 1/N)",
        0.0, 1.0, low_open=True,
    ),
    "ar_order": Key((int,), 1, "order p of the short-term AR(p) factors", 1, 3),
    "ar_factors": Key((int,), 1, "number of short-term AR factors", 0, 10),
    "own_ar": Key((bool,), True, "each series' own AR(1) persistence"),
    "noise": Key((str,), "normal", "noise family", choices=("normal", "student_t")),
    "noise_df": Key((float,), 4.0, "degrees of freedom of Student-t noise", 2.0, 100.0,
                    low_open=True),
    "transform": Key((str,), "none", "transform applied before standardising",
                     choices=("none", "log", "log1p")),
    "standardise": Key((bool,), True, "standardise each series (mean 0, sd 1) before fitting"),
}

#: Keys of each ``[[seasonal]]`` entry.
SEASONAL_KEYS: dict[str, Key] = {
    "period": Key((int, float, str), None,
                  "period in grid steps (number) or as a duration ('1D', '7D', '365.25D')",
                  2.0, None),
    "harmonics": Key((int,), 2, "number of Fourier harmonics", 1, 50),
}

#: Prior scales, in standardised units (see gapband.model for the forms).
PRIOR_KEYS: dict[str, Key] = {
    "loading": Key((float,), 1.0, "sd of the Normal prior on loadings", 0.0, None, low_open=True),
    "level": Key((float,), 1.0, "sd of the Normal prior on each trend's start", 0.0, None,
                 low_open=True),
    "trend_innovation": Key((float,), 0.05, "scale of the HalfNormal prior on the trend step sd",
                            0.0, None, low_open=True),
    "seasonal": Key((float,), 0.5, "sd of the Normal prior on Fourier coefficients", 0.0, None,
                    low_open=True),
    "own": Key((float,), 0.5, "scale of the HalfNormal prior on each series' own AR(1) sd",
               0.0, None, low_open=True),
    "noise": Key((float,), 0.5, "scale of the HalfNormal prior on the noise sd", 0.0, None,
                 low_open=True),
}

#: Quantities that may be fixed instead of given a prior (tests, reference checks).
FIXED_KEYS: dict[str, Key] = {
    "loading": Key((float,), None, "every loading of the shared factors", 0.0, None,
                   low_open=True),
    "trend_innovation": Key((float,), None, "trend step sd", STEP_FLOOR, None),
    "own": Key((float,), None, "sd of each series' own AR(1) component", SCALE_FLOOR, None),
    "noise": Key((float,), None, "noise sd of every series", SCALE_FLOOR, None),
}


@dataclass(frozen=True)
class Seasonal:
    """One seasonal cycle: a period (grid steps or a duration) and its harmonics."""

    period: float | str
    harmonics: int

    def steps(self, step: pd.Timedelta) -> float:
        """The period in grid steps of a grid with nominal step ``step``."""
        if isinstance(self.period, str):
            return pd.Timedelta(self.period) / step
        return float(self.period)


@dataclass(frozen=True)
class Priors:
    """Prior scales, in standardised units."""

    loading: float = PRIOR_KEYS["loading"].default
    level: float = PRIOR_KEYS["level"].default
    trend_innovation: float = PRIOR_KEYS["trend_innovation"].default
    seasonal: float = PRIOR_KEYS["seasonal"].default
    own: float = PRIOR_KEYS["own"].default
    noise: float = PRIOR_KEYS["noise"].default


@dataclass(frozen=True)
class Fixed:
    """Quantities held at a fixed value (standardised units); None = use the prior."""

    loading: float | None = None
    trend_innovation: float | None = None
    own: float | None = None
    noise: float | None = None


@dataclass(frozen=True)
class ModelSpec:
    """A validated model specification. Build with :func:`load`, :func:`preset` or :func:`parse`."""

    description: str = ""
    rank: int = 3
    rank_share: float = 0.05
    seasonal: tuple[Seasonal, ...] = ()
    ar_order: int = 1
    ar_factors: int = 1
    own_ar: bool = True
    noise: Literal["normal", "student_t"] = "normal"
    noise_df: float = 4.0
    transform: Literal["none", "log", "log1p"] = "none"
    standardise: bool = True
    priors: Priors = field(default_factory=Priors)
    fixed: Fixed = field(default_factory=Fixed)

    def to_dict(self) -> dict:
        """The spec as a JSON-ready dict (for provenance attributes)."""
        return dataclasses.asdict(self)


def parse(data: dict, source: str = "<dict>") -> ModelSpec:
    """Validate a spec given as a dict (the parsed TOML) and build the :class:`ModelSpec`.

    Raises
    ------
    SpecError
        Unknown key, wrong type or value out of range; the message names the key.
    """
    data = dict(data)
    base = data.pop("base", None)
    if base is not None:
        if base not in PRESETS:
            raise SpecError(f"{source}: base = {base!r} is not a preset; use one of "
                            + ", ".join(repr(p) for p in PRESETS))
        data = _merge(_preset_dict(base), data)
    tables = {"seasonal", "priors", "fixed"}
    _reject_unknown(data, set(TOP_KEYS) | tables | {"base"}, "", source)
    top = {name: _value(data, name, key, "", source) for name, key in TOP_KEYS.items()}

    seasonal_in = data.get("seasonal", [])
    if not isinstance(seasonal_in, list) or not all(isinstance(s, dict) for s in seasonal_in):
        raise SpecError(f"{source}: 'seasonal' must be a list of tables ([[seasonal]] entries "
                        "with period and harmonics)")
    seasonal = tuple(_seasonal(s, f"seasonal[{i}].", source) for i, s in enumerate(seasonal_in))
    priors = Priors(**_table(data, "priors", PRIOR_KEYS, source))
    fixed = Fixed(**_table(data, "fixed", FIXED_KEYS, source))
    return ModelSpec(seasonal=seasonal, priors=priors, fixed=fixed, **top)


def load(path: str | Path) -> ModelSpec:
    """Read and validate a spec TOML file.

    Raises
    ------
    SpecError
        The file is missing, is not valid TOML, or fails validation.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise SpecError(f"cannot read model spec {str(path)!r}: {exc.strerror}") from exc
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise SpecError(f"{path}: not valid TOML: {exc}") from exc
    return parse(data, source=str(path))


def preset(name: str) -> ModelSpec:
    """The named preset (``"half-hourly"``, ``"hourly"``, ``"daily"`` or ``"monthly"``)."""
    return parse(_preset_dict(name), source=f"preset {name!r}")


def preset_for(panel: xr.Dataset) -> tuple[ModelSpec, str]:
    """Choose a preset from the Panel's step and return it with its name.

    Steps up to 30 minutes get ``half-hourly``, up to 2 hours ``hourly``, up
    to 2 days ``daily``, longer ones ``monthly``.
    """
    step = step_of(panel)
    for limit, name in ((pd.Timedelta("30min"), "half-hourly"), (pd.Timedelta("2h"), "hourly"),
                        (pd.Timedelta("2D"), "daily")):
        if step <= limit:
            return preset(name), name
    return preset("monthly"), "monthly"


def check_against(spec: ModelSpec, panel: xr.Dataset) -> None:
    """Check that a spec can be fitted to this Panel.

    Raises
    ------
    SpecError
        A seasonal period is longer than the data or too short for its
        harmonics, or the transform does not suit the observed values.
    """
    step = step_of(panel)
    n_time = panel.sizes["time"]
    for i, season in enumerate(spec.seasonal):
        steps = season.steps(step)
        if steps > n_time:
            raise SpecError(
                f"seasonal[{i}].period = {season.period!r} is {steps:g} steps of "
                f"{panel.attrs['step']} but the data span only {n_time} steps; remove this "
                "seasonal entry or fit a longer record"
            )
        if 2 * season.harmonics >= steps:
            raise SpecError(
                f"seasonal[{i}].harmonics = {season.harmonics} is too many for a period of "
                f"{steps:g} steps; use fewer than {steps / 2:g}"
            )
    floor = {"log": 0.0, "log1p": -1.0}.get(spec.transform)
    if floor is None:
        return
    values = panel["value"].values
    bad = np.nanmin(np.where(np.isnan(values), np.inf, values), axis=1) <= floor
    if bad.any():
        names = ", ".join(repr(str(s)) for s in panel["series"].values[bad][:5])
        raise SpecError(
            f"transform = {spec.transform!r} needs values above {floor:g}, but series {names} "
            "have values at or below it; use transform = 'log1p' or 'none', or fix the data"
        )


def _preset_dict(name: str) -> dict:
    if name not in PRESETS:
        raise SpecError(f"no preset named {name!r}; use one of "
                        + ", ".join(repr(p) for p in PRESETS))
    filename = f"{name}.toml"
    try:
        text = resources.files("gapband.presets").joinpath(filename).read_text(encoding="utf-8")
    except (ModuleNotFoundError, FileNotFoundError):
        # Running from a source tree (PYTHONPATH=src) without an install: the
        # presets sit in models/ at the repository top.
        text = (Path(__file__).resolve().parents[2] / "models" / filename).read_text("utf-8")
    return tomllib.loads(text)


def _merge(base: dict, override: dict) -> dict:
    merged = dict(base)
    for name, value in override.items():
        if name in ("priors", "fixed") and isinstance(value, dict):
            merged[name] = {**base.get(name, {}), **value}
        else:
            merged[name] = value
    return merged


def _reject_unknown(data: dict, known: set[str], prefix: str, source: str) -> None:
    unknown = sorted(set(data) - known)
    if unknown:
        raise SpecError(
            f"{source}: unknown key {prefix + unknown[0]!r}; allowed keys"
            f"{' in ' + prefix.rstrip('.') if prefix else ''}: {', '.join(sorted(known))}"
        )


def _table(data: dict, name: str, keys: dict[str, Key], source: str) -> dict:
    table = data.get(name, {})
    if not isinstance(table, dict):
        raise SpecError(f"{source}: {name!r} must be a table ([{name}])")
    _reject_unknown(table, set(keys), f"{name}.", source)
    return {k: _value(table, k, key, f"{name}.", source) for k, key in keys.items()}


def _seasonal(entry: dict, prefix: str, source: str) -> Seasonal:
    _reject_unknown(entry, set(SEASONAL_KEYS), prefix, source)
    if "period" not in entry:
        raise SpecError(f"{source}: {prefix}period is required "
                        f"({SEASONAL_KEYS['period'].help})")
    values = {k: _value(entry, k, key, prefix, source) for k, key in SEASONAL_KEYS.items()}
    return Seasonal(**values)


def _value(table: dict, name: str, key: Key, prefix: str, source: str) -> Any:
    if name not in table:
        return key.default
    value = table[name]
    where = f"{source}: {prefix}{name} = {value!r}"
    # bool is an int subclass in Python; a TOML true must not pass as 1.
    ok_type = isinstance(value, key.types) and not (
        isinstance(value, bool) and bool not in key.types
    )
    if isinstance(value, int) and not isinstance(value, bool) and float in key.types:
        ok_type, value = True, value if int in key.types else float(value)
    if not ok_type:
        raise SpecError(f"{where} has the wrong type; {prefix}{name} ({key.help}) must be "
                        f"{key.allowed()}")
    if key.choices and value not in key.choices:
        raise SpecError(f"{where} is not allowed; {prefix}{name} must be {key.allowed()}")
    number = _as_number(value, key, where)
    if number is not None and not _in_range(number, key):
        raise SpecError(f"{where} is out of range; {prefix}{name} ({key.help}) must be "
                        f"{key.allowed()}")
    return value


def _as_number(value: Any, key: Key, where: str) -> float | None:
    if isinstance(value, bool):
        return None
    if isinstance(value, int | float):
        return float(value)
    if isinstance(value, str) and key.low is not None:
        # A string where a number is also allowed is a duration. Only its
        # validity is checked here: its length in steps depends on the Panel.
        try:
            duration = pd.Timedelta(value)
        except ValueError as exc:
            raise SpecError(f"{where} is not a duration; write e.g. '1D', '7D', "
                            "'365.25D' or '12h'") from exc
        if duration <= pd.Timedelta(0) or not any(c.isalpha() for c in value):
            raise SpecError(f"{where} is not a positive duration with a unit; write e.g. "
                            "'1D', '7D', '365.25D' or '12h'")
    return None


def _in_range(number: float, key: Key) -> bool:
    if key.low is not None and (number <= key.low if key.low_open else number < key.low):
        return False
    return key.high is None or number <= key.high
