"""analogs._duck_arrays: xarray's dask / pint checks deferred until those libraries are
imported. The reference is xarray itself: the same script run in a fresh process with
and without the deferred checks must print the same (dask chunks, a masked dask array's
values, a pint quantity kept as data and its magnitudes, the repr of a dask-backed
DataArray)."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]

#: Exercises every use xarray makes of its dask and pint records.
SCRIPT = """
import sys
import numpy as np
{install}
import xarray as xr
plain = xr.DataArray(np.arange(3.0), dims="x")
print(float(plain.sum()), plain.to_numpy().tolist())
print("before", "dask.array" in sys.modules, "pint" in sys.modules, "dask" in sys.modules)
import dask.array as da
import pint
print(xr.DataArray(da.ones(4, chunks=2), dims="x").chunks)
masked = da.from_array(np.ma.masked_array([1.0, 2.0, 3.0], mask=[0, 1, 0]), chunks=2)
print(xr.Variable("x", masked).values.tolist())
print(repr(xr.DataArray(da.zeros((2, 2), chunks=1), dims=("y", "x"))))
quantity = xr.DataArray(pint.UnitRegistry().Quantity(np.ones(2), "m"), dims="x")
print(type(quantity.data).__name__, quantity.to_numpy().tolist())
from xarray.namedarray.pycompat import mod_version
print(mod_version("dask"), mod_version("pint"))
"""


def _run(install: str) -> list[str]:
    out = subprocess.run([sys.executable, "-c", SCRIPT.format(install=install)],
                         capture_output=True, text=True, check=True,
                         env={**os.environ, "PYTHONPATH": str(ROOT)})
    return out.stdout.splitlines()


def test_deferred_checks_answer_as_xarray_does_and_import_nothing_early():
    deferred = _run("from analogs._duck_arrays import defer_duck_array_imports; "
                    "print(defer_duck_array_imports())")
    plain = _run("")
    assert deferred[0] == "True"
    assert deferred[2] == "before False False False"  # numpy-only work imported none
    assert plain[1] == "before True True True"  # xarray's own records import them
    assert deferred[3:] == plain[2:]
    assert deferred[1] == plain[0]


#: Objects asked about before dask is imported, then compared with dask's own answers.
COLLECTIONS = """
import sys
import numpy as np
import pandas as pd
from analogs._duck_arrays import defer_duck_array_imports
import xarray as xr
defer_duck_array_imports()
from xarray.namedarray.utils import is_dask_collection

class NotCallable:
    __dask_graph__ = None

objects = [np.arange(3), pd.Index([1, 2]), [1, 2], np.ndarray, NotCallable(),
           xr.DataArray(np.arange(3.0), dims="x")]
