"""reanalysis_demo: a synthetic daily reanalysis of an invented continent.

The scenario is our own: a mid-latitude continent on ``DEFAULT_DOMAIN``
(20-55 N, 130-60 W), a high western plateau (about 30-48 N, 122-102 W), plains
east of it (``CENTRAL_REGION``, 30-45 N, 105-85 W), a warm sea to the south
(south of 29 N between 100 W and 80 W: the moisture source and the breeding
ground of tropical cyclones) and open ocean east of 75 W and west of 124 W.

Daily fields at 12 UTC: 500 hPa geopotential height ``zg`` (m, i.e. gpm) and
850 hPa specific humidity ``hus`` (kg/kg), built as a sum of small documented
processes (:mod:`.heights`, :mod:`.moisture`) driven by a grid-independent
day-by-day schedule (:mod:`.schedule`). Severe reports are a Poisson process
whose intensity is computed from ingredients on the generated fields
(:mod:`.events`).

Truth rules (``truth.csv`` column ``regime``; precedence
tropical > strong_trough > northwest_flow > other):

- ``tropical``: a tropical cyclone of 500 hPa depth >= 30 gpm has its centre
  within 500 km (great circle) of the CENTRAL_REGION box, distance 0 inside
  it; this takes in the southern sea north of about 25.5 N. Cyclones are
  born only from 1 June to 15 October and live at most 14 days.
- ``strong_trough``: a deep trough of depth >= 100 gpm has its axis between
  113 W and 97 W (over the western half of the region or just west of it):
  strong height gradient, south-westerly flow and cyclonic vorticity
  advection over the region.
- ``northwest_flow``: a north-west-flow episode (amplified plateau ridge with
  a trough downstream, 130-215 gpm) is at full amplitude, i.e. not on its
  build-up or break-down day. Episodes start only in the warm season (late
  April to early October) and bring a poleward moisture tongue beneath the
  ridge; flow aloft over the region is from about 300-340 deg.
- ``other``: every other day.

Other truth columns: ``tc_id``, ``tc_lat``, ``tc_lon``, ``tc_depth_gpm``,
``tc_radius_km``, ``tc_distance_km`` (the cyclone nearest the region, empty
when there is none), ``trough_axis_lon``, ``trough_depth_gpm`` (empty when no
deep trough) and ``northwest_amplitude_gpm``.

Python: :func:`generate`, :func:`iter_years`, :func:`write_archive`.
Command line: ``python -m reanalysis_demo --out DIR [--years N]
[--start-year Y] [--grid DEG] [--seed S] [--quiet]``.
"""

from .generator import DemoArchive, DemoYear, generate, iter_years
from .geography import CENTRAL_REGION, DEFAULT_DOMAIN
from .writer import write_archive

__all__ = ["CENTRAL_REGION", "DEFAULT_DOMAIN", "DemoArchive", "DemoYear", "generate",
           "iter_years", "write_archive"]
