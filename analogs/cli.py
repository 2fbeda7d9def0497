"""Command line: a thin layer over :mod:`analogs.api`.

Every option comes from the one parameter table (:mod:`analogs.parameters`): its flag,
type, default, units and help are defined there once, and the values parsed here are
checked against the same table before the API is called, so a bad value is refused
with one line that names the option ("--window must be an integer >= 0 and <= 183.
Got -5 instead."). Building the parser imports nothing heavy; each command imports
what it needs when it runs.

Exit status: 0 done; 2 bad input or usage (one line on stderr, no traceback);
1 an unexpected internal error.
"""

from __future__ import annotations

import argparse
import contextlib
import sys
import traceback
import warnings
from pathlib import Path

from analogs import CAUTION, __version__
from analogs._validation import ParameterError
from analogs.errors import AnalogsInputError
from analogs.parameters import DISTANCE, P

EPILOG = f"{CAUTION}"


class _OneLineParser(argparse.ArgumentParser):
    """Usage errors as one line (and exit status 2), pointing to --help."""

    def error(self, message):
        self.exit(2, f"{self.prog}: error: {message} (see {self.prog} --help)\n")


def _command(commands, name, *, help, description, handler, options, exclusive=()):
    """Add the subcommand ``name`` with ``options`` (table entries), each added once.

    ``exclusive`` lists (required, entries) groups of mutually exclusive options.
    """
    parser = commands.add_parser(name, help=help, description=description, epilog=EPILOG)
    grouped = {}
    for required, members in exclusive:
        group = parser.add_mutually_exclusive_group(required=required)
        grouped.update({member.key: group for member in members})
    for option in options:
        target = grouped.get(option.key, parser)
        target.add_argument(*option.flags, **option.argparse_kwargs())
    parser.set_defaults(handler=handler, options=tuple(options))
    return parser


def build_parser() -> argparse.ArgumentParser:
    parser = _OneLineParser(
        prog="analogs",
        description="What did days like this do? Closest past days of 500 hPa height and "
                    "low-level moisture from a gridded archive, their weather regimes and the "
                    "severe-weather reports tied to them.",
        epilog=EPILOG)
    parser.add_argument("--version", action="version", version=f"analogs {__version__}")
    commands = parser.add_subparsers(dest="command", metavar="COMMAND", required=True,
                                     parser_class=_OneLineParser)
    _command(commands, "demo", handler=_cmd_demo,
             help="make a synthetic archive, build a store, tag it, run a query, write a report",
             description="Make the synthetic demo archive and its events, build a store, tag "
                         "every day, run one query and write an HTML report; then print the "
                         "demo's point region and the best skill its reports allow (an upper "
                         "bound by construction, far above what real archives give).",
             options=(P.demo_out, P.years, P.seed, P.replace, P.quiet))
    _command(commands, "build", handler=_cmd_build,
             help="build a store from archive files",
             description="Read a gridded archive (NetCDF or Zarr; any CF-ish convention), fit "
                         "the climatology and EOFs, index every day and write the store.",
             options=(P.files, P.store, P.events, P.event_dates, P.events_period, P.n_modes,
                      P.variance, P.fields, P.region, P.land_mask,
                      P.domain, P.hour, P.daily, P.solver, P.chunk_days, P.scratch, P.scheduler,
                      P.index,
                      P.n_harmonics, P.quiet),
             exclusive=((False, (P.n_modes, P.variance)),))
    _command(commands, "find", handler=_cmd_find,
             help="closest past days to a date or a forecast field",
             description="Find the closest archive days to a target day or forecast field, "
                         "with the regime of each and what they produced. The distance of "
                         f"two days is {DISTANCE}; with --metric event_weighted (the "
                         "default) those vectors are first scaled toward the event "
                         "forecast, so the distances are in that weighted space.",
             options=(P.store, P.date, P.dates, P.field, P.time, P.top, P.window,
                      P.separation, P.region, P.exclude, P.regime, P.kinds, P.sequence,
                      P.metric, P.weights, P.json, P.json_lines, P.report, P.maps,
                      P.skip_skill_hindcast),
             exclusive=((True, (P.date, P.dates, P.field)), (False, (P.json, P.json_lines))))
    _command(commands, "verify", handler=_cmd_verify,
             help="cross-validated skill of the store's analog probabilities",
             description="Leave-one-year-out hindcast: every archive day is forecast from "
                         "analogs in the other years; P(at least one event in the region) is "
                         "scored against what happened, the season climatology and random "
                         "analogs.",
             options=(P.store, P.top, P.query_modes, P.window, P.separation, P.region,
                      P.months, P.kinds, P.regime, P.sequence, P.weights, P.exclude,
                      P.metric, P.threshold, P.tune, P.save, P.json, P.quiet))
    _command(commands, "update", handler=_cmd_update,
             help="append new days to a store without a rebuild",
             description="Append new days (for example yesterday's analysis), projected on "
                         "the store's climatology and EOFs. Days already in the store are "
                         "skipped; files on another grid are regridded as find --field "
                         "fields are (at most 10 % of the store grid uncovered), files with "
                         "other fields are refused. Days appended without their reports "
                         "have none yet: they are left out of outcome statistics until "
                         "--events merges their reports (by date: only the days the new "
                         "table covers are replaced; the counts before and after are "
                         "printed).",
             options=(P.files, P.store, P.events, P.event_dates, P.events_period, P.quiet))
    _command(commands, "climatology", handler=_cmd_climatology,
             help="seasonal regime briefing for training: tables, maps, report",
             description="How often each regime occurs by month and year (with trend and its "
                         "significance), what each brings (report probabilities and counts by "
                         "month), composite maps, persistence and typical days; tables (CSV, "
                         "Parquet), composites (CF NetCDF), figures (PNG) and DIR/index.html.",
             options=(P.store, P.briefing_out, P.months, P.archive, P.quiet))
    _command(commands, "tag", handler=_cmd_tag,
             help="regime and diagnostics of every archive day",
             description="Write one row per archive day: date, regime, confidence, then the "
                         "physical diagnostics behind it.",
             options=(P.store, P.tag_out, P.rules, P.kmeans, P.train, P.tag_save, P.quiet))
    return parser