answers = [is_dask_collection(x) for x in objects[:-1]]
print("dask imported", "dask" in sys.modules)
answers.append(is_dask_collection(objects[-1]))  # has __dask_graph__: asks dask
import dask.array as da
from dask.base import is_dask_collection as dasks
objects.append(xr.DataArray(da.ones(4, chunks=2), dims="x"))
answers.append(is_dask_collection(objects[-1]))
print(answers == [dasks(x) for x in objects], answers)
"""


def test_dask_collections_answered_as_dask_does():
    """The deferred is_dask_collection answers numpy arrays, pandas indexes, lists, types
    and objects whose __dask_graph__ is not callable without importing dask, and every
    answer is dask.base.is_dask_collection's (the reference), for a numpy-backed and a
    dask-backed DataArray too."""
    out = subprocess.run([sys.executable, "-c", COLLECTIONS], capture_output=True,
                         text=True, check=True, env={**os.environ, "PYTHONPATH": str(ROOT)})
    lines = out.stdout.splitlines()
    assert lines[0] == "dask imported False"
    assert lines[1] == "True [False, False, False, False, False, False, True]"


def test_without_xarrays_record_nothing_changes(monkeypatch):
    """An xarray without the record (renamed or removed in a later version): the
    function says so and xarray keeps its own checks."""
    from xarray.namedarray import pycompat

    from analogs._duck_arrays import defer_duck_array_imports
    monkeypatch.delattr(pycompat, "_cached_duck_array_modules")
    assert defer_duck_array_imports() is False


def test_a_record_xarray_already_built_is_kept(monkeypatch):
    from xarray.namedarray import pycompat

    from analogs._duck_arrays import defer_duck_array_imports
    from xarray.namedarray import utils
    built = {name: pycompat.DuckArrayModule(name) for name in ("dask", "pint")}
    monkeypatch.setattr(pycompat, "_cached_duck_array_modules", dict(built))
    # (the deferred is_dask_collection the call puts in place is taken off afterwards)
    monkeypatch.setattr(utils, "is_dask_collection", utils.is_dask_collection)
    assert defer_duck_array_imports() is False
    assert pycompat._cached_duck_array_modules == built


@pytest.mark.parametrize("command", [["--report", "REPORT"], ["--json"]])
def test_find_report_imports_neither_library(demo_store, tmp_path, command):
    """`find --report` draws its maps without importing dask (dask.array and dask.base)
    or pint (about 0.7 s of CPU), and `find --json` still imports no xarray at all."""
    command = [str(tmp_path / "report") if part == "REPORT" else part for part in command]
    code = ("import sys; from analogs.cli import main; "
            f"main(['find', '--store', {str(demo_store.path)!r}, '--date', "
            f"{str(demo_store.days[400].date())!r}, *{command!r}]); "
            "print([m for m in ('xarray', 'dask', 'dask.array', 'pint') if m in sys.modules], "
            "file=sys.stderr)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True, env={**os.environ, "PYTHONPATH": str(ROOT),
                                          "MPLBACKEND": "Agg"})
    imported = out.stderr.strip().splitlines()[-1]
    assert imported == ("['xarray']" if "--report" in command else "[]")


#: xarray's scheduler answer in each case that decides its NetCDF write lock.
SCHEDULER_SCRIPT = """
import contextlib, sys
import dask
{install}
from xarray.backends import locks, writers
with probe():
    print(locks.get_dask_scheduler(), "distributed" in sys.modules)
    with dask.config.set(scheduler="processes"):
        print(writers.get_dask_scheduler())
    with dask.config.set(scheduler="synchronous"):
        print(locks.get_dask_scheduler())
    import distributed
    print(locks.get_dask_scheduler())
    with distributed.Client(processes=False, n_workers=1, threads_per_worker=1,
                            dashboard_address=None):
        print(locks.get_dask_scheduler(), writers.get_dask_scheduler())
print(locks.get_dask_scheduler is writers.get_dask_scheduler, locks.get_dask_scheduler.__module__)
"""


def test_deferred_scheduler_probe_answers_as_xarray_does():
    """The reference is xarray's own check, run in a fresh process: the same answer with
    no scheduler configured, with processes or synchronous configured, with distributed
    imported but no client and with a client; distributed is not imported to answer,
    and xarray's own check is back after the block."""
    pytest.importorskip("distributed")

    def run(install):
        out = subprocess.run([sys.executable, "-c", SCHEDULER_SCRIPT.format(install=install)],
                             capture_output=True, text=True, check=True,
                             env={**os.environ, "PYTHONPATH": str(ROOT)})
        return out.stdout.splitlines()

    deferred = run("from analogs._duck_arrays import scheduler_probe_without_distributed "
                   "as probe")
    plain = run("probe = contextlib.nullcontext")
    assert deferred[0] == "threaded False"
    assert plain[0] == "threaded True"  # xarray's own check imports distributed
    assert deferred[1:] == plain[1:]
    assert plain[1:] == ["multiprocessing", "threaded", "threaded",
                         "distributed distributed", "True xarray.backends.locks"]


#: The probe's answer with dask not yet imported, whether it imported dask, then xarray's.
UNIMPORTED_SCRIPT = """
import sys
from xarray.backends import locks
from analogs._duck_arrays import scheduler_probe_without_distributed
with scheduler_probe_without_distributed():
    print(locks.get_dask_scheduler(), "dask" in sys.modules)
print(locks.get_dask_scheduler())
"""


def _without_dask_settings(home, **settings):
    """The environment with no DASK_* variable but ``settings``, HOME at ``home``."""
    return {**{k: v for k, v in os.environ.items() if not k.startswith("DASK_")},
            "HOME": str(home), "PYTHONPATH": str(ROOT), **settings}


@pytest.mark.parametrize("setting", [None, "yaml processes", "yaml synchronous",
                                     "DASK_SCHEDULER=processes", "DASK_SCHEDULER=sync"])
