"""The one parameter table (analogs.parameters): the CLI built from it, the API's
defaults taken from it, and one error shape that names what the user called.

Reference: the project's own contract (DESIGN.md, "CLI contract"; README, "A tour of the
commands") and issue 12 ("One parameter table").
"""

from __future__ import annotations

import argparse
import inspect
import subprocess
import sys

import pytest

from analogs import CAUTION
from analogs.cli import build_parser, main
from analogs.errors import AnalogsInputError
from analogs.parameters import PARAMETERS, P

#: Commands and options of the CLI contract (DESIGN.md and the README's tour).
CONTRACT = {
    "demo": {"--out", "--years", "--seed"},
    "build": {"--store", "--events", "--modes", "--variance", "--region", "--fields",
              "--chunk-days", "--scheduler"},
    "find": {"--store", "--date", "--field", "--time", "--top", "--window", "--exclude",
             "--region", "--regime", "--sequence", "--json", "--report", "--maps"},
    "tag": {"--store", "--out", "--rules", "--kmeans", "--train"},
    "verify": {"--store", "--season", "--tune", "--save", "--json"},
    "climatology": {"--store", "--out", "--season", "--archive"},
    "update": {"--store"},
}


def _subparsers() -> dict[str, argparse.ArgumentParser]:
    parser = build_parser()
    action = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return dict(action.choices)


def _options(subparser):
    """(flag or dest, action) of every option and positional except --help."""
    for action in subparser._actions:
        if isinstance(action, argparse._HelpAction):
            continue
        yield (action.option_strings[0] if action.option_strings else action.dest), action


def _run(argv, capsys):
    try:
        code = main([str(a) for a in argv])
    except SystemExit as stop:
        code = stop.code
    captured = capsys.readouterr()
    return code, captured.out, captured.err


# ------------------------------------------------------------------ the parser

def test_the_commands_and_options_of_the_contract():
    subparsers = _subparsers()
    assert set(subparsers) == set(CONTRACT)
    for command, options in CONTRACT.items():
        flags = {flag for flag, _ in _options(subparsers[command])}
        assert options <= flags, (command, options - flags)


def test_every_option_comes_from_the_table_with_help_units_and_default():
    for command, subparser in _subparsers().items():
        for flag, action in _options(subparser):
            entries = [p for p in PARAMETERS.values() if p.flags and flag in (p.flag, p.dest)]
            assert entries, f"{command} {flag} is not in the parameter table"
            assert action.help and len(action.help) > 20, (command, flag)
            text = " ".join(action.help.split())
            assert "default" in text or "(required)" in text, (command, flag, text)
            if action.default not in (None, False):  # a value: the help states it
                assert f"default {action.default}" in text.replace("%%", "%"), (command, flag)
            entry = next(p for p in entries if p.help_text().replace("%", "%%") == action.help)
            if entry.units:
                assert entry.units in text, (command, flag)


def test_an_option_shared_by_commands_is_one_entry():
    """--top, --window, --separation, --region, --kind and --season are one definition
    each, whichever command shows them."""
    subparsers = _subparsers()
    for flag, commands in {"--top": ("find", "verify"), "--window": ("find", "verify"),
                           "--separation": ("find", "verify"),
                           "--region": ("find", "verify", "build"),
                           "--kind": ("find", "verify"),
                           "--season": ("verify", "climatology")}.items():
        actions = [dict(_options(subparsers[c]))[flag] for c in commands]
        assert len({(a.help, a.default, a.metavar, a.type) for a in actions}) == 1, flag
    for command, subparser in subparsers.items():
        options = subparser.get_default("options")
        assert len({p.key for p in options}) == len(options), command


def test_the_help_says_what_a_distance_is(capsys):
    code, out, _ = _run(["find", "--help"], capsys)
    assert code == 0
    help_text = " ".join(out.split())
    top = help_text[help_text.index("--top N "):]
    for words in ("Euclidean distance", "principal components", "sqrt cos lat",
                  "per-field-balanced", "kept EOF modes", "dimensionless", "smaller is closer"):
        assert words in top, words


