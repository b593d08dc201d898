"""Interrupted fills leave the previous outputs or a complete new set, never a partial file.

``gapband fill`` runs in a subprocess and gets SIGINT or SIGTERM during the
fit or during the summaries and writes; the output folder is then checked
file by file. ``tests/benchmarks/interrupt_runs.py`` repeats this many times.
"""

from __future__ import annotations

import json
import os
import random
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from gapband import cli, outputs
from gapband.errors import Interrupted

OUTPUTS = ("filled.csv", "filled.nc", "summary.json")
SERIES, STEPS = ("north", "east", "south"), 96
TINY_SPEC = 'base = "hourly"\nrank = 1\n\n[[seasonal]]\nperiod = "1D"\nharmonics = 2\n'
#: Log lines of ``gapband fill`` that open each phase (filling.fit_panel, filling.fill).
PHASE_MARKERS = {"fit": "model:", "write": "fit done"}


def write_inputs(folder: Path) -> tuple[Path, Path]:
    """A small station CSV (3 series × 96 hours, random gaps) and a one-factor spec."""
    rng = np.random.default_rng(1)
    hours = np.arange(STEPS)
    times = pd.date_range("2024-03-01", periods=STEPS, freq="h")
    rows = []
    for i, name in enumerate(SERIES):
        values = 20 + (i + 2) * np.sin(2 * np.pi * hours / 24) + rng.normal(0, 0.4, STEPS)
        values[rng.choice(STEPS, 12, replace=False)] = np.nan
        rows += [(t.isoformat(), name, "" if np.isnan(v) else repr(float(v)))
                 for t, v in zip(times, values, strict=True)]
    csv_path = folder / "stations.csv"
    pd.DataFrame(rows, columns=["time", "station", "value"]).to_csv(csv_path, index=False)
    spec_path = folder / "tiny.toml"
    spec_path.write_text(TINY_SPEC, encoding="utf-8")
    return csv_path, spec_path


def fill_command(csv_path: Path, spec_path: Path, out: Path) -> list[str]:
    return [sys.executable, "-m", "gapband.cli", "fill", str(csv_path), "--out", str(out),
            "--model", str(spec_path), "--draws", "60", "--tune", "60", "--keep-draws", "50",
            "--quiet", "--overwrite"]


def interrupted_run(command: list[str], signum: int, phase: str,
                    delay: float) -> tuple[int, str, str]:
    """Start the fill, wait for ``phase`` to begin plus ``delay`` s, send ``signum``.

    Returns the exit code, stdout and stderr.
    """
    proc = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    seen = []
    for line in proc.stderr:
        seen.append(line)
        if PHASE_MARKERS[phase] in line:
            break
    time.sleep(delay)
    proc.send_signal(signum)
    stdout, rest = proc.communicate(timeout=300)
    return proc.returncode, stdout, "".join(seen) + rest


def check_exit(code: int, stdout: str, stderr: str, signum: int) -> list[str]:
    """Problems with how the run ended: it must finish (0) or stop cleanly (128 + signum).

    A signal landing while the interpreter shuts down, after the run has
    finished and said so, meets Python's default handler (exit -signum).
    """
    name = signal.Signals(signum).name
    if code == 0 or (code == -signum and stdout.count("wrote ") == len(OUTPUTS)):
        return []
    if code == 128 + signum and f"interrupted: stopped by {name}" in stderr \
            and "Traceback" not in stderr:
        return []
    return [f"exit {code}: {stderr[-300:]}"]


def snapshot(out: Path) -> dict[str, int]:
    """Inode of each output present: a replaced file gets a new one."""
    return {name: (out / name).stat().st_ino for name in OUTPUTS if (out / name).exists()}


def check_folder(out: Path, before: dict[str, int]) -> dict[str, list[str]]:
    """Problems in ``out`` after a run: truncated files, temporaries left, a mixed set."""
    problems: dict[str, list[str]] = {"truncated": [], "temporary": [], "mixed": []}
    names = sorted(p.name for p in out.iterdir())
    problems["temporary"] = [n for n in names if ".tmp-" in n]
    for name in OUTPUTS:
        if (out / name).exists() and not complete(out / name):
            problems["truncated"].append(name)
    after = snapshot(out)
    kept = {n for n in after if before.get(n) == after[n]}
    if after and (set(after) != set(OUTPUTS) or kept not in (set(), set(OUTPUTS))):
        problems["mixed"].append(f"present {sorted(after)}, unchanged {sorted(kept)}")
    return problems