def _check_options(args) -> None:
    """Check (and parse) every parsed value against its table entry, in place.

    Comma-separated lists become lists, --season a tuple of months, --domain a tuple
    of four numbers; a region is parsed here only to refuse a bad one early.
    """
    for option in args.options:
        value = option.check(getattr(args, option.dest))
        if option is P.region and value is not None:
            from analogs.stages.outcomes import Region
            Region.parse(value)  # its complaint is named for --region by main
        if option.output and value is not None:  # never inside a store (issue 13)
            from analogs.workflows.paths import check_output
            check_output(value, option.flag, None, kind=option.output)
        setattr(args, option.dest, value)


def _named_for_the_command_line(error: ParameterError, args) -> ParameterError:
    """A complaint of the API about one of its parameters, naming the option that fed it.

    Checks that need the store or the data (a region without grid points, more modes
    than the store holds, a regime label it does not know) are made by the API.
    """
    for option in args.options:
        if option.name == error.name and option.flags:
            return error.renamed(option.flag)
    return error


@contextlib.contextmanager
def _collected_warnings():
    """Collect the command's warnings, each to be shown as one 'analogs: warning:' line.

    They are printed when the command ends normally; when it stops on bad input, only the
    error line is printed, so a refusal is always one clear line.
    """
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("default")
        yield caught


def _print_warnings(caught) -> None:
    seen = set()
    for item in caught:
        text = " ".join(str(item.message).split())
        if text not in seen:
            seen.add(text)
            print(f"analogs: warning: {text}", file=sys.stderr)


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        _check_options(args)
        with _collected_warnings() as caught:
            status = int(args.handler(args) or 0)
        _print_warnings(caught)
        return status
    except AnalogsInputError as error:
        if isinstance(error, ParameterError):
            error = _named_for_the_command_line(error, args)
        print(f"analogs {args.command}: error: {' '.join(str(error).split())}", file=sys.stderr)
        return 2
    except (FileNotFoundError, IsADirectoryError, PermissionError) as error:
        print(f"analogs {args.command}: error: {error.strerror}: {error.filename}", file=sys.stderr)
        return 2
    except BrokenPipeError:  # the reader (e.g. `head`) closed the pipe: not an error
        sys.stderr.close()
        return 0
    except KeyboardInterrupt:
        print("analogs: interrupted", file=sys.stderr)
        return 130
    except Exception:  # an internal error: show it, so it can be reported
        traceback.print_exc()
        print(f"analogs {args.command}: internal error (exit 1); please report it", file=sys.stderr)
        return 1