@pytest.mark.parametrize("command", [None, *CONTRACT])
def test_every_help_carries_the_caution(command, capsys):
    code, out, _ = _run([command, "--help"] if command else ["--help"], capsys)
    assert code == 0
    assert " ".join(CAUTION.split()) in " ".join(out.split())


def test_building_the_parser_imports_nothing_heavy():
    code = ("import sys, analogs.cli; analogs.cli.build_parser(); "
            "print([m for m in ('numpy', 'pandas', 'xarray', 'faiss', 'scipy') "
            "if m in sys.modules])")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout
    assert out.strip() == "[]"


# ------------------------------------------------------------------ the checks

def test_one_message_shape_for_the_api_and_the_command_line():
    with pytest.raises(AnalogsInputError, match=r"^The 'window' parameter of find must be an "
                                                r"integer >= 0 and <= 183\. Got -5 instead\.$"):
        P.window.check(-5, "find")
    with pytest.raises(AnalogsInputError,
                       match=r"^--window must be an integer >= 0 and <= 183\. Got -5 instead\.$"):
        P.window.check(-5)
    with pytest.raises(AnalogsInputError, match=r"^--weights must be one of 'equal', "
                                                r"'inverse_distance', 'gaussian'\. Got 'x'"):
        P.weights.check("x")


@pytest.mark.parametrize("value, months", [
    ("5-9", (5, 6, 7, 8, 9)), ("11-2", (1, 2, 11, 12)), ("4,6-7", (4, 6, 7)),
    ([8, 6, 6], (6, 8)), (7, (7,)),
])
def test_months_are_parsed(value, months):
    assert P.months.check(value, "verify") == months


@pytest.mark.parametrize("value", ["13", "0-4", "May", "5-", "", [0], [5.5]])
def test_bad_months_are_refused(value):
    with pytest.raises(AnalogsInputError, match=r"^The 'months' parameter of verify must be "
                                                r"months 1-12"):
        P.months.check(value, "verify")


def test_lists_are_parsed_and_checked():
    assert P.kinds.check(" Tornado,hail,,tornado ") == ["tornado", "hail"]
    assert P.fields.check(["z500", "Q850"], "build_store") == ["z500", "q850"]
    with pytest.raises(AnalogsInputError, match=r"^--fields must be names among z500, q850, "
                                                r"td2m, pwat\. Got 't850' instead\.$"):
        P.fields.check("z500,t850")
    with pytest.raises(AnalogsInputError, match=r"^--kind must be at least one name"):
        P.kinds.check(" , ")


def test_a_bound_from_the_data_keeps_the_shape():
    with pytest.raises(AnalogsInputError, match=r"^The 'n_modes' parameter of verify must be "
                                                r"an integer >= 1 and <= 20\. Got 21 instead\.$"):
        P.query_modes.check(21, "verify", maximum=20)


# ------------------------------------------------------------------ the API's defaults

def _public_functions():
    from analogs.stages import hindcast, sources
    from analogs.workflows import analog_store, briefing, build, demo, find, skill, update
    return [
        (find.find, (P.date, P.field, P.time, P.top, P.window, P.exclude, P.separation,
                     P.region, P.regime, P.weights, P.confidence, P.sequence, P.kinds,
                     P.skip_skill_hindcast)),
        (skill.verify, (P.top, P.window, P.separation, P.query_modes, P.region, P.months,
                        P.threshold, P.n_resamples, P.kinds)),
        (skill.tune, (P.tops, P.scan_modes, P.window, P.separation, P.region, P.months,
                      P.kinds)),
        (build.build_store, (P.events, P.fields, P.n_modes, P.variance, P.region, P.domain,
                             P.hour, P.daily, P.n_harmonics, P.solver, P.index,
                             P.event_dates, P.events_period)),
        (update.update_store, (P.events, P.event_dates, P.events_period)),
        (demo.run_demo, (P.years, P.seed, P.replace)),
        (analog_store.AnalogStore.retag, (P.rules, P.kmeans, P.train)),
        (briefing.build_briefing, (P.months, P.archive)),
        (sources.open_archive, (P.hour, P.daily)),
        (hindcast.tune, (P.tops, P.scan_modes, P.window, P.separation)),
        (hindcast.score_hindcast, (P.threshold, P.n_resamples)),
    ]


