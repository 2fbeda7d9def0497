"""The answers of find / verify / tag on the demo store stay what they were.

``tests/data/golden_demo_answers.json`` holds the CLI's JSON answers (its stable contract,
DESIGN.md) on the session's 4-year demo store, written by :func:`tests._golden.capture`
before the re-layering of the package. A refactor must give the same answers; a change of
answers that is intended (a bug fixed) regenerates the file in the same commit and says
why. Reference: the project's own earlier answers (regression), not an outside source.
"""

import json
import math
from pathlib import Path

import pytest

from analogs.workflows.demo import write_forecast_like_field
from analogs.stages.sources import open_archive
from _golden import answers

GOLDEN = Path(__file__).parent / "data" / "golden_demo_answers.json"


def _differences(expected, actual, where="", found=None, rel=1e-6, abs_=1e-9):
    """Paths at which two JSON values differ (floats compared within a tolerance)."""
    found = [] if found is None else found
    if isinstance(expected, dict) and isinstance(actual, dict):
        for key in sorted(set(expected) | set(actual)):
            if key not in expected or key not in actual:
                found.append(f"{where}/{key}: only in {'actual' if key in actual else 'expected'}")
            else:
                _differences(expected[key], actual[key], f"{where}/{key}", found, rel, abs_)
    elif isinstance(expected, list) and isinstance(actual, list):
        if len(expected) != len(actual):
            found.append(f"{where}: {len(expected)} items expected, {len(actual)} found")
        for i, (e, a) in enumerate(zip(expected, actual)):
            _differences(e, a, f"{where}[{i}]", found, rel, abs_)
    elif isinstance(expected, float) or isinstance(actual, float):
        if not (isinstance(actual, (int, float)) and isinstance(expected, (int, float))
                and math.isclose(expected, actual, rel_tol=rel, abs_tol=abs_)):
            found.append(f"{where}: expected {expected!r}, found {actual!r}")
    elif expected != actual:
        found.append(f"{where}: expected {expected!r}, found {actual!r}")
    return found


def _tag_rows(lines):
    """CSV lines of the tag file as lists of cells, numbers parsed."""
    rows = []
    for line in lines:
        cells = []
        for cell in line.split(","):
            try:
                cells.append(float(cell))
            except ValueError:
                cells.append(cell)
        rows.append(cells)
    return rows


@pytest.fixture(scope="module")
def current_answers(demo_store, demo_files, tmp_path_factory):
    work = tmp_path_factory.mktemp("golden")
    field = write_forecast_like_field(open_archive(demo_files, progress=False), "2003-07-02",
                                      work / "field.nc")
    return answers(demo_store.path, field, work)


def test_differences_finds_a_changed_probability():
    """The comparison itself can fail (guards against a vacuous regression test)."""
    expected = {"outcomes": {"p_any_event": 0.5, "kinds": ["hail"]}}
    changed = {"outcomes": {"p_any_event": 0.55, "kinds": ["hail"]}}
    assert _differences(expected, changed) == ["/outcomes/p_any_event: expected 0.5, found 0.55"]
    assert _differences(expected, expected) == []


@pytest.mark.parametrize("section", ["find", "verify"])
def test_answers_equal_the_recorded_ones(current_answers, section):
    golden = json.loads(GOLDEN.read_text())
    differences = _differences(golden[section], current_answers[section])
    assert not differences, "\n".join(differences[:40])


def test_tags_equal_the_recorded_ones(current_answers):
    golden = json.loads(GOLDEN.read_text())
    differences = _differences(_tag_rows(golden["tags_csv"]),
                               _tag_rows(current_answers["tags_csv"]))
    assert not differences, "\n".join(differences[:40])