def complete(path: Path) -> bool:
    """True when an output file reads whole, with every cell of the Panel."""
    try:
        if path.suffix == ".nc":
            with xr.open_dataset(path, engine="h5netcdf") as ds:
                ds.load()
                return ds["fill_flag"].shape == (len(SERIES), STEPS)
        if path.suffix == ".csv":
            table = pd.read_csv(path)
            return len(table) == len(SERIES) * STEPS and list(table.columns)[-1] == "reason"
        return "flags" in json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError, KeyError):
        return False


@pytest.fixture(scope="module")
def inputs(tmp_path_factory):
    folder = tmp_path_factory.mktemp("interrupt")
    csv_path, spec_path = write_inputs(folder)
    previous = folder / "previous"
    subprocess.run(fill_command(csv_path, spec_path, previous), check=True, capture_output=True,
                   timeout=300)
    return csv_path, spec_path, previous


@pytest.mark.parametrize(("signum", "phase"), [(signal.SIGTERM, "fit"),
                                               (signal.SIGINT, "write"),
                                               (signal.SIGTERM, "write")])
def test_interrupted_fill_leaves_previous_outputs_or_a_whole_new_set(inputs, tmp_path, signum,
                                                                      phase):
    csv_path, spec_path, previous = inputs
    out = tmp_path / "out"
    if phase == "write":  # previous outputs to protect
        shutil.copytree(previous, out)
    before = snapshot(out)
    code, stdout, stderr = interrupted_run(fill_command(csv_path, spec_path, out), signum, phase,
                                           random.uniform(0.0, 0.8))
    assert check_exit(code, stdout, stderr, signum) == []
    assert check_folder(out, before) == {"truncated": [], "temporary": [], "mixed": []}


def test_signal_during_the_writes_keeps_the_previous_set(tmp_path, monkeypatch):
    # The same path in-process, with the signal arriving at a known point:
    # after filled.nc and filled.csv are written, before summary.json is.
    for name in OUTPUTS:
        (tmp_path / name).write_text(f"previous {name}\n")
    from gapband import filling

    def interrupted_json(obj, path):
        os.kill(os.getpid(), signal.SIGTERM)
        raise AssertionError("the signal should have stopped the write")

    monkeypatch.setattr(outputs, "write_netcdf", lambda result, path: Path(path).write_text("n"))
    monkeypatch.setattr(outputs, "write_table",
                        lambda result, path, *rest: Path(path).write_text("t"))
    monkeypatch.setattr(outputs, "write_json", interrupted_json)
    previous = signal.signal(signal.SIGTERM, cli._interrupt)
    try:
        with pytest.raises(Interrupted, match="stopped by SIGTERM"):
            filling.write_fill(xr.Dataset(), {}, tmp_path, overwrite=True)
    finally:
        signal.signal(signal.SIGTERM, previous)
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(OUTPUTS)
    for name in OUTPUTS:
        assert (tmp_path / name).read_text() == f"previous {name}\n"


def test_signal_during_the_renames_is_delivered_after_all_of_them(tmp_path, monkeypatch):
    targets = [tmp_path / name for name in OUTPUTS]
    real_replace = os.replace

    def replace_then_signal(src, dst):
        real_replace(src, dst)
        os.kill(os.getpid(), signal.SIGTERM)  # arrives between two renames

    monkeypatch.setattr(os, "replace", replace_then_signal)
    previous = signal.signal(signal.SIGTERM, cli._interrupt)
    try:
        with pytest.raises(Interrupted, match="SIGTERM"), outputs.atomic_paths(targets) as tmps:
            for tmp in tmps:
                tmp.write_text("new")
    finally:
        signal.signal(signal.SIGTERM, previous)
    assert [t.read_text() for t in targets] == ["new"] * len(targets)
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(OUTPUTS)