def test_the_api_takes_its_defaults_from_the_table():
    for function, entries in _public_functions():
        signature = inspect.signature(function)
        for entry in entries:
            assert entry.name in signature.parameters, (function.__qualname__, entry.name)
            default = signature.parameters[entry.name].default
            assert default == entry.api_default, (function.__qualname__, entry.name, default)


def test_api_defaults_that_differ_are_resolved_as_the_help_says():
    """Where the signature holds None, the help says what None becomes."""
    for entry in PARAMETERS.values():
        if entry.api_default is None and entry.default is not None:
            assert str(entry.default) in entry.default_phrase(), entry.key


# ------------------------------------------------------------------ errors, end to end

@pytest.mark.parametrize("argv, line", [
    (["find", "--date", "2003-07-02", "--window", "-5"],
     "--window must be an integer >= 0 and <= 183. Got -5 instead."),
    (["find", "--date", "2003-07-02", "--top", "0"], "--top must be an integer >= 1. Got 0 instead."),
    (["find", "--date", "2003-07-02", "--sequence", "3"],
     "--sequence must be an integer >= 0 and <= 2. Got 3 instead."),
    (["find", "--date", "2003-07-02", "--weights", "heavy"],
     "--weights must be one of 'equal', 'inverse_distance', 'gaussian'. Got 'heavy' instead."),
    (["find", "--date", "2003-07-02", "--region", "50,40,0,10"],
     "--region must be a box S,N,W,E with -90 <= S < N <= 90. Got '50,40,0,10' instead."),
    (["verify", "--threshold", "1.5"],
     "--threshold must be a number >= 0.0 and <= 1.0. Got 1.5 instead."),
    (["verify", "--season", "13"],
     "--season must be months 1-12 as M-N or M,N,... (e.g. 5-9). Got '13' instead."),
    (["verify", "--modes", "0"], "--modes must be an integer >= 1. Got 0 instead."),
    (["climatology", "--out", "x", "--season", "0-3"],
     "--season must be months 1-12 as M-N or M,N,... (e.g. 5-9). Got '0-3' instead."),
    (["build", "a.nc", "--hour", "25"], "--hour must be an integer >= 0 and <= 23. Got 25 instead."),
    (["build", "a.nc", "--harmonics", "-1"], "--harmonics must be an integer >= 0. Got -1 instead."),
    (["build", "a.nc", "--chunk-days", "0"], "--chunk-days must be an integer >= 1. Got 0 instead."),
    (["build", "a.nc", "--index", "fancy"],
     "--index must be one of 'auto', 'flat', 'hnsw'. Got 'fancy' instead."),
    (["build", "a.nc", "--variance", "0"],
     "--variance must be a number > 0.0 and <= 1.0. Got 0.0 instead."),
    (["build", "a.nc", "--domain", "20,30,0"],
     "--domain must be four numbers S,N,W,E in degrees with -90 <= S < N <= 90 and W, E in "
     "[-180, 180]. Got '20,30,0' instead."),
    (["tag", "--out", "tags.txt"],
     "--out must be a file name ending in .csv or .parquet. Got 'tags.txt' instead."),
    (["tag", "--out", "tags.csv", "--kmeans", "1"], "--kmeans must be an integer >= 2. Got 1 instead."),
])
def test_a_bad_option_is_refused_before_the_store_is_read(argv, line, capsys, tmp_path):
    """Checked against the table before any work: the store named does not even exist."""
    command, rest = argv[0], argv[1:]
    store = ["--store", str(tmp_path / "no_store")]
    code, out, err = _run([command, *store, *rest] if command != "demo" else argv, capsys)
    assert code == 2
    assert err.splitlines() == [f"analogs {command}: error: {line}"]
    assert not (tmp_path / "no_store").exists()


@pytest.mark.parametrize("argv", [["demo", "--out", "{tmp}/d", "--years", "0"],
                                  ["demo", "--out", "{tmp}/d", "--seed", "-1"]])
