"""The build's tagging thread: the regime tags are computed beside the index check and the
skill hindcast (``workflows.build._beside``). The reference is the sequential order the
build had before (tags first, then the hindcast): the same store, and the same error when
either part fails (the design of the test; no outside source), with no thread left over.
"""

from __future__ import annotations

import contextlib
import threading
from concurrent.futures import Future

import numpy as np
import pandas as pd
import pytest

import reanalysis_demo
from analogs.errors import AnalogsInputError
from analogs.stages.outcomes import Region
from analogs.workflows import build


@contextlib.contextmanager
def _sequentially(work, *args, **kwargs):
    """The build's former order: ``work`` done to the end before the block runs."""
    future = Future()
    try:
        future.set_result(work(*args, **kwargs))
    except Exception as error:  # raised by result(), after the block, as _beside does
        future.set_exception(error)
        raise
    yield future


def _build(demo_dir, demo_files, name):
    from analogs.api import build_store

    return build_store(demo_files, demo_dir / name, events=demo_dir / "events.csv",
                       region=Region.box(*reanalysis_demo.CENTRAL_REGION), progress=False)


def _build_threads():
    return [t for t in threading.enumerate() if t.name.startswith("analogs-build")]


def test_concurrent_build_equals_sequential(demo_store, demo_dir, demo_files, monkeypatch):
    """The store built with tagging in its thread (the session's demo store) equals one
    built in the former sequential order: manifest entries, tags, skill, PCs."""
    monkeypatch.setattr(build, "_beside", _sequentially)
    sequential = _build(demo_dir, demo_files, "store_sequential")
    pd.testing.assert_frame_equal(demo_store.tags, sequential.tags)
    np.testing.assert_array_equal(demo_store.pcs.values, sequential.pcs.values)
    assert demo_store.manifest["skill"] is not None
    for entry in ("config", "archive", "events", "skill", "index", "land_mask",
                  "query_defaults"):
        assert demo_store.manifest.get(entry) == sequential.manifest.get(entry), entry
    assert not _build_threads()


def _failing(message):
    def fail(*args, **kwargs):
        raise AnalogsInputError(message)
    return fail


@pytest.mark.parametrize("tagging_fails, skill_fails, expected", [
    (True, False, "tagging failed"),
    (False, True, "skill failed"),
    (True, True, "tagging failed"),  # the sequential order met the tagging's error first
])
def test_an_error_in_either_part_is_raised_and_the_thread_ends(
        demo_dir, demo_files, monkeypatch, tagging_fails, skill_fails, expected):
    from analogs.stages import regimes

    if tagging_fails:
        monkeypatch.setattr(regimes, "tag_days", _failing("tagging failed"))
    if skill_fails:
        monkeypatch.setattr(build, "measured_skill", _failing("skill failed"))
    with pytest.raises(AnalogsInputError, match=expected):
        _build(demo_dir, demo_files, "store_failing")
    assert not _build_threads()
    assert not (demo_dir / "store_failing").exists()


def test_a_tagging_error_exits_2_from_the_command_line(demo_dir, demo_files, monkeypatch,
                                                       capsys):
    from analogs.cli import main
    from analogs.stages import regimes

    monkeypatch.setattr(regimes, "tag_days", _failing("tagging failed"))
    status = main(["build", *map(str, demo_files), "--store", str(demo_dir / "store_cli"),
                   "--events", str(demo_dir / "events.csv"), "--quiet"])
    assert status == 2
    err = capsys.readouterr().err
    assert "error: tagging failed" in err and "Traceback" not in err
    assert not _build_threads()


def test_short_switch_interval_is_restored_after_the_last_user():
    """The switch interval is shortened while any thread's block needs it and restored,
    to what it was, when the last such block ends (two overlapping blocks in two
    threads; the design of the build, no outside source)."""
    import sys

    before = sys.getswitchinterval()
    first_in, second_out = threading.Event(), threading.Event()
    seen = {}

    def other():
        with build._short_switch_interval():
            first_in.wait()
        seen["after_other"] = sys.getswitchinterval()
        second_out.set()

    thread = threading.Thread(target=other)
    thread.start()
    with build._short_switch_interval():
        first_in.set()
        second_out.wait()
        seen["inside"] = sys.getswitchinterval()
    thread.join()
    # the interpreter keeps the interval in microseconds
    assert seen["inside"] == seen["after_other"] == pytest.approx(
        build._SWITCH_INTERVAL_BESIDE_READS, abs=1e-6)
    assert sys.getswitchinterval() == before


@pytest.mark.parametrize("fork", [True, False])
def test_in_memory_build_imports_the_regression_while_reading(demo_dir, demo_files,
                                                              monkeypatch, fork):
    """In memory, scikit-learn's import runs while open_archive reads the values: the
    context the build hands it is entered once every file is recognised and left after
    the last field is read (out of core it runs beside the EOF fit instead). Where the
    files are recognised in a forked child (sources._looks_in_child), it is entered
    once the first file is recognised, while the child looks at the others: the caller
    then recognises only the files the child leaves to it (here the first file of the
    second field, read in full)."""
    from analogs import _forked
    from analogs.stages import sources

    order = []
    recognised, read_field = sources._recognised_in, sources._read_field

    def noting(name, work):
        def noted(*args, **kwargs):
            order.append(name)
            return work(*args, **kwargs)
        return noted

    @contextlib.contextmanager
    def imported_beside(module):
        order.append(f"enter {module}")
        yield
        order.append("leave")

    monkeypatch.setattr(sources, "_recognised_in", noting("recognise", recognised))
    monkeypatch.setattr(sources, "_read_field", noting("read", read_field))
    monkeypatch.setattr(build, "sklearn_not_imported", lambda: True)
    monkeypatch.setattr(build, "_imported_beside", imported_beside)
    if not fork:
        monkeypatch.setattr(_forked, "can_fork", lambda: False)
    assert len(demo_files) >= sources.MIN_FILES_LOOKED_IN_CHILD
    _build(demo_dir, demo_files, "store_import_beside")
    entered, first_read = order.index("enter sklearn.linear_model"), order.index("read")
    if fork and _forked.can_fork():
        assert order[:first_read] == ["recognise", "enter sklearn.linear_model", "recognise"]
    else:
        assert order[:first_read] == ["recognise"] * len(demo_files) + [order[entered]]
    assert order[first_read:] == ["read", "read", "leave"]