def _cmd_build(args) -> int:
    from analogs.api import build_store
    if args.scheduler and not args.chunk_days:
        raise AnalogsInputError("--scheduler distributes chunked work: pass --chunk-days too")
    if args.scratch and not args.chunk_days:
        raise AnalogsInputError("--scratch holds the out-of-core build's scratch files: "
                                "pass --chunk-days too")
    store = build_store(args.files, args.store, fields=args.fields, n_modes=args.modes,
                        variance=args.variance, region=args.region, domain=args.domain,
                        hour=args.hour, daily=args.daily, solver=args.solver,
                        n_harmonics=args.harmonics, index=args.index, progress=not args.quiet,
                        chunks={"time": args.chunk_days} if args.chunk_days else None,
                        scheduler=args.scheduler, scratch=args.scratch,
                        events=args.events, event_dates=args.event_dates,
                        events_period=args.events_period, land_mask=args.land_mask)
    config = store.manifest["config"]
    print(f"built store {store.path}: {len(store.times)} days "
          f"{store.days[0].date()} to {store.days[-1].date()}, fields {', '.join(config['fields'])}, "
          f"{config['n_modes']} EOF modes explaining "
          f"{100 * float(store.eof.variance_fraction_.sum()):.1f}% of the variance")
    return 0


def _cmd_find(args) -> int:
    from analogs.api import AnalogStore
    from analogs.workflows.find import find
    if args.time and args.field is None:
        raise AnalogsInputError("--time applies to --field only")
    several_times = _several_times(args)
    if several_times and args.maps:
        raise AnalogsInputError(f"--maps writes one file: with --time {args.time} (several "
                                "valid times) choose one valid time for the maps")
    if args.dates is not None and (args.maps or args.report):
        raise AnalogsInputError(f"--{'maps' if args.maps else 'report'} draws one target: "
                                "with --dates, ask for one date with --date")
    if args.field or args.maps or args.report:  # xarray objects, none of dask or pint
        from analogs._duck_arrays import defer_duck_array_imports
        defer_duck_array_imports()
    store = AnalogStore.load(args.store)
    if args.dates is not None:
        return _print_many(store.find_many(
            args.dates, top=args.top, window=args.window, exclude=args.exclude,
            separation=args.separation, region=args.region, regime=args.regime,
            weights=args.weights, sequence=args.sequence, kinds=args.kind,
            metric=args.metric, skip_skill_hindcast=args.skip_skill_hindcast), args)
    result = find(store, date=args.date, field=args.field, time=args.time, top=args.top,
                  window=args.window, exclude=args.exclude, separation=args.separation,
                  region=args.region, regime=args.regime, weights=args.weights,
                  sequence=args.sequence, kinds=args.kind, metric=args.metric,
                  skip_skill_hindcast=args.skip_skill_hindcast)
    if several_times:  # one answer per valid time (a ValidTimesResult)
        return _print_valid_times(store, result, args)
    if not (args.maps or args.report):
        return _print_find(result, args)
    from analogs.workflows import files
    from analogs.workflows.find import outcome_maps
    from analogs.workflows.page import report_page
    drawn = args.report and store.events is not None
    maps = outcome_maps(store, result) if args.maps or drawn else None
    if args.maps:
        files.write_maps(maps, args.maps)
    if args.report:
        # The figures reuse the query's arrays: the target's regridded fields and the maps.
        files.write_text(Path(args.report) / "index.html",
                         report_page(store, result, maps=maps))
    return _print_find(result, args)


def _several_times(args) -> bool:
    """Whether --time asks for several valid times of a --field (the readers, and xarray
    with them, are imported only for a field)."""
    if args.field is None or args.time is None:
        return False
    from analogs.stages.sources import several_times
    return several_times(args.time)


def _print_find(result, args) -> int:
    """A find result (one target, an ensemble or several valid times) as JSON or text."""
    from analogs.presentation.report import dumps, find_text
    if args.json_lines:  # one line per valid time, or the one answer
        for one in getattr(result, "results", (result,)):
            print(dumps(one.to_dict(), indent=None))
    elif args.json:
        print(dumps(result.to_dict()))
    else:
        print(find_text(result))
        if args.report:
            print(f"\nreport: {Path(args.report) / 'index.html'}")
    return 0