def test_demo_options_are_checked_before_anything_is_written(argv, capsys, tmp_path):
    code, _, err = _run([a.format(tmp=tmp_path) for a in argv], capsys)
    assert code == 2 and len(err.splitlines()) == 1
    assert err.startswith(f"analogs demo: error: {argv[3]} must be an integer")
    assert not (tmp_path / "d").exists()


@pytest.mark.parametrize("argv, line", [
    (["find", "--date", "2003-07-02", "--region", "0,10,0,10"],
     "--region must be a region holding at least one grid point"),
    (["find", "--date", "2003-07-02", "--regime", "blizzard"],
     "--regime must be one of 'northwest_flow', 'other', 'strong_trough', 'tropical'. "
     "Got 'blizzard' instead."),
    (["verify", "--modes", "999", "--quiet"],
     "--modes must be an integer >= 1 and <= 20. Got 999 instead."),
    (["verify", "--kind", "hail,blizzard", "--quiet"],
     "--kind must be kinds of the events table ('hail', 'tornado', 'wind'). Got 'blizzard'"),
])
def test_a_check_that_needs_the_store_names_the_option(argv, line, demo_store, capsys):
    code, _, err = _run([argv[0], "--store", demo_store.path, *argv[1:]], capsys)
    assert code == 2, err
    assert len(err.splitlines()) == 1 and "Traceback" not in err
    assert err.startswith(f"analogs {argv[0]}: error: {line}"), err


def test_a_bad_value_through_the_api_names_the_public_function(demo_store, tmp_path):
    from analogs.api import build_store
    from analogs.workflows.demo import run_demo
    cases = [
        (lambda: demo_store.find(date="2003-07-02", window=-5),
         r"^The 'window' parameter of find must be an integer >= 0 and <= 183\. Got -5"),
        (lambda: demo_store.find(date="2003-07-02", top=0),
         r"^The 'top' parameter of find must be an integer >= 1\. Got 0 instead\.$"),
        (lambda: demo_store.find(date="2003-07-02", region="50,40,0,10"),
         r"^The 'region' parameter of find must be a box S,N,W,E"),
        (lambda: demo_store.find(date="2003-07-02", region="0,10,0,10"),
         r"^The 'region' parameter of find must be a region holding at least one grid point"),
        (lambda: demo_store.find(date="2003-07-02", regime="blizzard"),
         r"^The 'regime' parameter of find must be one of .* Got 'blizzard' instead\.$"),
        (lambda: demo_store.find(date="2003-07-02", kinds=["Tornado", "snow"]),
         r"^The 'kinds' parameter of find must be kinds of the events table .* Got 'snow'"),
        (lambda: demo_store.find(date="2003-07-02", sequence=5),
         r"^The 'sequence' parameter of find must be an integer >= 0 and <= 2\."),
        (lambda: demo_store.verify(threshold=1.5),
         r"^The 'threshold' parameter of verify must be a number >= 0\.0 and <= 1\.0\."),
        (lambda: demo_store.verify(n_modes=999),
         r"^The 'n_modes' parameter of verify must be an integer >= 1 and <= 20\. Got 999"),
        (lambda: demo_store.tune(window=200),
         r"^The 'window' parameter of tune must be an integer >= 0 and <= 183\."),
        (lambda: demo_store.retag(kmeans=1),
         r"^The 'kmeans' parameter of retag must be an integer >= 2\. Got 1 instead\.$"),
        (lambda: build_store(["a.nc"], tmp_path / "s", hour=25),
         r"^The 'hour' parameter of build_store must be an integer >= 0 and <= 23\."),
        (lambda: build_store(["a.nc"], tmp_path / "s", n_modes=5, variance=0.9),
         r"^The 'n_modes' and 'variance' parameters of build_store exclude each other"),
        (lambda: run_demo(tmp_path / "d", years=0),
         r"^The 'years' parameter of run_demo must be an integer >= 1 and <= 500\."),
    ]
    for call, message in cases:
        with pytest.raises(AnalogsInputError, match=message):
            call()
    assert not (tmp_path / "s").exists() and not (tmp_path / "d").exists()
