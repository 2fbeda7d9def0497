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