def test_scheduler_probe_before_dask_is_imported(tmp_path, setting):
    """With dask not imported, the probe answers as xarray's own check (run after it in
    the same process, which imports dask and reads its configuration): without any
    configuration without importing dask, and with a scheduler set in a YAML file of
    dask's (~/.config/dask) or in its environment variable by importing dask to read it
    (dask's documented configuration sources: docs.dask.org, "Configuration")."""
    settings = {}
    if setting is not None and setting.startswith("yaml"):
        (tmp_path / ".config" / "dask").mkdir(parents=True)
        (tmp_path / ".config" / "dask" / "s.yaml").write_text(
            f"scheduler: {setting.split()[1]}\n")
    elif setting is not None:
        settings = dict([setting.split("=")])
    env = _without_dask_settings(tmp_path, **settings)
    probe = subprocess.run([sys.executable, "-c", "from analogs._duck_arrays import "
                            "_dask_configured; print(_dask_configured())"],
                           capture_output=True, text=True, check=True, env=env)
    configured = probe.stdout.strip() == "True"
    if setting is None and configured:
        pytest.skip("this installation configures dask itself")
    out = subprocess.run([sys.executable, "-c", UNIMPORTED_SCRIPT], capture_output=True,
                         text=True, check=True, env=env).stdout.splitlines()
    ours, imported = out[0].split()
    assert ours == out[1]
    assert imported == str(setting is not None)
    assert configured == (setting is not None)
    expected = {None: "threaded", "yaml processes": "multiprocessing",
                "yaml synchronous": "threaded", "DASK_SCHEDULER=processes": "multiprocessing",
                "DASK_SCHEDULER=sync": "threaded"}
    assert ours == expected[setting]


def test_dask_config_paths_are_dasks(tmp_path):
    """The YAML paths looked at are those dask reads on import (dask.config.paths)."""
    code = ("import dask.config; from analogs._duck_arrays import _dask_config_paths; "
            "print(sorted(dask.config.paths) == sorted(set(_dask_config_paths())))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True, env=_without_dask_settings(tmp_path))
    assert out.stdout.strip() == "True"


def test_store_writes_do_not_import_distributed(tmp_path):
    pytest.importorskip("distributed")
    code = ("import sys, numpy as np, xarray as xr; "
            "from analogs.workflows.files import write_netcdf; "
            f"write_netcdf(xr.Dataset({{'a': ('x', np.arange(3.0))}}), {str(tmp_path / 'a.nc')!r}); "
            "print('distributed' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True, env={**os.environ, "PYTHONPATH": str(ROOT)})
    assert out.stdout.strip() == "False"
    import xarray as xr
    assert xr.open_dataset(tmp_path / "a.nc")["a"].values.tolist() == [0.0, 1.0, 2.0]


def test_deferred_within_a_block_then_xarrays_own_again(monkeypatch):
    """duck_array_imports_deferred: the deferred records and check inside the block; on
    leaving it xarray's record (none: built again when next asked) and is_dask_collection
    are as before, an error in the block included."""
    from xarray.namedarray import pycompat, utils

    from analogs._duck_arrays import _deferred_record_class, duck_array_imports_deferred
    monkeypatch.setattr(pycompat, "_cached_duck_array_modules",
                        {"dask": pycompat.DuckArrayModule("dask")})
    monkeypatch.setattr(utils, "is_dask_collection", utils.is_dask_collection)
    before, own = dict(pycompat._cached_duck_array_modules), utils.is_dask_collection
    with pytest.raises(KeyError), duck_array_imports_deferred():
        cache = pycompat._cached_duck_array_modules
        assert cache["dask"] is before["dask"]  # xarray's record, built before, kept
        assert isinstance(cache["pint"], _deferred_record_class())
        assert getattr(utils.is_dask_collection, "deferred", False)
        raise KeyError("failed inside")
    assert pycompat._cached_duck_array_modules == before
    assert utils.is_dask_collection is own


BUILD = """
import sys
from xarray.namedarray import pycompat, utils
from analogs.api import build_store
own = utils.is_dask_collection
build_store({files!r}, {store!r}, progress=False)
print([m for m in ("dask", "dask.array", "pint") if m in sys.modules],
      sorted(set(pycompat._cached_duck_array_modules) & {{"dask", "pint"}}),
      utils.is_dask_collection is own)
"""


def test_an_in_memory_build_imports_neither_library(demo_files, tmp_path):
    """build_store in memory (two years of the demo, no events) imports neither
    dask.array nor pint (about 0.7 s of CPU; xarray's checks deferred within the build),
    nor dask itself (0.13 s; the store writes' scheduler check without dask configured),
    and leaves xarray's own records and check in place afterwards."""
    files = [str(p) for p in demo_files if p.name.endswith(("2001.nc", "2002.nc"))]
    assert len(files) == 4
    out = subprocess.run([sys.executable, "-c", BUILD.format(
        files=files, store=str(tmp_path / "store"))], capture_output=True, text=True,
        check=True, env=_without_dask_settings(tmp_path))
    assert out.stdout.strip().splitlines()[-1] == "[] [] True"
