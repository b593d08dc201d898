"""No code from data: nothing in gapband unpickles, evaluates or executes what it reads.

The source is scanned as syntax trees (not text, so a docstring saying
"picklable" does not count), and reading a fill folder back is run with
every unpickler disabled.
"""

from __future__ import annotations

import ast
import marshal
import pickle
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import gapband
from gapband import filling, outputs
from gapband.panel import make_panel

ROOT = Path(gapband.__file__).resolve().parent
DEMO = ROOT.parents[1] / "demo"
#: Modules that turn bytes into objects or code.
UNSAFE_MODULES = {"pickle", "cPickle", "_pickle", "marshal", "shelve", "dill", "cloudpickle",
                  "joblib", "yaml", "jsonpickle"}
#: Built-ins that run text as code.
UNSAFE_BUILTINS = {"eval", "exec", "compile", "__import__"}
#: Methods that unpickle or evaluate text (pandas.read_pickle, DataFrame.eval/query, ...).
UNSAFE_METHODS = {"read_pickle", "to_pickle", "eval", "query", "load_pickle", "loads_pickle"}


def _sources() -> list[Path]:
    files = sorted(ROOT.rglob("*.py")) + sorted(DEMO.glob("*.py"))
    assert len(files) > 10, files  # the scan looks where the code is
    return files


def _findings(path: Path) -> list[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    found = []
    for node in ast.walk(tree):
        where = f"{path.name}:{getattr(node, 'lineno', '?')}"
        if isinstance(node, ast.Import):
            found += [f"{where} import {a.name}" for a in node.names
                      if a.name.split(".")[0] in UNSAFE_MODULES]
        elif isinstance(node, ast.ImportFrom) and node.module:
            if node.module.split(".")[0] in UNSAFE_MODULES:
                found.append(f"{where} from {node.module} import")
        elif isinstance(node, ast.Call):
            func = node.func
            if isinstance(func, ast.Name) and func.id in UNSAFE_BUILTINS:
                found.append(f"{where} {func.id}()")
            elif isinstance(func, ast.Attribute) and func.attr in UNSAFE_METHODS:
                found.append(f"{where} .{func.attr}()")
            found += [f"{where} allow_pickle=True" for k in node.keywords
                      if k.arg == "allow_pickle" and not (
                          isinstance(k.value, ast.Constant) and k.value.value is False)]
    return found


def test_the_scan_finds_what_it_looks_for(tmp_path):
    sample = tmp_path / "sample.py"
    sample.write_text("import pickle\nfrom yaml import load\nx = eval('1')\n"
                      "import numpy as np\nnp.load('a.npy', allow_pickle=True)\n"
                      "import pandas as pd\npd.read_pickle('f')\n", encoding="utf-8")
    assert len(_findings(sample)) == 5


@pytest.mark.parametrize("path", _sources(), ids=lambda p: p.name)
def test_no_unpickling_evaluation_or_execution_in_the_source(path):
    assert _findings(path) == []


def test_reading_a_fill_back_uses_netcdf_and_json_only(tmp_path, monkeypatch):
    rng = np.random.default_rng(4)
    values = 3 + np.sin(np.arange(48) / 4)[None, :] + rng.normal(0, 0.1, (2, 48))
    values[0, 10:14] = np.nan
    panel = make_panel(values, ["a", "b"], pd.date_range("2024-01-01", periods=48, freq="h"),
                       "h", source="tiny.csv")
    result, summary = filling.fill(panel, options=filling.FillOptions(
        draws=20, tune=10, progress=False, keep_draws=10))
    filling.write_fill(result, summary, tmp_path)

    def refuse(*args, **kwargs):
        raise AssertionError("an unpickler ran while reading a fill")

    for module, name in ((pickle, "load"), (pickle, "loads"), (pickle, "Unpickler"),
                         (marshal, "load"), (marshal, "loads")):
        monkeypatch.setattr(module, name, refuse)
    loaded, loaded_summary = outputs.open_fill(tmp_path)
    assert loaded_summary["seed"] == summary["seed"]
    np.testing.assert_array_equal(loaded["filled"].values, result["filled"].values)
