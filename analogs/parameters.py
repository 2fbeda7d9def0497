"""The one table of user-facing parameters: each defined once, read by the API and the CLI.

Every option has here its name in the Python API, its command-line flag(s), its type,
default, allowed values or range, units, metavar and help text. The command line builds
its parser from this table (:mod:`analogs.cli`); the public functions take their
defaults from it (``window=P.window.default``) and check values with it
(``P.window.check(window, "find")``), so a bad value gives one message shape that names
the public function the user called, or, from the command line, the option:

    The 'window' parameter of find must be an integer >= 0 and <= 183. Got -5 instead.
    --window must be an integer >= 0 and <= 183. Got -5 instead.

This module is part of the base layer and imports nothing heavy (no numpy, pandas,
xarray, faiss or scipy): ``analogs --help`` stays fast.
"""

from __future__ import annotations

import dataclasses
import numbers
from pathlib import Path

from analogs._validation import check_box, check_choice, check_float, check_int, fail

#: Marks an API default that differs from the documented one (see :attr:`Parameter.api_default`).
_SAME = object()

#: Machine labels of the rule-based regimes (DESIGN.md, "Regimes"), in order of precedence.
REGIME_LABELS = ("tropical", "strong_trough", "northwest_flow", "other")
#: Canonical fields a store can be built from (DESIGN.md, "Canonical conventions").
SUPPORTED_FIELDS = ("z500", "q850", "td2m", "pwat")

#: What the distance between two days is (the --top help and the find output say it).
DISTANCE = ("the Euclidean distance between the two days' vectors of principal components, "
            "i.e. in the area-weighted (sqrt cos lat), per-field-balanced anomaly space of "
            "the kept EOF modes: dimensionless, smaller is closer")

_REGION_FORMS = ("a box S,N,W,E (west longitudes negative) or a point and radius "
                 "LAT,LON,KM")


