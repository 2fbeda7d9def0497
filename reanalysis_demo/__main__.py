"""Command line: ``python -m reanalysis_demo --out DIR [--years N] [--start-year Y] [--grid DEG] [--seed S] [--quiet]``."""

from __future__ import annotations

import argparse
import sys

from analogs.errors import AnalogsInputError

from .writer import write_archive


class _OneLineParser(argparse.ArgumentParser):
    """argparse whose usage errors are one line on stderr and exit status 2."""

    def error(self, message):
        self.exit(2, f"{self.prog}: error: {message}\n")


def build_parser():
    parser = _OneLineParser(
        prog="python -m reanalysis_demo",
        description="Write a synthetic daily reanalysis archive of an invented continent: "
                    "500 hPa height and 850 hPa specific humidity (CF NetCDF, one file per year "
                    "and variable, and the land-sea mask in archive/static/), truth.csv (regime of each "
                    "day), events.csv (recorded severe reports), chances.csv (the generator's own "
                    "chance of a report in the box and the point region) and demo_metadata.json "
                    "(regions, reporting history, best attainable skill).")
    parser.add_argument("--out", required=True, metavar="DIR",
                        help="output directory (created if missing); files go to DIR/archive/, "
                             "DIR/truth.csv, DIR/events.csv, DIR/chances.csv and "
                             "DIR/demo_metadata.json")
    parser.add_argument("--years", type=int, default=10, metavar="N",
                        help="number of calendar years (default: 10)")
    parser.add_argument("--start-year", type=int, default=2001, metavar="Y",
                        help="first calendar year (default: 2001)")
    parser.add_argument("--grid", type=float, default=1.0, metavar="DEG",
                        help="grid spacing in degrees of latitude and longitude (default: 1.0)")
    parser.add_argument("--seed", type=int, default=0, metavar="S",
                        help="random seed; the same seed and years give the same archive, and each "
                             "year's draws depend on (seed, year) (default: 0)")
    parser.add_argument("--quiet", action="store_true", help="no progress bar")
    return parser


def main(argv=None):
    """Run the command line; return the exit status (0 done, 2 bad input)."""
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        paths = write_archive(args.out, args.years, start_year=args.start_year, grid=args.grid,
                              seed=args.seed, progress=not args.quiet)
    except AnalogsInputError as exc:
        print(f"{parser.prog}: error: {exc}", file=sys.stderr)
        return 2
    except OSError as exc:
        print(f"{parser.prog}: error: cannot write to --out {args.out!r}: {exc.strerror}", file=sys.stderr)
        return 2
    if not args.quiet:
        print(f"wrote {len(paths['zg']) + len(paths['hus'])} NetCDF files to {paths['archive']}, "
              f"{paths['truth']} and {paths['events']}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
