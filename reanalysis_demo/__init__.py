"""reanalysis_demo: a synthetic daily reanalysis of an invented continent.

The scenario is our own: a mid-latitude continent on ``DEFAULT_DOMAIN``
(20-55 N, 130-60 W), a high western plateau (about 30-48 N, 122-102 W), plains
east of it (``CENTRAL_REGION``, 30-45 N, 105-85 W), a warm sea to the south
(south of 29 N between 100 W and 80 W: the moisture source and the breeding
ground of tropical cyclones) and open ocean east of 75 W and west of 124 W.

Daily fields at 12 UTC: 500 hPa geopotential height ``zg`` (m, i.e. gpm) and
850 hPa specific humidity ``hus`` (kg/kg), built as a sum of small documented
processes (:mod:`.heights`, :mod:`.moisture`) driven by a grid-independent
day-by-day schedule (:mod:`.schedule`), and the land-sea mask
(``archive/static/land_sea_mask.nc``).

Severe reports are not a function of the archived fields alone:

- storms are a Poisson process whose intensity is computed from ingredients on the
  generated fields (:mod:`.events`) times a hidden trigger, a daily cap-breaking index
  with its own correlation in space (about 500 km) and time (0.6 a day) that is never
  written to the archive (:mod:`.trigger`);
- a storm starts at a random point of its cell and makes 1 + Poisson(2) reports
  scattered about 10 km around its start;
- each report is recorded or not, with a reporting efficiency that follows invented
  towns and roads and grows over the decades at different rates by kind (tornado
  reporting nearly mature in 2001, hail and wind growing fast), with a documented change
  on 1 January 2006: hail and wind reports from spotters away from towns are accepted
  from then on (their recording floor rises from 0.15 to 0.35) (:mod:`.reporting`).

On the default demo (10 years from 2001, seed 0, 1 degree) a recorded report falls in the
box CENTRAL_REGION on 22.2 % of days and within 40 km of the invented town of Harrow Ford
(``POINT_REGION``, 37 N 97.5 W) on 0.6 % of days. The generator's own chance of it
(:mod:`.chances`) gives the best attainable Brier skill score against the season
climatology of the other years: 0.56 for the box knowing everything, 0.40 knowing only the
archived fields (the hidden trigger averaged out); 0.17 and 0.05 for the point region.
These are written to ``demo_metadata.json`` for every archive. Real report archives are
far less predictable from two fields than this; the demo's skill is an upper bound by
construction.

Random draws depend on (seed, year) only (:func:`.generator.year_streams`): any year is
reproducible on its own, and a demo that starts in 2011 does not repeat 2001.

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

Python: :func:`generate`, :func:`iter_years`, :func:`write_archive`; regions
``CENTRAL_REGION`` (box) and ``POINT_REGION`` (lat, lon, radius km).
Command line: ``python -m reanalysis_demo --out DIR [--years N]
[--start-year Y] [--grid DEG] [--seed S] [--quiet]``.
"""

from .chances import POINT_REGION, POINT_TOWN
from .generator import DemoArchive, DemoYear, generate, iter_years
from .geography import CENTRAL_REGION, DEFAULT_DOMAIN
from .writer import write_archive

__all__ = ["CENTRAL_REGION", "DEFAULT_DOMAIN", "DemoArchive", "DemoYear", "POINT_REGION",
           "POINT_TOWN", "generate", "iter_years", "write_archive"]
