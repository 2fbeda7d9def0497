"""The Python API: build a store from an archive, load it, ask it for analogs.

>>> from analogs.api import AnalogStore, build_store            # doctest: +SKIP
>>> store = build_store(["archive/zg500_2001.nc", ...], "store", events="events.csv")
>>> result = AnalogStore.load("store").find(date="2005-06-14", top=20)
>>> result.analogs            # pandas DataFrame: rank, date, distance, regime, events
>>> result.outcomes           # OutcomeSummary: probabilities, intervals, counts, climatology
>>> result.outcomes.by_kind   # pandas DataFrame by event kind
>>> result.to_dict()          # the JSON of `analogs find --json`

``find`` returns an :class:`analogs.results.FindResult` (with ``members`` for an ensemble
file), or for ``time="all"`` / ``"START/END"`` a :class:`analogs.results.ValidTimesResult`
(one result per valid time); ``AnalogResult`` is its earlier name, kept so that existing
imports keep working.

The CLI is a thin layer over this module; the work is done in :mod:`analogs.workflows`.
"""

from analogs.results import AnalogResult, FindResult, OutcomeSummary, ValidTimesResult
from analogs.workflows.analog_store import AnalogStore

__all__ = ["AnalogResult", "AnalogStore", "FindResult", "OutcomeSummary", "ValidTimesResult",
           "build_store", "skill_by_month"]  # noqa: F822 (module __getattr__)

#: Imported when first asked for: a build needs the readers, xarray and dask, which a
#: query of a loaded store does not.
_FROM_BUILD = ("build_store", "skill_by_month")


def __getattr__(name):
    if name in _FROM_BUILD:
        from analogs.workflows import build
        return getattr(build, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
