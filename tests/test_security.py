"""Security: no code-executing deserialisation or evaluation in the package, and commands
write only where they are told.

Pickle (and joblib, dill, cloudpickle, which build on it) runs code while loading
(Python docs, ``pickle`` module warning); ``numpy.load(allow_pickle=True)`` and
``yaml.load`` without a safe loader do the same (numpy and PyYAML docs); ``eval`` and
``exec`` run text as code. The scan reads the syntax tree (``ast``), so comments and
docstrings that mention these names do not count.
"""

from __future__ import annotations

import ast
import os
from pathlib import Path

import pytest

import _reliability_helpers as rh
from analogs.cli import main

ROOT = Path(__file__).resolve().parents[1]
PACKAGES = ("analogs", "reanalysis_demo")
FORBIDDEN_MODULES = {"pickle", "cPickle", "_pickle", "joblib", "dill", "cloudpickle", "shelve",
                     "marshal"}


def _findings(source: str, name: str) -> list[str]:
    """Unsafe constructs in one Python source text, as 'file:line what' strings."""
    found = []
    for node in ast.walk(ast.parse(source, filename=name)):
        if isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.split(".")[0] in FORBIDDEN_MODULES:
                    found.append(f"{name}:{node.lineno} import {alias.name}")
        elif isinstance(node, ast.ImportFrom):
            if (node.module or "").split(".")[0] in FORBIDDEN_MODULES:
                found.append(f"{name}:{node.lineno} from {node.module} import")
        elif isinstance(node, ast.Call):
            func = node.func
            called = func.id if isinstance(func, ast.Name) else (
                func.attr if isinstance(func, ast.Attribute) else "")
            owner = func.value.id if isinstance(func, ast.Attribute) and isinstance(
                func.value, ast.Name) else ""
            keywords = {k.arg: k.value for k in node.keywords}
            if called in ("eval", "exec") and isinstance(func, ast.Name):
                found.append(f"{name}:{node.lineno} {called}(")
            if called in ("read_pickle", "to_pickle"):
                found.append(f"{name}:{node.lineno} {called}(")
            allow = keywords.get("allow_pickle")
            if allow is not None and not (isinstance(allow, ast.Constant) and allow.value is False):
                found.append(f"{name}:{node.lineno} allow_pickle not False")
            if called == "load" and owner in ("np", "numpy") and allow is None:
                found.append(f"{name}:{node.lineno} numpy.load without allow_pickle=False")
            if called in ("load", "load_all") and owner == "yaml":
                loader = keywords.get("Loader")
                loader_name = getattr(loader, "attr", getattr(loader, "id", ""))
                if loader_name not in ("SafeLoader", "CSafeLoader"):
                    found.append(f"{name}:{node.lineno} yaml.{called} without SafeLoader")
    return found


def _package_sources():
    files = sorted(p for package in PACKAGES for p in (ROOT / package).rglob("*.py"))
    assert len(files) > 10, files
    return files


def test_package_has_no_unsafe_deserialisation_or_eval():
    found = []
    for path in _package_sources():
        found += _findings(path.read_text(encoding="utf-8"), str(path.relative_to(ROOT)))
    assert found == []


@pytest.mark.parametrize("snippet, what", [
    ("import pickle", "import pickle"),
    ("from joblib import dump", "from joblib import"),
    ("import cloudpickle as cp", "import cloudpickle"),
    ("import numpy as np\nnp.load('a.npy', allow_pickle=True)", "allow_pickle not False"),
    ("import numpy as np\nnp.load('a.npy')", "numpy.load without allow_pickle=False"),
    ("import yaml\nyaml.load(text)", "yaml.load without SafeLoader"),
    ("import yaml\nyaml.load(text, Loader=yaml.FullLoader)", "yaml.load without SafeLoader"),
    ("eval('1 + 1')", "eval("),
    ("exec('x = 1')", "exec("),
    ("import pandas as pd\npd.read_pickle('f')", "read_pickle("),
], ids=["pickle", "joblib", "cloudpickle", "allow_pickle", "np-load-default", "yaml-load",
        "yaml-fullloader", "eval", "exec", "read_pickle"])
def test_scanner_catches_each_unsafe_construct(snippet, what):
    """The scan is only worth its pass if it flags each construct it looks for."""
    assert any(what in finding for finding in _findings(snippet, "snippet.py"))


def test_scanner_accepts_safe_forms():
    safe = ("import numpy as np\nimport yaml\nnp.load('a.npy', allow_pickle=False)\n"
            "yaml.load(text, Loader=yaml.SafeLoader)\nyaml.safe_load(text)\n"
            "# import pickle\n'''eval(x)'''\nmodel.eval()\n")
    assert _findings(safe, "safe.py") == []


# --------------------------------------------------------------------------- output paths

def _listing(*roots):
    """Every path under ``roots`` with its size, to compare before and after a command."""
    entries = {}
    for root in roots:
        for dirpath, dirnames, filenames in os.walk(root):
            for name in dirnames + filenames:
                path = os.path.join(dirpath, name)
                entries[path] = os.path.getsize(path) if os.path.isfile(path) else -1
    return entries


@pytest.fixture(scope="module")
def shared(tmp_path_factory):
    return rh.shared_store(rh.session_root(tmp_path_factory))


@pytest.mark.parametrize("command, outputs", [
    # The CSV carries its column units in a CSVW sidecar (W3C, from memory) beside it.
    (["tag", "--out", "out/tags.csv"], {"out/tags.csv", "out/tags.csv-metadata.json"}),
    (["tag", "--out", "out/tags.parquet"], {"out/tags.parquet"}),
    (["find", "--date", rh.QUERY_DATE, "--report", "out/report"],
     {"out/report", "out/report/index.html"}),
    (["find", "--date", rh.QUERY_DATE, "--maps", "out/maps.nc"], {"out/maps.nc"}),
], ids=["tag-csv", "tag-parquet", "find-report", "find-maps"])
def test_commands_write_only_their_outputs(command, outputs, shared, tmp_path, monkeypatch, capsys):
    """Nothing is written outside the named output (no temporaries left, nothing beside
    the store or in the working directory); the store itself is not touched."""
    (tmp_path / "out").mkdir()
    monkeypatch.chdir(tmp_path)
    store = shared["store"]
    watched = (tmp_path, store.parent)
    before = _listing(*watched)
    store_bytes = rh.file_digests(store)
    code = main([command[0], "--store", str(store), *command[1:]])
    assert code == 0, capsys.readouterr().err
    after = _listing(*watched)
    created = {os.path.relpath(p, tmp_path) for p in set(after) - set(before)}
    assert created == outputs
    assert {p: s for p, s in after.items() if p in before} == before
    assert rh.file_digests(store) == store_bytes
