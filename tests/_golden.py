"""Answers of the command line on the session's demo store, for the regression test
that keeps find / verify / tag answers equal across refactors (tests/test_golden.py).

The answers are the CLI's JSON (its stable contract, DESIGN.md) with run-specific
entries (store paths, written times) removed. The file in tests/data was written once
by :func:`capture` and is regenerated only on purpose, when a change of answers is
intended and explained in the same commit.
"""

from __future__ import annotations

import contextlib
import io
import json
from pathlib import Path

#: (name, CLI arguments after ``find --store STORE``): dates of the 4-year demo (2001-2004).
FIND_QUERIES = [
    ("summer_default", ["--date", "2003-07-02"]),
    ("spring_settings", ["--date", "2002-04-20", "--top", "10", "--window", "30",
                         "--exclude", "5", "--separation", "2"]),
    ("point_kinds_weights", ["--date", "2004-06-15", "--region", "38,-95,150",
                             "--kind", "tornado,hail", "--weights", "inverse_distance"]),
    ("regime_filter", ["--date", "2003-08-20", "--regime", "other", "--top", "8"]),
    ("sequence", ["--date", "2002-09-10", "--sequence", "2", "--top", "12"]),
    ("winter", ["--date", "2004-01-15", "--window", "20"]),
]
VERIFY_QUERIES = [
    ("default", []),
    ("season_kind", ["--season", "5-9", "--kind", "hail", "--top", "15", "--modes", "10"]),
]
#: Keys whose values name this run's files or clock, not the answer ("command" holds the
#: store path).
_RUN_KEYS = {"store", "written", "source", "path", "command"}


def _strip(value):
    if isinstance(value, dict):
        return {k: _strip(v) for k, v in value.items() if k not in _RUN_KEYS}
    if isinstance(value, list):
        return [_strip(v) for v in value]
    return value


def run_cli(argv) -> str:
    from analogs.cli import main
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        status = main([str(a) for a in argv])
    if status != 0:
        raise AssertionError(f"analogs {' '.join(map(str, argv))} exited {status}")
    return out.getvalue()


def answers(store_path, field_path, work_dir) -> dict:
    """Every answer of the regression set, as plain JSON values."""
    work_dir = Path(work_dir)
    result = {"find": {}, "verify": {}}
    for name, extra in FIND_QUERIES:
        text = run_cli(["find", "--store", store_path, *extra, "--json"])
        result["find"][name] = _strip(json.loads(text))
    text = run_cli(["find", "--store", store_path, "--field", field_path, "--json"])
    result["find"]["field"] = _strip(json.loads(text))
    for name, extra in VERIFY_QUERIES:
        text = run_cli(["verify", "--store", store_path, *extra, "--json", "--quiet"])
        result["verify"][name] = _strip(json.loads(text))
    tags = work_dir / "golden_tags.csv"
    run_cli(["tag", "--store", store_path, "--out", tags])
    result["tags_csv"] = tags.read_text().splitlines()
    return result


def capture(store_path, field_path, work_dir, out_file) -> None:
    data = answers(store_path, field_path, work_dir)
    Path(out_file).write_text(json.dumps(data, indent=1, sort_keys=True) + "\n")