def _print_many(results, args) -> int:
    """The answers of find --dates: a JSON array (--json), one JSON object a line
    (--json-lines) or one table after another."""
    from analogs.presentation.report import dumps, find_text
    if args.json_lines:
        for result in results:
            print(dumps(result.to_dict(), indent=None))
    elif args.json:
        print(dumps([result.to_dict() for result in results]))
    else:
        print("\n\n".join(find_text(result) for result in results))
    return 0


def _print_valid_times(store, result, args) -> int:
    """find with several valid times: the table (or JSON) and, with --report, one page
    per valid time under DIR plus DIR/index.html linking them."""
    from analogs.presentation.report import valid_times_html
    from analogs.workflows import files
    from analogs.workflows.find import outcome_maps
    from analogs.workflows.page import report_page
    if args.report:
        links = []
        for one in result.results:
            name = "valid_" + one.target["valid_time"].replace("-", "").replace(":", "")[:13]
            maps = outcome_maps(store, one) if store.events is not None else None
            files.write_text(Path(args.report) / name / "index.html",
                             report_page(store, one, maps=maps))
            links.append(f"{name}/index.html")
        files.write_text(Path(args.report) / "index.html",
                         valid_times_html(result, store.manifest, links))
    return _print_find(result, args)


def _cmd_verify(args) -> int:
    from analogs.api import AnalogStore
    from analogs.presentation.report import dumps, verify_text
    from analogs.workflows.skill import TUNED_METRIC
    if args.save and not args.tune:
        raise AnalogsInputError("--save records the result of --tune; pass both")
    narrowed = [flag for flag, value in (("--regime", args.regime),
                                         ("--sequence", args.sequence),
                                         ("--weights", args.weights != P.weights.default),
                                         ("--exclude", args.exclude is not None),
                                         ("--metric", args.metric not in (None, TUNED_METRIC)))
                if value]
    if args.tune and narrowed:
        raise AnalogsInputError(f"--tune scans the plain analogs; run it without "
                                f"{', '.join(narrowed)}")
    store = AnalogStore.load(args.store)
    tuning = None
    if args.tune:
        from analogs.workflows.skill import nested_tune
        # The chosen setting is scored on folds that did not choose it; saved only then.
        tuning = nested_tune(store, window=args.window, separation=args.separation,
                             region=args.region, months=args.season, kinds=args.kind,
                             progress=not args.quiet)
        if args.save:  # the metric tuned (plain) is recorded with its setting
            store = store.save_query_defaults(**tuning["best"])
        args.top, args.modes = tuning["best"]["top"], tuning["best"]["n_modes"]
        args.metric = tuning["best"]["metric"]
    summary = store.verify(top=args.top, window=args.window, separation=args.separation,
                           n_modes=args.modes, region=args.region, months=args.season,
                           threshold=args.threshold, kinds=args.kind, metric=args.metric,
                           regime=args.regime, sequence=args.sequence, weights=args.weights,
                           exclude=(P.exclude.default if args.exclude is None
                                    else args.exclude),
                           progress=not args.quiet)
    if tuning is not None:
        summary["tuning"] = tuning
    print(dumps(summary) if args.json else verify_text(summary))
    return 0


def _cmd_update(args) -> int:
    from analogs.workflows.update import update_store
    store = update_store(args.store, args.files, events=args.events,
                         event_dates=args.event_dates, events_period=args.events_period,
                         progress=not args.quiet)
    summary = store.last_update
    print(f"store {args.store}: {summary['days_added']} days added, "
          f"{summary['days_already_present']} already present; "
          f"{len(store.times)} days {store.days[0].date()} to {store.days[-1].date()}")
    merge = summary.get("events")
    if merge is not None:
        if merge["first_day"] is None:
            print(f"events: {args.events} covers no day (no reports, no --events-period); "
                  f"{merge['before']} events kept as they were")
        else:
            print(f"events merged by date: {merge['before']} before; on the convective days "
                  f"{merge['first_day']} to {merge['last_day']}, {merge['replaced']} replaced "
                  f"by {merge['added']}; {merge['after']} after"
                  + (f" ({merge['n_outside_grid']} outside the grid left out)"
                     if merge["n_outside_grid"] else ""))
    if store.events is not None:
        missing = summary["days_without_reports"]
        print(f"report coverage: {summary['days_covered']} of {len(store.times)} days"
              + (f"; {missing} {'day has' if missing == 1 else 'days have'} no reports yet "
                 "(left out of outcome statistics until update --events covers them)"
                 if missing else ""))
    return 0