@dataclasses.dataclass(frozen=True)
class Parameter:
    """One user-facing option.

    Attributes
    ----------
    key : unique name in the table (``P.<key>``).
    flags : command-line flag(s), e.g. ``("--window",)``; a positional argument has its
        dest (``("files",)``); ``()`` for an API-only parameter.
    help : what it is and its units (the default is appended by :meth:`help_text`).
    kind : ``"int"``, ``"float"``, ``"choice"``, ``"list"`` (comma-separated names),
        ``"months"``, ``"box"`` (S,N,W,E), ``"ints"`` (a sequence of integers), ``"text"``,
        ``"path"``, ``"paths"`` (one or more) or ``"flag"`` (on/off).
    default : the value used when the option is not given.
    default_text : how the help states a default that is not a plain value ("the
        store's region").
    api_default : the signature default of the API when it differs from ``default``
        (``None`` where the default depends on the store or the target).
    name : keyword in the Python API, when not ``key``.
    choices, minimum, maximum, min_inclusive, max_inclusive : allowed values.
    units : units of the value (``None`` for dimensionless names and choices).
    metavar : placeholder in the usage line.
    required : the command cannot run without it.
    suffixes : accepted file name endings of an output file.
    output : ``"file"`` or ``"directory"`` for an output path: the command line refuses
        it, before any work, when it is or lies inside an analogs store
        (:func:`analogs.workflows.paths.check_output`).
    """

    key: str
    flags: tuple
    help: str
    kind: str = "text"
    default: object = None
    default_text: str | None = None
    api_default: object = _SAME
    name: str | None = None
    choices: tuple = ()
    minimum: float | None = None
    maximum: float | None = None
    min_inclusive: bool = True
    max_inclusive: bool = True
    units: str | None = None
    metavar: str | None = None
    required: bool = False
    suffixes: tuple = ()
    output: str | None = None

    def __post_init__(self):
        if self.name is None:
            object.__setattr__(self, "name", self.key)
        if self.api_default is _SAME:
            object.__setattr__(self, "api_default", self.default)

    # -- the command line --------------------------------------------------------
    @property
    def flag(self) -> str | None:
        """The option as the command line spells it (``"--window"``)."""
        return self.flags[0] if self.flags else None

    @property
    def positional(self) -> bool:
        return bool(self.flags) and not self.flags[0].startswith("-")

    @property
    def dest(self) -> str:
        """Attribute of the parsed arguments that holds the value."""
        return self.flags[0].lstrip("-").replace("-", "_")

    def default_phrase(self) -> str:
        """``"default 45"``, ``"default: the store's region"``, ``"required"``."""
        if self.required:
            return "required"
        if self.default_text is not None:
            return f"default: {self.default_text}"
        if self.kind == "flag":
            return "default: off"
        return f"default {self.default}"

    def help_text(self) -> str:
        """The help line: what it is, its units, its allowed values and its default."""
        allowed = ""
        if self.kind == "choice" or (self.kind == "list" and self.choices):
            allowed = f"; {'one' if self.kind == 'choice' else 'any'} of {', '.join(self.choices)}"
        units = f"{self.units}; " if self.units else ""
        return f"{self.help}{allowed} ({units}{self.default_phrase()})"

    def argparse_kwargs(self) -> dict:
        """Keyword arguments of ``ArgumentParser.add_argument`` for this option."""
        kwargs = {"help": self.help_text().replace("%", "%%")}
        if self.kind == "flag":
            return {**kwargs, "action": "store_true"}
        if self.positional:
            kwargs["nargs"] = "+"
        elif self.required:
            kwargs["required"] = True
        if self.kind == "paths" and not self.positional:
            kwargs["nargs"] = "+"
        if not self.positional:
            kwargs["default"] = self.api_default
        kwargs["type"] = {"int": int, "float": float, "path": Path,
                          "paths": Path}.get(self.kind, str)
        metavar = self.metavar
        if metavar is None and self.kind == "choice":
            metavar = "{" + ",".join(self.choices) + "}"
        if metavar is not None:
            kwargs["metavar"] = metavar
        return kwargs

    # -- checks --------------------------------------------------------------------
    def check(self, value, owner: str | None = None, *, maximum=None):
        """``value`` checked against this entry (and parsed, for text forms), or raise.

        ``owner`` is the public function the user called (``"find"``); ``None`` for a
        value from the command line, whose message then names the option. ``None``
        values (not given) pass unchanged. ``maximum`` is an upper bound known only
        from the data (the number of modes a store holds).
        """
        label = self.name if owner is not None else (self.flag or self.name)
        if value is None:
            return None
        if self.kind == "int":
            return check_int(value, label, owner, min_value=self.minimum,
                             max_value=self.maximum if maximum is None else maximum)
        if self.kind == "float":
            return check_float(value, label, owner, min_value=self.minimum,
                               max_value=self.maximum, min_inclusive=self.min_inclusive,
                               max_inclusive=self.max_inclusive)
        if self.kind == "choice":
            return check_choice(value, label, owner, self.choices)
        if self.kind == "ints":
            return self._ints(value, label, owner)
        if self.kind == "list":
            return self._names(value, label, owner)
        if self.kind == "months":
            return _months(value, label, owner)
        if self.kind == "box":
            return check_box(value, label, owner)
        if self.suffixes and Path(value).suffix.lower() not in self.suffixes:
            fail(label, owner, "a file name ending in " + " or ".join(self.suffixes), str(value))
        return value

    def _ints(self, value, label, owner) -> tuple:
        values = (value,) if isinstance(value, numbers.Number) else tuple(value)
        expected = f"one or more integers >= {self.minimum}"
        if not values or any(isinstance(v, bool) or not isinstance(v, numbers.Integral)
                             or v < self.minimum for v in values):
            fail(label, owner, expected, value)
        return tuple(int(v) for v in values)

    def _names(self, value, label, owner) -> list:
        """Comma-separated text (or a list) of names, lower case, without repeats."""
        items = str(value).split(",") if isinstance(value, str) else list(value)
        names = list(dict.fromkeys(str(item).strip().lower() for item in items
                                   if str(item).strip()))
        if not names:
            fail(label, owner, "at least one name", value)
        for name in names:
            if self.choices and name not in self.choices:
                fail(label, owner, "names among " + ", ".join(self.choices), name)
        return names


