"""The Python API: build a store from an archive, load it, ask it for analogs.

>>> from analogs.api import AnalogStore, build_store            # doctest: +SKIP
>>> store = build_store(["archive/zg500_2001.nc", ...], "store", events="events.csv")
>>> result = AnalogStore.load("store").find(date="2005-06-14", top=20)
>>> result.analogs            # pandas DataFrame: rank, date, distance, regime, events
>>> result.outcomes           # probabilities, intervals, counts, climatology

The CLI is a thin layer over this module; the work is done in :mod:`analogs.workflows`.
"""

from analogs.workflows.analog_store import AnalogResult, AnalogStore
from analogs.workflows.build import build_store, skill_by_month

__all__ = ["AnalogResult", "AnalogStore", "build_store", "skill_by_month"]