def _cmd_climatology(args) -> int:
    from analogs.api import AnalogStore
    from analogs.workflows.briefing import build_briefing
    store = AnalogStore.load(args.store)
    written = build_briefing(store, args.out, months=args.season, files=args.archive,
                             progress=not args.quiet)
    print(f"seasonal briefing of {store.path} written to {args.out} "
          f"({len(written)} files); report: {written['index.html']}")
    return 0


def _cmd_tag(args) -> int:
    from analogs.api import AnalogStore
    from analogs.workflows.tagging import retag_store
    out = Path(args.out)  # a .csv or .parquet name (checked with the option table)
    reclassified = bool(args.rules or args.kmeans is not None or args.train)
    if args.save and not reclassified:
        raise AnalogsInputError("--save keeps the tags of --rules, --kmeans or --train in the "
                                "store; pass one of them")
    training = None
    if reclassified and args.save:  # the store's tags are replaced (issue 13: on request)
        store = retag_store(args.store, rules=args.rules, kmeans=args.kmeans,
                            labelled_days=args.train, progress=not args.quiet)
        training = store.last_retag
    elif reclassified:  # the store is left as it was; the new tags go to --out only
        import copy

        from analogs.workflows.tagging import classify_store
        store = AnalogStore.load(args.store)
        classified = classify_store(store, rules=args.rules, kmeans=args.kmeans,
                                    labelled_days=args.train)
        store, training = copy.copy(store), classified["training"]
        store.tags = classified["tags"]  # a view for the table written to --out
    else:
        store = AnalogStore.load(args.store)
    if store.tags is None:
        raise AnalogsInputError(f"store {args.store} has no tags; rebuild it with analogs build")
    from analogs.workflows.tagging import tag_file_sidecar, write_tags
    metadata = write_tags(store, out)  # units and the diagnostic region in the file's metadata
    counts = store.tags["regime"].value_counts()
    print(f"tagged {len(store.tags)} days -> {out}: "
          + ", ".join(f"{label} {n}" for label, n in counts.items()))
    print("regimes diagnosed over the " + metadata["diagnostic_region"]["description"])
    print("units of every column: " + (f"{tag_file_sidecar(out)}" if out.suffix.lower() == ".csv"
                                       else "the Parquet file's metadata (pandas attrs)"))
    if training is not None:
        from analogs.presentation.report import training_text
        print(training_text(training))
    if reclassified:
        print(f"store {args.store}: tags replaced by these (and learned models kept)"
              if args.save else f"store {args.store} left as it was: the new tags are in "
              f"{out} only (pass --save to keep them in the store)")
    return 0


def _cmd_demo(args) -> int:
    import time

    from analogs.presentation.report import find_text
    from analogs.workflows.demo import run_demo, skill_notes
    started = time.perf_counter()
    demo = run_demo(args.out, years=args.years, seed=args.seed, replace=args.replace,
                    progress=not args.quiet)
    store, paths = demo["store"], demo["paths"]
    print(find_text(demo["result"]))
    print()
    print(f"demo written to {args.out} in {time.perf_counter() - started:.0f} s:")
    print(f"  archive     {paths['archive']} ({len(demo['files'])} files), events {paths['events']}")
    print(f"  store       {paths['store']} ({len(store.times)} days, {store.eof.n_modes_} EOF modes)")
    print(f"  tags        {paths['tags']}")
    print(f"  report      {paths['report']}")
    print(f"  try also    analogs find --store {paths['store']} --field {paths['forecast_field']} "
          f"--time {demo['target'].date()}T12:00")
    point = demo["metadata"]["point_region"]
    print(f"  point       analogs find --store {paths['store']} --date {demo['target'].date()} "
          f"--region {point['option']}   ({point['town']}, {point['radius_km']:g} km)")
    print(f"  skill       analogs verify --store {paths['store']} [--region {point['option']}]")
    print()
    print("\n".join(skill_notes(demo["metadata"])))
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