def _months(value, label, owner) -> tuple:
    """Months of a season, sorted: text ``"5-9"`` (May to September), ``"11-3"`` (wraps
    the year end), ``"6,7,8"`` or ``"4,6-8"``, or a sequence of months 1-12."""
    expected = "months 1-12 as M-N or M,N,... (e.g. 5-9)"
    if isinstance(value, str):
        parts = value.split(",")
    elif isinstance(value, numbers.Integral):
        parts = [value]
    else:
        parts = list(value)
    months = set()
    for part in parts:
        first, dash, last = str(part).strip().partition("-")
        try:
            first, last = int(first), int(last if dash else first)
        except ValueError:
            fail(label, owner, expected, value)
        if not (1 <= first <= 12 and 1 <= last <= 12):
            fail(label, owner, expected, value)
        months.update((first - 1 + step) % 12 + 1 for step in range((last - first) % 12 + 1))
    if not months:
        fail(label, owner, expected, value)
    return tuple(sorted(months))


def _table(*parameters: Parameter) -> dict:
    table = {}
    for parameter in parameters:
        if parameter.key in table:
            raise RuntimeError(f"parameter {parameter.key!r} is defined twice")
        table[parameter.key] = parameter
    return table


PARAMETERS: dict[str, Parameter] = _table(
    # -- every command ----------------------------------------------------------------
    Parameter("store", ("--store",), "store directory: plain files (manifest.json with "
              "checksums, basis.nc, scores.nc, tags and events tables) that build writes "
              "(replacing an old store only when the build succeeds) and the other commands "
              "read", kind="path", metavar="DIR", required=True),
    Parameter("quiet", ("--quiet",), "no progress bars on stderr", kind="flag"),
    Parameter("json", ("--json",), "print one JSON object instead of a table", kind="flag"),
    # -- demo ---------------------------------------------------------------------------
    Parameter("demo_out", ("--out",), "output directory, created if needed: archive/ "
              "(NetCDF), events.csv, truth.csv, store/ and report/index.html (a folder that already "
              "holds them is refused unless --replace is given; never inside a store)",
              name="out", kind="path", metavar="DIR", required=True, output="directory"),
    Parameter("replace", ("--replace",), "let demo replace the store, events and other demo "
              "outputs already in --out (they are refused otherwise)", kind="flag",
              default=False),
    Parameter("years", ("--years",), "years of synthetic daily fields to generate",
              kind="int", default=10, minimum=1, maximum=500, units="years", metavar="N"),
    Parameter("seed", ("--seed",), "random seed of the synthetic archive", kind="int",
              default=0, minimum=0, metavar="S"),
    # -- build and update -------------------------------------------------------------
    Parameter("files", ("files",), "archive files (NetCDF or Zarr, any CF-ish convention) "
              "of 500 hPa height and low-level moisture; update appends their days not yet "
              "in the store", name="paths", kind="paths", metavar="FILE", required=True),
    Parameter("events", ("--events",), "events table (severe reports) for the store: CSV "
              "or Parquet with header time,lat,lon,kind[,magnitude] (time ISO 8601 UTC, "
              "lat/lon in degrees); update merges it by date: the store's reports are "
              "replaced only on the days it covers (see --events-period); reports outside "
              "the archive's grid are counted, reported and left out",
              kind="path", metavar="EVENTS.csv", default_text="no events"),
    Parameter("event_dates", ("--event-dates",), "how an events time that is a date "
              "without a time of day (2002-06-14) is read: time-required refuses it (give "
              "ISO 8601 times with the hour in UTC, e.g. 2002-06-14T21:30Z); convective-day "
              "takes the date as the convective day itself (12 UTC on that date to 12 UTC "
              "the next)", kind="choice", default="time-required",
              choices=("time-required", "convective-day")),
    Parameter("events_period", ("--events-period",), "the convective days the events "
              "table covers, FIRST,LAST (YYYY-MM-DD, inclusive; it must hold every report "
              "of the table): its reports replace the store's on those days, and those days "
              "count as having report coverage "
              "(days without coverage are left out of outcome statistics, climatology and "
              "verification)", metavar="FIRST,LAST",
              default_text="build: every archive day; update: the table's first to last "
                           "report day"),
    Parameter("land_mask", ("--land-mask",), "static land-sea mask file (NetCDF or Zarr "
              "with a CF land_binary_mask or land_area_fraction variable, or one named "
              "lsm / LANDMASK, values 0 sea to 1 land, covering the archive's grid; a time "
              "dimension keeps its first step): regridded to the store grid and kept in the "
              "store to draw the land-sea boundary on maps, never used as a predictor",
              kind="path", metavar="MASK.nc",
              default_text="a mask variable found in the archive files, else none"),
    Parameter("n_modes", ("--modes",), "number of EOF modes to keep", kind="int",
              default=20, api_default=None, minimum=1, units="modes", metavar="K",
              default_text="20, unless --variance is given"),
    Parameter("variance", ("--variance",), "keep the fewest EOF modes explaining this "
              "fraction of the total weighted anomaly variance", kind="float", minimum=0.0,
              maximum=1.0, min_inclusive=False, units="fraction (0-1]", metavar="F",
              default_text="none, --modes decides"),
    Parameter("fields", ("--fields",), "comma-separated canonical fields to use, e.g. "
              "z500,q850", kind="list", choices=SUPPORTED_FIELDS, metavar="LIST",
              default_text="every supported field found"),
    Parameter("region", ("--region",), "outcome region: " + _REGION_FORMS + "; build "
              "records it as the store's default region for outcome statistics and regime "
              "diagnostics", metavar="S,N,W,E | LAT,LON,KM", units="degrees, radius in km",
              default_text="the store's region; for build, the whole domain for outcomes "
              "and a synoptic-scale box at the domain's centre for regime diagnostics"),
    Parameter("domain", ("--domain",), "subset the archive grid to this box S,N,W,E",
              kind="box", units="degrees", metavar="S,N,W,E", default_text="the whole grid"),
    Parameter("hour", ("--hour",), "UTC hour of the daily value taken from sub-daily data",
              kind="int", default=12, minimum=0, maximum=23, units="hour UTC", metavar="H"),
    Parameter("daily", ("--daily",), "how sub-daily data becomes one value a day: the "
              "value at --hour, or the daily mean", kind="choice", default="instant",
              choices=("instant", "mean")),
    Parameter("solver", ("--solver",), "EOF solver: auto is exact for small archives, "
              "randomized SVD for large ones", kind="choice", default="auto",
              choices=("auto", "exact", "randomized")),
    Parameter("chunk_days", ("--chunk-days",), "read and process the archive out of core "
              "in chunks of N days (dask), for archives larger than memory", kind="int",
              minimum=1, units="days", metavar="N", default_text="in memory"),
    Parameter("scratch", ("--scratch",), "folder for the out-of-core build's temporary "
              "float32 anomaly matrix (its size is said first, a disk without that much "
              "free space is refused, and it is removed after the build); needs "
              "--chunk-days", kind="path", metavar="DIR", default_text="beside the store",
              output="directory"),
    Parameter("scheduler", ("--scheduler",), "run the chunked work on a dask.distributed "
              "scheduler at ADDRESS (tcp://host:8786), or 'local' for a local process "
              "cluster; needs --chunk-days", metavar="ADDRESS",
              default_text="dask's threaded scheduler"),
    Parameter("index", ("--index",), "faiss index: exact flat search, approximate HNSW, or "
              "auto (HNSW above 500,000 days; its recall against exact search is measured "
              "and stored)", kind="choice", default="auto", choices=("auto", "flat", "hnsw")),
    Parameter("n_harmonics", ("--harmonics",), "annual harmonics of the smooth day-of-year "
              "climatology", kind="int", default=3, minimum=0, units="harmonics per year",
              metavar="N"),
    # -- find and verify ------------------------------------------------------------------
    Parameter("date", ("--date",), "target: an archive day", metavar="YYYY-MM-DD",
              default_text="none, give --date, --dates or --field"),
    Parameter("dates", ("--dates",), "targets: a text file of archive days, one YYYY-MM-DD "
              "a line (blank lines and lines starting with # skipped), answered in one "
              "process from one loading of the store, in the file's order", kind="path",
              metavar="FILE", default_text="none, give --date, --dates or --field"),
    Parameter("json_lines", ("--json-lines",), "print one compact JSON object a line, one "
              "per target (--dates) or valid time (--time all or START/END), instead of a "
              "table", kind="flag"),
    Parameter("field", ("--field",), "target: a forecast or analysis field (NetCDF; any "
              "grid covering the store's, or all but at most 10 % of it, projected on "
              "the covered points); an ensemble file (a member dimension such as number "
              "or realization) gives each member's regime and analogs and outcomes "
              "pooled over the members", kind="path", metavar="FILE",
              default_text="none, give --date, --dates or --field"),
    Parameter("time", ("--time",), "valid time to take from --field (ISO 8601, UTC); "
              "'all' takes every valid time in the file and START/END (ISO 8601 interval, "
              "e.g. 2024-05-03/2024-05-05, either end may be left open) those in the "
              "range, one answer per valid time from one reading of the file",
              metavar="ISO|all|START/END", default_text="the file's only time"),
    Parameter("top", ("--top",), "number of analogs: the closest archive days by "
              "distance, " + DISTANCE + "; with --metric event_weighted (the default) "
              "the distances are in its weighted space. 50 by default: with 20 the "
              "event-weighted analogs fell short of a logistic regression on the demo",
              kind="int", default=50, api_default=None, minimum=1,
              metavar="N", default_text="the store's tuned value, else 50"),
    Parameter("window", ("--window",), "season window: only days within this many calendar "
              "days of the target's calendar day, any year", kind="int", default=45,
              minimum=0, maximum=183, units="calendar days", metavar="DAYS"),
    Parameter("separation", ("--separation",), "de-clustering: drop an analog within this "
              "many days of a better one (0 keeps all)", kind="int", default=3, minimum=0,
              units="days", metavar="DAYS"),
    Parameter("exclude", ("--exclude",), "exclude days within this many days of the "
              "target date (its own episode)", kind="int", default=10, api_default=None,
              minimum=0, units="days", metavar="DAYS",
              default_text="10 for --date and for verify (whose targets are archive days); "
                           "nothing for --field"),
    Parameter("regime", ("--regime",), "only analogs of this regime (machine labels "
              + ", ".join(REGIME_LABELS) + ", or a label of the store's tags); verify then "
              "forecasts that regime's days",
              metavar="LABEL", default_text="any regime"),
    Parameter("kinds", ("--kind",), "count only reports of these kinds, comma-separated "
              "(e.g. tornado,hail); for verify the event is at least one report of them",
              kind="list", metavar="LIST", default_text="every kind"),
    Parameter("sequence", ("--sequence",), "also match the target's preceding 1 or 2 days "
              "(weights 0.5, 0.25), so analogs share the pattern's evolution; a --field file "
              "must then hold those days too; verify then forecasts the days whose "
              "preceding days are in the archive", kind="int", default=0, minimum=0, maximum=2,
              units="days", metavar="DAYS", default_text="0, the day alone"),
    Parameter("metric", ("--metric",), "distance of the analog search: "
              "'event_weighted' scales each PC by how much it says about the event "
              "forecast (reports of --kind in --region), from a logistic regression on the "
              "archive's days (in verify, on the other years only), and adds the "
              "regression's PC score as one more coordinate (predictor weighting, Delle "
              "Monache et al. 2013; the analogs' distances are then in that space): the "
              "default, because with 50 analogs it matched that regression's skill on the "
              "demo where the plain distance did not; 'plain', the simple version, is the "
              "Euclidean distance of the PCs", kind="choice", default="event_weighted",
              api_default=None, choices=("plain", "event_weighted"),
              default_text="the store's tuned value (verify --tune --save records plain), "
              "else event_weighted"),
    Parameter("weights", ("--weights",), "weights of the analogs in the outcome statistics",
              kind="choice", default="equal", choices=("equal", "inverse_distance", "gaussian")),
    Parameter("confidence", (), "level of the confidence intervals of the outcome "
              "probabilities", kind="float", default=0.9, minimum=0.5, maximum=1.0,
              max_inclusive=False, units="probability"),
    Parameter("report", ("--report",), "also write an HTML report to DIR/index.html "
              "(DIR created if needed; never inside a store)", kind="path", metavar="DIR",
              default_text="no report", output="directory"),
    Parameter("maps", ("--maps",), "also write CF NetCDF maps of the analogs' reports: the "
              "fraction of analogs with a report within 40 km of each grid point and a "
              "smoothed report density (Gaussian, sigma 120 km); never inside a store",
              kind="path", metavar="FILE.nc", default_text="no maps", output="file"),
    Parameter("skip_skill_hindcast", ("--skip-skill-hindcast",), "do not measure the "
              "skill of the query's region, kinds and settings when the store holds no "
              "measurement of them (a leave-one-year-out hindcast, about a second for a few "
              "years of days, kept in the store for later queries); the skill line then "
              "gives the command that measures it. The query then writes nothing to the "
              "store: an event-weighted metric it fits for a new region or kinds is used "
              "and not kept", kind="flag"),
    # -- verify -----------------------------------------------------------------------------
    Parameter("query_modes", ("--modes",), "use only the leading K EOF modes", name="n_modes",
              kind="int", minimum=1, units="modes", metavar="K",
              default_text="the store's tuned value, else all its modes"),
    Parameter("months", ("--season",), "months of the target days (verify) or of the "
              "briefing (climatology), e.g. 5-9, 11-2 or 6,7,8", kind="months",
              units="months 1-12", metavar="MONTHS", default_text="all months"),
    Parameter("threshold", ("--threshold",), "probability threshold of the yes/no scores "
              "(POD, FAR, ...)", kind="float", default=0.3, minimum=0.0, maximum=1.0,
              units="probability", metavar="P"),
    Parameter("n_resamples", (), "bootstrap resamples of the score intervals", kind="int",
              default=500, minimum=10),
    Parameter("tune", ("--tune",), "scan the number of analogs and of EOF modes; report "
              "the best by Brier skill score", kind="flag"),
    Parameter("tops", (), "numbers of analogs scanned by tune", kind="ints",
              default=(10, 20, 30, 50), minimum=1),
    Parameter("scan_modes", (), "numbers of EOF modes scanned by tune (the store's own "
              "count is added)", name="modes", kind="ints", default=(5, 10, 15, 20),
              minimum=1, units="modes"),
    Parameter("save", ("--save",), "with --tune: record the best settings in the store as "
              "query defaults", kind="flag"),
    # -- climatology (the seasonal briefing) --------------------------------------------------
    Parameter("briefing_out", ("--out",), "output directory of the briefing, created if "
              "needed: tables (CSV, Parquet), composites (CF NetCDF), figures (PNG) and "
              "index.html; never inside a store", name="out_dir", kind="path", metavar="DIR",
              required=True, output="directory"),
    Parameter("archive", ("--archive",), "archive files, for composites of the full fields",
              name="files", kind="paths", metavar="FILE",
              default_text="the fields the store's EOFs reconstruct"),
    # -- tag ----------------------------------------------------------------------------------
    Parameter("tag_out", ("--out",), "output table: one row per day (date, regime, "
              "confidence, then the diagnostics); CSV or Parquet by the name's ending",
              name="out", kind="path", metavar="FILE.csv|FILE.parquet", required=True,
              suffixes=(".csv", ".parquet"), output="file"),
    Parameter("rules", ("--rules",), "re-classify with these rule thresholds (TOML; keys as "
              "in analogs.stages.regimes.RegimeRules) from the diagnostics kept in the store; "
              "the store's tags change only with --save",
              kind="path", metavar="RULES.toml",
              default_text="the rules the store was tagged with"),
    Parameter("kmeans", ("--kmeans",), "also cluster the days' principal components into K "
              "unsupervised regimes (k-means with a 2-day minimum persistence); column "
              "kmeans_regime", kind="int", minimum=2, units="clusters", metavar="K",
              default_text="no clustering"),
    Parameter("train", ("--train",), "train the learned classifier (logistic regression on "
              "the principal components) on a table of date,regime with labels of your own "
              "(read as text: null or NA are labels); columns learned_regime, "
              "learned_confidence; prints its accuracy cross-validated by year and a table "
              "against the rule regimes", name="labelled_days", kind="path",
              metavar="LABELS.csv",
              default_text="no learned classifier"),
    Parameter("tag_save", ("--save",), "with --rules, --kmeans or --train: keep the new tags "
              "(and learned models) in the store, replacing its tags; without it the store is "
              "left as it was and only --out holds them", name="save", kind="flag",
              default=False),
)


class _Table:
    """Attribute access to :data:`PARAMETERS`: ``P.window``."""

    def __getattr__(self, key) -> Parameter:
        try:
            return PARAMETERS[key]
        except KeyError:
            raise AttributeError(f"no parameter {key!r} in the table") from None

    def __iter__(self):
        return iter(PARAMETERS.values())


#: The table: ``P.window.default``, ``P.window.check(value, "find")``.
P = _Table()

__all__ = ["DISTANCE", "P", "PARAMETERS", "Parameter", "REGIME_LABELS", "SUPPORTED_FIELDS"]
