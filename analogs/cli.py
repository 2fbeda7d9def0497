"""Command line: a thin layer over :mod:`analogs.api`.

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
from analogs.errors import AnalogsInputError

EPILOG = f"{CAUTION}"


class _OneLineParser(argparse.ArgumentParser):
    """Usage errors as one line (and exit status 2), pointing to --help."""

    def error(self, message):
        self.exit(2, f"{self.prog}: error: {message} (see {self.prog} --help)\n")


def _add_quiet(parser):
    parser.add_argument("--quiet", action="store_true", help="no progress bars")


def _add_query_options(parser):
    from analogs.stages.selection import DEFAULT_SEPARATION, DEFAULT_TOP, DEFAULT_WINDOW
    parser.add_argument("--top", type=int, metavar="N",
                        help="number of analogs to return (default: the store's tuned value, "
                             f"else {DEFAULT_TOP})")
    parser.add_argument("--window", type=int, default=DEFAULT_WINDOW, metavar="DAYS",
                        help="season window: only days within this many calendar days of the "
                             f"target's calendar day, any year (default {DEFAULT_WINDOW})")
    parser.add_argument("--separation", type=int, default=DEFAULT_SEPARATION, metavar="DAYS",
                        help="de-clustering: drop an analog within this many days of a better one "
                             f"(default {DEFAULT_SEPARATION}; 0 keeps all)")
    parser.add_argument("--region", metavar="S,N,W,E | LAT,LON,KM",
                        help="outcome region: a box in degrees (west/east negative for west) or a "
                             "point and radius in km (default: the store's region)")


def build_parser() -> argparse.ArgumentParser:
    from analogs.stages.selection import DEFAULT_EXCLUDE
    parser = _OneLineParser(
        prog="analogs",
        description="What did days like this do? Closest past days of 500 hPa height and "
                    "low-level moisture from a gridded archive, their weather regimes and the "
                    "severe-weather reports tied to them.",
        epilog=EPILOG)
    parser.add_argument("--version", action="version", version=f"analogs {__version__}")
    commands = parser.add_subparsers(dest="command", metavar="COMMAND", required=True,
                                     parser_class=_OneLineParser)

    demo = commands.add_parser(
        "demo", help="make a synthetic archive, build a store, tag it, run a query, write a report",
        description="Make the synthetic demo archive and its events, build a store, tag every "
                    "day, run one query and write an HTML report.", epilog=EPILOG)
    demo.add_argument("--out", required=True, type=Path, metavar="DIR",
                      help="output directory (archive/, events.csv, truth.csv, store/, report/)")
    demo.add_argument("--years", type=int, default=10, metavar="N",
                      help="years of daily fields to generate (default 10)")
    demo.add_argument("--seed", type=int, default=0, metavar="S", help="random seed (default 0)")
    _add_quiet(demo)
    demo.set_defaults(handler=_cmd_demo)

    build = commands.add_parser(
        "build", help="build a store from archive files",
        description="Read a gridded archive (NetCDF or Zarr; any CF-ish convention), fit the "
                    "climatology and EOFs, index every day and write the store.", epilog=EPILOG)
    build.add_argument("files", nargs="+", type=Path, metavar="FILE",
                       help="archive files: 500 hPa height and low-level moisture")
    build.add_argument("--store", required=True, type=Path, metavar="DIR", help="store directory to write")
    build.add_argument("--events", type=Path, metavar="EVENTS.csv",
                       help="events table (CSV or Parquet: time,lat,lon,kind[,magnitude])")
    modes = build.add_mutually_exclusive_group()
    modes.add_argument("--modes", type=int, metavar="K", help="number of EOF modes to keep (default 20)")
    modes.add_argument("--variance", type=float, metavar="F",
                       help="keep the fewest modes explaining this fraction of variance (0-1)")
    build.add_argument("--fields", metavar="LIST",
                       help="comma-separated fields to use, e.g. z500,q850 (default: all supported found)")
    build.add_argument("--region", metavar="S,N,W,E | LAT,LON,KM",
                       help="default region for outcome statistics and regime diagnostics "
                            "(default: whole domain)")
    build.add_argument("--domain", metavar="S,N,W,E", help="subset the archive grid to this box (degrees)")
    build.add_argument("--hour", type=int, default=12, metavar="H",
                       help="UTC hour of the daily value taken from sub-daily data (default 12)")
    build.add_argument("--daily", choices=("instant", "mean"), default="instant",
                       help="sub-daily data: the value at --hour, or the daily mean (default instant)")
    build.add_argument("--solver", choices=("auto", "exact", "randomized"), default="auto",
                       help="EOF solver (default auto: exact for small archives)")
    build.add_argument("--chunk-days", type=int, metavar="N",
                       help="read and process the archive out of core in chunks of N days "
                            "(dask); use for archives larger than memory (default: in memory)")
    build.add_argument("--scheduler", metavar="ADDRESS",
                       help="run the chunked work on a dask.distributed scheduler at ADDRESS "
                            "(tcp://host:8786), or 'local' for a local process cluster "
                            "(default: dask's threaded scheduler)")
    build.add_argument("--index", choices=("auto", "flat", "hnsw"), default="auto",
                       help="faiss index: exact flat search, approximate HNSW, or auto (HNSW above "
                            "500,000 days; its recall against exact search is measured and stored)")
    build.add_argument("--harmonics", type=int, default=3, metavar="N",
                       help="annual harmonics of the climatology (default 3)")
    _add_quiet(build)
    build.set_defaults(handler=_cmd_build)

    find = commands.add_parser(
        "find", help="closest past days to a date or a forecast field",
        description="Find the closest archive days to a target day or forecast field, with "
                    "the regime of each and what they produced.", epilog=EPILOG)
    find.add_argument("--store", required=True, type=Path, metavar="DIR")
    target = find.add_mutually_exclusive_group(required=True)
    target.add_argument("--date", metavar="YYYY-MM-DD", help="an archive day")
    target.add_argument("--field", type=Path, metavar="FILE",
                        help="a forecast or analysis field (NetCDF; any grid covering the store's)")
    find.add_argument("--time", metavar="ISO", help="valid time to take from --field")
    _add_query_options(find)
    find.add_argument("--exclude", type=int, metavar="DAYS",
                      help="exclude days within this many days of the target date "
                           f"(default {DEFAULT_EXCLUDE} for --date; nothing for --field)")
    find.add_argument("--regime", metavar="LABEL",
                      help="only analogs of this regime (northwest_flow, tropical, strong_trough, other)")
    find.add_argument("--kind", metavar="LIST",
                      help="count only these kinds of report, comma-separated (e.g. tornado,hail; "
                           "default all kinds)")
    find.add_argument("--sequence", type=int, default=0, choices=(0, 1, 2), metavar="DAYS",
                      help="also match the target's preceding 1 or 2 days (weights 0.5, 0.25), so "
                           "analogs share the pattern's evolution (default 0: the day alone); a "
                           "--field file must then hold those days too")
    find.add_argument("--weights", choices=("equal", "inverse_distance", "gaussian"), default="equal",
                      help="weights of the analogs in the outcome statistics (default equal)")
    find.add_argument("--json", action="store_true", help="print one JSON object instead of a table")
    find.add_argument("--report", type=Path, metavar="DIR", help="also write an HTML report to DIR/index.html")
    find.add_argument("--maps", type=Path, metavar="FILE.nc",
                      help="also write CF NetCDF maps of the analogs' reports: the fraction of "
                           "analogs with a report within 40 km of each grid point and a smoothed "
                           "report density (Gaussian, sigma 120 km)")
    find.set_defaults(handler=_cmd_find)

    verify = commands.add_parser(
        "verify", help="cross-validated skill of the store's analog probabilities",
        description="Leave-one-year-out hindcast: every archive day is forecast from analogs "
                    "in the other years; P(at least one event in the region) is scored against "
                    "what happened, the season climatology and random analogs.", epilog=EPILOG)
    verify.add_argument("--store", required=True, type=Path, metavar="DIR")
    verify.add_argument("--top", type=int, metavar="N",
                        help="number of analogs per forecast (default: the store's, else 20)")
    verify.add_argument("--modes", type=int, metavar="K", help="use only the leading K EOF modes")
    verify.add_argument("--window", type=int, default=45, metavar="DAYS",
                        help="season window half-width in calendar days (default 45)")
    verify.add_argument("--separation", type=int, default=3, metavar="DAYS",
                        help="de-clustering distance in days (default 3)")
    verify.add_argument("--region", metavar="S,N,W,E | LAT,LON,KM",
                        help="region of the event (default: the store's region)")
    verify.add_argument("--season", metavar="M-M", help="verify target days in these months only, e.g. 5-9")
    verify.add_argument("--kind", metavar="LIST",
                        help="the event is at least one report of these kinds (default any kind)")
    verify.add_argument("--threshold", type=float, default=0.3, metavar="P",
                        help="probability threshold of the yes/no scores (POD, FAR, ...; default 0.3)")
    verify.add_argument("--tune", action="store_true",
                        help="scan the number of analogs and of EOF modes; report the best by Brier skill score")
    verify.add_argument("--save", action="store_true",
                        help="with --tune: record the best settings in the store as query defaults")
    verify.add_argument("--json", action="store_true", help="print one JSON object")
    _add_quiet(verify)
    verify.set_defaults(handler=_cmd_verify)

    update = commands.add_parser(
        "update", help="append new days to a store without a rebuild",
        description="Append new days (for example yesterday's analysis), projected on the "
                    "store's climatology and EOFs. Days already in the store are skipped; files "
                    "on another grid or with other fields are refused.", epilog=EPILOG)
    update.add_argument("files", nargs="+", type=Path, metavar="FILE")
    update.add_argument("--store", required=True, type=Path, metavar="DIR")
    update.add_argument("--events", type=Path, metavar="EVENTS.csv",
                        help="replace the store's events table with this one")
    _add_quiet(update)
    update.set_defaults(handler=_cmd_update)

    climatology = commands.add_parser(
        "climatology", help="seasonal regime climatology for training: tables, maps, report",
        description="How often each regime occurs by month and year (with trend and its "
                    "significance), what each brings (report probabilities and counts by month), "
                    "composite maps, persistence and typical days; tables (CSV, Parquet), "
                    "composites (CF NetCDF), figures (PNG) and DIR/index.html.", epilog=EPILOG)
    climatology.add_argument("--store", required=True, type=Path, metavar="DIR")
    climatology.add_argument("--out", required=True, type=Path, metavar="DIR")
    climatology.add_argument("--season", metavar="MONTHS",
                             help="months to include, e.g. 5-9, 11-2 or 6,7,8 (default all)")
    climatology.add_argument("--archive", nargs="+", type=Path, metavar="FILE",
                             help="archive files, for composites of the full fields (default: the "
                                  "fields the store's EOFs reconstruct)")
    _add_quiet(climatology)
    climatology.set_defaults(handler=_cmd_climatology)

    tag = commands.add_parser(
        "tag", help="regime and diagnostics of every archive day",
        description="Write one row per archive day: date, regime, confidence, then the "
                    "physical diagnostics behind it.", epilog=EPILOG)
    tag.add_argument("--store", required=True, type=Path, metavar="DIR")
    tag.add_argument("--out", required=True, type=Path, metavar="FILE.csv|FILE.parquet")
    tag.add_argument("--rules", type=Path, metavar="RULES.toml",
                     help="re-classify with these rule thresholds (TOML; keys as in "
                          "analogs.stages.regimes.RegimeRules) from the diagnostics kept in the store")
    tag.add_argument("--kmeans", type=int, metavar="K",
                     help="also cluster the days' PCs into K unsupervised regimes (k-means with a "
                          "2-day minimum persistence); column kmeans_regime")
    tag.add_argument("--train", type=Path, metavar="LABELS.csv",
                     help="train the learned classifier (logistic regression on the PCs) on a "
                          "table of date,regime; columns learned_regime, learned_confidence")
    _add_quiet(tag)
    tag.set_defaults(handler=_cmd_tag)
    return parser


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
        with _collected_warnings() as caught:
            status = int(args.handler(args) or 0)
        _print_warnings(caught)
        return status
    except AnalogsInputError as error:
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
    fields = [f.strip() for f in args.fields.split(",")] if args.fields else None
    if args.chunk_days is not None and args.chunk_days < 1:
        raise AnalogsInputError(f"--chunk-days must be an integer >= 1. Got {args.chunk_days} instead.")
    if args.scheduler and not args.chunk_days:
        raise AnalogsInputError("--scheduler distributes chunked work: pass --chunk-days too")
    domain = _parse_box(args.domain, "--domain") if args.domain else None
    store = build_store(args.files, args.store, fields=fields, n_modes=args.modes,
                        variance=args.variance, region=args.region, domain=domain,
                        hour=args.hour, daily=args.daily, solver=args.solver,
                        n_harmonics=args.harmonics, index=args.index, progress=not args.quiet,
                        chunks={"time": args.chunk_days} if args.chunk_days else None,
                        scheduler=args.scheduler,
                        events=args.events)
    config = store.manifest["config"]
    print(f"built store {store.path}: {len(store.times)} days "
          f"{store.days[0].date()} to {store.days[-1].date()}, fields {', '.join(config['fields'])}, "
          f"{config['n_modes']} EOF modes explaining "
          f"{100 * float(store.eof.variance_fraction_.sum()):.1f}% of the variance")
    return 0


def _parse_box(text, option):
    try:
        values = [float(v) for v in text.split(",")]
    except ValueError:
        values = []
    if len(values) != 4:
        raise AnalogsInputError(f"{option} {text!r}: expected four numbers S,N,W,E in degrees")
    return tuple(values)


def _cmd_find(args) -> int:
    from analogs.api import AnalogStore
    from analogs.presentation.report import dumps, find_html, find_text, write_text_atomic
    store = AnalogStore.load(args.store)
    if args.time and args.field is None:
        raise AnalogsInputError("--time applies to --field only")
    result = store.find(date=args.date, field=args.field, time=args.time, top=args.top,
                        window=args.window, exclude=args.exclude, separation=args.separation,
                        region=args.region, regime=args.regime, weights=args.weights,
                        sequence=args.sequence, kinds=_kinds(args.kind))
    if args.maps:
        from analogs.stages.outcomes import write_maps
        write_maps(store.outcome_maps(result), args.maps)
    if args.report:
        from analogs.presentation.figures import find_figures
        target_fields = store.target_fields(args.field, args.time) if args.field else None
        figures = find_figures(store, result, target_fields=target_fields)
        write_text_atomic(Path(args.report) / "index.html",
                          find_html(result, store.manifest, figures=figures))
    if args.json:
        print(dumps(result.to_dict()))
    else:
        print(find_text(result))
        if args.report:
            print(f"\nreport: {Path(args.report) / 'index.html'}")
    return 0


def _kinds(text):
    return None if not text else [k.strip().lower() for k in text.split(",") if k.strip()]


def _cmd_verify(args) -> int:
    from analogs.api import AnalogStore
    from analogs.presentation.report import dumps, verify_text
    from analogs.stages.seasonal import parse_months
    store = AnalogStore.load(args.store)
    months = parse_months(args.season) if args.season else None
    if args.save and not args.tune:
        raise AnalogsInputError("--save records the result of --tune; pass both")
    tuning = None
    if args.tune:
        table = store.tune(window=args.window, separation=args.separation, region=args.region,
                           months=months, kinds=_kinds(args.kind), progress=not args.quiet)
        best = table.iloc[0]
        tuning = {"table": table.to_dict(orient="records"),
                  "best": {"top": int(best["top"]), "n_modes": int(best["n_modes"])}}
        if args.save:
            store.save_query_defaults(**tuning["best"])
        args.top, args.modes = tuning["best"]["top"], tuning["best"]["n_modes"]
    summary = store.verify(top=args.top, window=args.window, separation=args.separation,
                           n_modes=args.modes, region=args.region, months=months,
                           threshold=args.threshold, kinds=_kinds(args.kind),
                           progress=not args.quiet)
    if tuning is not None:
        summary["tuning"] = tuning
    print(dumps(summary) if args.json else verify_text(summary))
    return 0


def _cmd_update(args) -> int:
    from analogs.api import AnalogStore
    store = AnalogStore.load(args.store)
    summary = store.update(args.files, events=args.events, progress=not args.quiet)
    print(f"store {args.store}: {summary['days_added']} days added, "
          f"{summary['days_already_present']} already present")
    return 0


def _cmd_climatology(args) -> int:
    from analogs.api import AnalogStore
    from analogs.stages.seasonal import build_climatology, parse_months
    store = AnalogStore.load(args.store)
    months = parse_months(args.season) if args.season else None
    written = build_climatology(store, args.out, months=months, files=args.archive,
                                progress=not args.quiet)
    print(f"seasonal climatology of {store.path} written to {args.out} "
          f"({len(written)} files); report: {written['index.html']}")
    return 0


def _cmd_tag(args) -> int:
    from analogs.api import AnalogStore
    from analogs.presentation.report import write_text_atomic
    store = AnalogStore.load(args.store)
    out = Path(args.out)
    if out.suffix.lower() not in (".csv", ".parquet"):
        raise AnalogsInputError(f"--out {out}: expected a file name ending in .csv or .parquet")
    if args.rules or args.kmeans is not None or args.train:
        store.retag(rules=args.rules, kmeans=args.kmeans, labelled_days=args.train,
                    progress=not args.quiet)
    if store.tags is None:
        raise AnalogsInputError(f"store {args.store} has no tags; rebuild it with analogs build")
    table = store.tags.reset_index()
    table["date"] = table["date"].dt.strftime("%Y-%m-%d")
    if out.suffix.lower() == ".csv":
        write_text_atomic(out, table.to_csv(index=False))
    else:
        temporary = out.with_name(f".{out.name}.tmp")
        table.to_parquet(temporary, index=False)
        temporary.replace(out)
    counts = table["regime"].value_counts()
    print(f"tagged {len(table)} days -> {out}: "
          + ", ".join(f"{label} {n}" for label, n in counts.items()))
    return 0


def _cmd_demo(args) -> int:
    from analogs.workflows.demo import run_demo
    return run_demo(args.out, years=args.years, seed=args.seed, progress=not args.quiet)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
