r"""Weather regimes of archive days: explainable rules, plus learned complements.

- :class:`RegimeRules` holds every threshold of the rules, with units; defaults,
  keyword overrides or a TOML file.
- :class:`RuleClassifier` maps the diagnostics of
  :func:`analogs.stages.diagnostics.compute_diagnostics` to ``northwest_flow``,
  ``tropical``, ``strong_trough`` or ``other``, with a confidence and a reason that
  quotes the deciding values.
- :class:`KMeansRegimes` (unsupervised, on the PCs, with a minimum-persistence
  filter) and :class:`SupervisedRegimes` (logistic regression on the PCs trained
  from a table of labelled days) learn with scikit-learn, and save and predict from
  plain arrays (``to_dataset`` / ``from_dataset``), never from pickles.
- :func:`tag_days` tags every day of an archive: the table ``analogs tag`` writes.

Physical basis of the rules (common practice, no source): north-west flow has a
ridge upstream over the western high terrain and flow aloft from about 280-350 deg
over the region, with low-level moisture returning beneath it; a tropical regime has
a compact closed 500 hPa low at low latitude wrapped in very moist air; a strong
trough is an amplified trough with a strong height gradient and cyclonic vorticity
advection over the region.
"""

from __future__ import annotations

import dataclasses
import numbers
import tomllib
from dataclasses import dataclass, field, fields
from os import PathLike
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

from analogs import __version__
from analogs._validation import check_int
# Machine labels of the regimes (DESIGN.md), in order of precedence: the --regime table entry.
from analogs.parameters import REGIME_LABELS
from analogs.stages.diagnostics import compute_diagnostics
from analogs.errors import AnalogsInputError, NotFittedError

__all__ = [
    "REGIME_LABELS",
    "RegimeRules",
    "RuleClassifier",
    "KMeansRegimes",
    "SupervisedRegimes",
    "persistence_filter",
    "read_labelled_days",
    "tag_days",
]


def _rule(default, units: str, doc: str):
    return field(default=default, metadata={"units": units, "doc": doc})


@dataclass(frozen=True)
class RegimeRules:
    """Thresholds of the regime rules, each with its units.

    Build with defaults (``RegimeRules()``), keyword overrides
    (``RegimeRules.load(nw_min_speed_ms=10)``) or a TOML file
    (``RegimeRules.load("rules.toml")``, keys at the top level or under a
    ``[regimes]`` table). Unknown keys raise :class:`AnalogsInputError` naming them.
    ``RegimeRules.describe()`` lists every field with units and meaning.

    Confidence (see :meth:`RuleClassifier.predict`) measures how far each deciding
    diagnostic is past its threshold in units of its *span*: ``direction_span_deg``
    for the flow direction, ``confidence_span`` times the threshold for the others.
    """

    # tropical: a compact closed low at low latitude in very moist air
    tropical_max_lat: float = _rule(
        35.0, "degree_north", "closed-low centre at or equatorward of this latitude")
    tropical_min_depth_gpm: float = _rule(
        18.0, "gpm", "ring-mean height minus centre height of the closed low, at least")
    tropical_max_radius_km: float = _rule(
        600.0, "km", "radius where the height recovers half the depth, at most")
    tropical_min_dewpoint_c: float = _rule(
        15.0, "degC", "mean 850 hPa dewpoint within 500 km of the centre, at least")
    tropical_depth_without_moisture_gpm: float = _rule(
        60.0, "gpm", "height-only archives: depth needed to call a closed low tropical")
    # strong trough: amplified trough, strong gradient, cyclonic vorticity advection
    trough_min_amplitude_gpm: float = _rule(
        50.0, "gpm", "trough depth below the zonal mean over/downstream, at least")
    trough_min_height_gradient: float = _rule(
        100.0, "gpm (1000 km)-1", "region-mean height gradient, at least")
    trough_min_vorticity_advection: float = _rule(
        3.0e-10, "s-2", "region mean of the cyclonic part of the geostrophic vorticity "
        "advection (cyclonic_advection), at least")
    trough_min_direction_deg: float = _rule(
        180.0, "degree", "area-mean 500 hPa flow (ahead of the trough) from this direction or more")
    trough_max_direction_deg: float = _rule(
        275.0, "degree", "area-mean 500 hPa flow (ahead of the trough) from this direction or less")
    # north-west flow: ridge upstream, flow from the north-west, moisture beneath
    nw_min_direction_deg: float = _rule(
        295.0, "degree", "area-mean 500 hPa flow from this direction or more")
    nw_max_direction_deg: float = _rule(
        350.0, "degree", "area-mean 500 hPa flow from this direction or less")
    nw_min_speed_ms: float = _rule(
        8.0, "m s-1", "area-mean 500 hPa geostrophic wind speed, at least")
    nw_min_ridge_gpm: float = _rule(
        100.0, "gpm", "ridge amplitude upstream (west) of the region, at least")
    nw_min_trough_gpm: float = _rule(
        80.0, "gpm", "trough amplitude over/downstream (east) of the region, at least")
    nw_min_moist_line_offset_deg: float = _rule(
        -3.0, "degree",
        "60 F dewpoint line at least this far north of the region's south edge "
        "(ignored, and said so, when moisture is missing)")
    # confidence
    direction_span_deg: float = _rule(
        20.0, "degree", "direction margin giving full confidence")
    confidence_span: float = _rule(
        0.5, "1", "relative margin past a threshold giving full confidence")

    def __post_init__(self):
        for f in fields(self):
            value = getattr(self, f.name)
            if isinstance(value, bool) or not isinstance(value, numbers.Real) \
                    or not np.isfinite(value):
                raise AnalogsInputError(
                    f"The {f.name!r} regime rule must be a finite number in "
                    f"{f.metadata['units']}. Got {value!r} instead.")
        for prefix in ("nw", "trough"):
            low = getattr(self, f"{prefix}_min_direction_deg")
            high = getattr(self, f"{prefix}_max_direction_deg")
            if not low < high:
                raise AnalogsInputError(
                    f"The regime rules need {prefix}_min_direction_deg < "
                    f"{prefix}_max_direction_deg. Got {low} and {high}.")
        if self.direction_span_deg <= 0 or self.confidence_span <= 0:
            raise AnalogsInputError(
                "The regime rules need direction_span_deg > 0 and confidence_span > 0.")

    @classmethod
    def load(cls, path: str | PathLike | None = None, **overrides) -> "RegimeRules":
        """Defaults, updated from a TOML file, then from keyword overrides."""
        values: dict = {}
        source = "keyword arguments"
        if path is not None:
            path = Path(path)
            try:
                with open(path, "rb") as handle:
                    data = tomllib.load(handle)
            except FileNotFoundError:
                raise AnalogsInputError(f"regime rules file {path} does not exist") from None
            except tomllib.TOMLDecodeError as exc:
                raise AnalogsInputError(f"regime rules file {path} is not valid TOML: {exc}") \
                    from None
            values.update(data.get("regimes", data))
            source = f"regime rules file {path}"
        known = {f.name for f in fields(cls)}
        unknown = sorted(set(values) - known)
        if unknown:
            raise AnalogsInputError(
                f"{source}: unknown key(s) {', '.join(unknown)}; "
                "see RegimeRules.describe() for the known ones")
        unknown = sorted(set(overrides) - known)
        if unknown:
            raise AnalogsInputError(
                f"unknown regime rule(s) {', '.join(unknown)}; "
                "see RegimeRules.describe() for the known ones")
        values.update(overrides)
        return cls(**values)

    @classmethod
    def describe(cls) -> pd.DataFrame:
        """Every rule with its default, units and meaning."""
        return pd.DataFrame(
            [(f.name, f.default, f.metadata["units"], f.metadata["doc"]) for f in fields(cls)],
            columns=["rule", "default", "units", "meaning"]).set_index("rule")

    def to_dict(self) -> dict:
        return dataclasses.asdict(self)


def _margin(value, threshold, span):
    """(value - threshold) / span clipped to [-1, 1]; NaN values count as -1."""
    span = np.maximum(np.asarray(span, float), 1e-30)
    with np.errstate(invalid="ignore"):
        m = (np.asarray(value, float) - threshold) / span
    return np.clip(np.nan_to_num(m, nan=-1.0), -1.0, 1.0)


def _column(frame: pd.DataFrame, name: str) -> np.ndarray:
    if name not in frame:
        return np.full(len(frame), np.nan)
    return np.asarray(frame[name], dtype=float)


class RuleClassifier:
    """Explainable regime rules on the daily diagnostics.

    Parameters
    ----------
    rules : :class:`RegimeRules`, optional (defaults when None).

    Criteria (thresholds in :class:`RegimeRules`, columns of
    :func:`~analogs.stages.diagnostics.compute_diagnostics`):

    - ``tropical``: a compact closed low near the region (``tc_present``) with
      ``tc_depth`` >= tropical_min_depth_gpm, ``tc_lat`` <= tropical_max_lat,
      ``tc_radius_km`` <= tropical_max_radius_km and ``tc_dewpoint_c`` >=
      tropical_min_dewpoint_c;
    - ``strong_trough``: ``trough_amplitude``, ``height_gradient`` and
      ``cyclonic_advection`` at least their thresholds, with the mean flow from the
      south-west (``flow_direction_deg`` in [trough_min_direction_deg,
      trough_max_direction_deg]): the region lies ahead of the trough axis;
    - ``northwest_flow``: ``flow_direction_deg`` in [nw_min_direction_deg,
      nw_max_direction_deg], ``flow_speed_ms``, ``ridge_amplitude`` (upstream) and
      ``trough_amplitude`` (downstream) at least their thresholds, and the 60 F
      dewpoint line (``moist_line_lat``) at least nw_min_moist_line_offset_deg north
      of the region's south edge.

    The margin of a criterion is ``m_i = (x_i - t_i) / s_i`` clipped to [-1, 1], with
    ``s_i`` its span: ``direction_span_deg`` for a direction (measured inside the
    window from its nearer edge), 5 degrees for the cyclone latitude and the moisture
    line, ``confidence_span`` times ``|t_i|`` otherwise. A regime holds when every
    margin is >= 0. Precedence: tropical > strong_trough > northwest_flow > other.
    Confidence:

    - a named regime: ``0.5 + 0.5 * min_i m_i`` (0.5 just at a threshold, 1 when
      every criterion is past its threshold by a full span);
    - ``other``: ``0.5 + 0.5 * min_r d_r``, where ``d_r = -min_i m_{r,i}`` is how far
      the most failing criterion of regime ``r`` falls short (1 when every named
      regime misses by a full span).

    Tropical needs moisture: with the dewpoint missing it is claimed only for a
    closed low at least ``tropical_depth_without_moisture_gpm`` deep, and the reason
    says "moisture missing". North-west flow then skips its moisture criterion and
    says so.
    """

    def __init__(self, rules: RegimeRules | None = None):
        self.rules = rules

    def _rules(self) -> RegimeRules:
        if self.rules is None:
            return RegimeRules()
        if not isinstance(self.rules, RegimeRules):
            raise AnalogsInputError(
                "The 'rules' parameter of RuleClassifier must be a RegimeRules. "
                f"Got {type(self.rules).__name__} instead.")
        return self.rules

    def margins(self, diagnostics: pd.DataFrame) -> dict[str, dict[str, np.ndarray]]:
        """Per regime, the margin of each criterion (arrays of length n_days)."""
        r = self._rules()
        rel = r.confidence_span
        d = diagnostics
        present = np.asarray(d["tc_present"], dtype=bool) if "tc_present" in d \
            else np.zeros(len(d), dtype=bool)
        depth = np.where(present, _column(d, "tc_depth"), np.nan)
        tc_td = _column(d, "tc_dewpoint_c")
        moisture_known = np.isfinite(_column(d, "dewpoint_region_c"))
        depth_needed = np.where(moisture_known, r.tropical_min_depth_gpm,
                                r.tropical_depth_without_moisture_gpm)
        tropical = {
            "depth": _margin(depth, depth_needed, rel * depth_needed),
            "latitude": _margin(-_column(d, "tc_lat"), -r.tropical_max_lat, 5.0),
            "radius": _margin(-_column(d, "tc_radius_km"), -r.tropical_max_radius_km,
                              rel * r.tropical_max_radius_km),
            "moisture": np.where(moisture_known,
                                 _margin(tc_td, r.tropical_min_dewpoint_c,
                                         rel * abs(r.tropical_min_dewpoint_c) or 1.0),
                                 1.0),
        }
        direction = _column(d, "flow_direction_deg")
        trough = {
            "direction": _margin(np.minimum(direction - r.trough_min_direction_deg,
                                            r.trough_max_direction_deg - direction),
                                 0.0, r.direction_span_deg),
            "amplitude": _margin(_column(d, "trough_amplitude"), r.trough_min_amplitude_gpm,
                                 rel * r.trough_min_amplitude_gpm),
            "gradient": _margin(_column(d, "height_gradient"), r.trough_min_height_gradient,
                                rel * r.trough_min_height_gradient),
            "vorticity_advection": _margin(_column(d, "cyclonic_advection"),
                                           r.trough_min_vorticity_advection,
                                           rel * abs(r.trough_min_vorticity_advection)),
        }
        inside = np.minimum(direction - r.nw_min_direction_deg,
                            r.nw_max_direction_deg - direction)
        south = diagnostics.attrs.get("region", (np.nan,))[0]
        offset = _column(d, "moist_line_lat") - south
        nw = {
            "direction": _margin(inside, 0.0, r.direction_span_deg),
            "speed": _margin(_column(d, "flow_speed_ms"), r.nw_min_speed_ms,
                             rel * r.nw_min_speed_ms),
            "ridge": _margin(_column(d, "ridge_amplitude"), r.nw_min_ridge_gpm,
                             rel * r.nw_min_ridge_gpm),
            "trough": _margin(_column(d, "trough_amplitude"), r.nw_min_trough_gpm,
                              rel * abs(r.nw_min_trough_gpm) or 1.0),
            # No moist air at all in the region's longitudes: the line is far south.
            "moisture": np.where(
                moisture_known,
                _margin(np.where(np.isnan(offset) & moisture_known, -90.0, offset),
                        r.nw_min_moist_line_offset_deg, 5.0),
                1.0),
        }
        return {"tropical": tropical, "strong_trough": trough, "northwest_flow": nw}

    def predict(self, diagnostics: pd.DataFrame) -> pd.DataFrame:
        """Regime, confidence and reason for each row of ``diagnostics``.

        Parameters
        ----------
        diagnostics : DataFrame from :func:`analogs.stages.diagnostics.compute_diagnostics`
            (its ``attrs["region"]`` and ``attrs["missing"]`` are used when present).

        Returns
        -------
        DataFrame with the same index and columns ``regime`` (str), ``confidence``
        (float in [0, 1]) and ``reason`` (str).
        """
        if not isinstance(diagnostics, pd.DataFrame):
            raise AnalogsInputError(
                "RuleClassifier.predict needs the DataFrame of compute_diagnostics. "
                f"Got {type(diagnostics).__name__} instead.")
        needed = {"flow_direction_deg", "flow_speed_ms", "ridge_amplitude",
                  "trough_amplitude", "height_gradient", "cyclonic_advection"}
        absent = sorted(needed - set(diagnostics.columns))
        if absent:
            raise AnalogsInputError(
                f"RuleClassifier.predict: diagnostics table lacks column(s) "
                f"{', '.join(absent)}; build it with compute_diagnostics")
        margins = self.margins(diagnostics)
        worst = {name: np.min(np.vstack(list(m.values())), axis=0)
                 for name, m in margins.items()}
        n = len(diagnostics)
        regime = np.full(n, "other", dtype=object)
        confidence = 0.5 + 0.5 * np.min(np.vstack([-w for w in worst.values()]), axis=0)
        decided = np.zeros(n, dtype=bool)
        for name in REGIME_LABELS[:-1]:
            hit = (worst[name] >= 0) & ~decided
            regime[hit] = name
            confidence[hit] = 0.5 + 0.5 * worst[name][hit]
            decided |= hit
        reasons = self._reasons(diagnostics, regime)
        return pd.DataFrame({"regime": regime.astype(str), "confidence": confidence,
                             "reason": reasons}, index=diagnostics.index)

    def _reasons(self, d: pd.DataFrame, regime: np.ndarray) -> list[str]:
        r = self._rules()
        moisture_known = np.isfinite(_column(d, "dewpoint_region_c"))
        cols = {name: _column(d, name) for name in (
            "flow_direction_deg", "flow_speed_ms", "ridge_amplitude", "trough_amplitude",
            "height_gradient", "cyclonic_advection", "tc_lat", "tc_lon", "tc_depth",
            "tc_radius_km", "tc_dewpoint_c", "dewpoint_region_c", "moist_line_lat")}
        present = np.asarray(d["tc_present"], dtype=bool) if "tc_present" in d \
            else np.zeros(len(d), dtype=bool)
        out = []
        for k, label in enumerate(regime):
            # + 0.0 turns a negative zero into zero, so "-0 gpm" never shows
            v = {name: values[k] + 0.0 for name, values in cols.items()}
            flow = f"flow {v['flow_direction_deg']:.0f} deg at {v['flow_speed_ms']:.0f} m/s"
            if moisture_known[k]:
                moist = f"Td {v['dewpoint_region_c']:.1f} C"
                if np.isfinite(v["moist_line_lat"]):
                    moist += f", 60F line {v['moist_line_lat']:.1f} N"
            else:
                moist = "moisture missing"
            low = (f"closed low {v['tc_depth']:.0f} gpm deep, r {v['tc_radius_km']:.0f} km "
                   f"at {v['tc_lat']:.1f} N {v['tc_lon']:.1f} E") if present[k] else ""
            if label == "tropical":
                core = (f"Td {v['tc_dewpoint_c']:.1f} C around it" if moisture_known[k]
                        else f"moisture missing, depth >= "
                             f"{r.tropical_depth_without_moisture_gpm:.0f} gpm")
                text = f"{low}; {core}"
            elif label == "strong_trough":
                text = (f"trough {v['trough_amplitude']:.0f} gpm; gradient "
                        f"{v['height_gradient']:.0f} gpm/1000 km; vorticity advection "
                        f"{v['cyclonic_advection']:.1e} s-2; {flow}")
            elif label == "northwest_flow":
                text = (f"{flow}; ridge {v['ridge_amplitude']:.0f} gpm upstream, trough "
                        f"{v['trough_amplitude']:.0f} gpm downstream; {moist}")
            else:
                text = (f"{flow}; ridge {v['ridge_amplitude']:.0f} gpm, trough "
                        f"{v['trough_amplitude']:.0f} gpm; {moist}")
                if low:
                    text += f"; {low}" + ("" if moisture_known[k] else
                                          " (tropical needs moisture)")
            out.append(text)
        return out


def tag_days(ds: xr.Dataset, region, *, rules: RegimeRules | None = None,
             progress: bool = False, **diagnostic_options) -> pd.DataFrame:
    """Regime of every day of an archive, with its diagnostics.

    Parameters
    ----------
    ds : canonical Dataset with ``z500`` (gpm) and optionally a moisture field.
    region : (south, north, west, east) in degrees.
    rules : :class:`RegimeRules` (defaults when None).
    progress : show a progress bar over blocks of days.
    diagnostic_options : passed to :func:`analogs.stages.diagnostics.compute_diagnostics`.

    Returns
    -------
    DataFrame, one row a day: ``date`` (datetime64), ``regime``, ``confidence``, the
    diagnostics (units in ``attrs["units"]``), then ``reason``. ``attrs["missing"]``
    lists the missing inputs (e.g. ``["moisture"]``).
    """
    diagnostics = compute_diagnostics(ds, region, progress=progress, **diagnostic_options)
    labels = RuleClassifier(rules).predict(diagnostics)
    table = pd.concat([labels[["regime", "confidence"]], diagnostics,
                       labels[["reason"]]], axis=1)
    table.index = pd.DatetimeIndex(table.index).normalize()
    table = table.rename_axis("date").reset_index()
    table.attrs = dict(diagnostics.attrs)
    return table


# ------------------------------------------------------------------ learned paths


def _pcs_array(pcs, owner: str) -> tuple[np.ndarray, pd.DatetimeIndex | None]:
    times = None
    if isinstance(pcs, xr.DataArray):
        if pcs.ndim != 2 or "time" not in pcs.dims:
            raise AnalogsInputError(
                f"{owner} needs PCs as a DataArray (time, mode). Got dims {pcs.dims}.")
        times = pd.DatetimeIndex(pcs["time"].values)
        pcs = pcs.transpose("time", ...).values
    values = np.asarray(pcs, dtype=float)
    if values.ndim != 2 or not np.all(np.isfinite(values)):
        raise AnalogsInputError(
            f"{owner} needs a finite 2-D array of PCs (time, mode). Got shape "
            f"{values.shape}.")
    return values, times


def persistence_filter(labels, min_persistence: int, times=None) -> np.ndarray:
    """Relabel runs shorter than ``min_persistence`` days to a neighbouring regime.

    Runs are read left to right; a short run takes the label of the run before it
    (the first run, of the run after it), so that every regime episode lasts at
    least ``min_persistence`` consecutive days. When ``times`` are given, a gap of
    more than one day starts a new sequence. Common practice for regime persistence
    (e.g. minimum-duration filters of weather-regime studies), no single source.
    """
    labels = np.asarray(labels).copy()
    if min_persistence <= 1 or labels.size == 0:
        return labels
    if times is None:
        breaks = np.array([0, labels.size])
    else:
        gap = np.diff(pd.DatetimeIndex(times).values).astype("timedelta64[h]") \
            > np.timedelta64(24, "h")
        breaks = np.concatenate([[0], np.nonzero(gap)[0] + 1, [labels.size]])
    for a, b in zip(breaks[:-1], breaks[1:]):
        segment = labels[a:b]
        change = np.nonzero(segment[1:] != segment[:-1])[0] + 1
        starts = np.concatenate([[0], change])
        ends = np.concatenate([change, [segment.size]])
        merged: list[list] = []
        for s, e in zip(starts, ends):
            if merged and (merged[-1][0] == segment[s] or e - s < min_persistence):
                merged[-1][2] = e
            else:
                merged.append([segment[s], s, e])
        if len(merged) > 1 and merged[0][2] - merged[0][1] < min_persistence:
            first = merged.pop(0)
            merged[0][1] = first[1]
        for label, s, e in merged:
            segment[s:e] = label
    return labels


class KMeansRegimes:
    """Unsupervised regimes: k-means on the PCs, then a minimum-persistence filter.

    Parameters
    ----------
    n_regimes : number of clusters.
    min_persistence : shortest regime episode in days (1 disables the filter).
    random_state : seed of the k-means initialisation.

    Learned: ``cluster_centers_`` (n_regimes, n_modes), ``labels_`` (filtered labels of
    the training days). ``predict`` needs only the centroids: the nearest centroid in
    Euclidean distance (as ``sklearn.cluster.KMeans.predict``), then the filter.
    Reference: Michelangeli, Vautard & Legras (1995, J. Atmos. Sci.), weather regimes
    by k-means in EOF space (from memory).
    """

    def __init__(self, n_regimes: int = 6, *, min_persistence: int = 2, random_state=0):
        self.n_regimes = n_regimes
        self.min_persistence = min_persistence
        self.random_state = random_state

    def fit(self, pcs) -> "KMeansRegimes":
        from sklearn.cluster import KMeans

        check_int(self.n_regimes, "n_regimes", "KMeansRegimes", min_value=2)
        check_int(self.min_persistence, "min_persistence", "KMeansRegimes", min_value=1)
        values, times = _pcs_array(pcs, "KMeansRegimes.fit")
        if values.shape[0] < self.n_regimes:
            raise AnalogsInputError(
                f"KMeansRegimes.fit needs at least n_regimes={self.n_regimes} days; "
                f"got {values.shape[0]}")
        model = KMeans(self.n_regimes, n_init=10, random_state=self.random_state).fit(values)
        self.cluster_centers_ = model.cluster_centers_.copy()
        self.labels_ = persistence_filter(model.labels_, self.min_persistence, times)
        return self

    def _check_fitted(self):
        if not hasattr(self, "cluster_centers_"):
            raise NotFittedError("KMeansRegimes is not fitted; call fit(pcs) first")

    def assign(self, pcs) -> np.ndarray:
        """Nearest centroid of each day, without the persistence filter."""
        self._check_fitted()
        values, _ = _pcs_array(pcs, "KMeansRegimes.assign")
        if values.shape[1] != self.cluster_centers_.shape[1]:
            raise AnalogsInputError(
                f"KMeansRegimes: PCs have {values.shape[1]} modes, the model "
                f"{self.cluster_centers_.shape[1]}")
        distance = ((values[:, None, :] - self.cluster_centers_[None, :, :]) ** 2).sum(-1)
        return np.argmin(distance, axis=1)

    def predict(self, pcs) -> np.ndarray:
        """Regime index of each day (consecutive days), persistence-filtered."""
        times = pd.DatetimeIndex(pcs["time"].values) if isinstance(pcs, xr.DataArray) \
            else None
        return persistence_filter(self.assign(pcs), self.min_persistence, times)

    def to_dataset(self) -> xr.Dataset:
        self._check_fitted()
        return xr.Dataset(
            {"cluster_centers": (("regime", "mode"), self.cluster_centers_,
                                 {"long_name": "k-means centroids in PC space"})},
            coords={"regime": np.arange(self.n_regimes), "mode": np.arange(
                self.cluster_centers_.shape[1])},
            attrs={"model": "KMeansRegimes", "n_regimes": self.n_regimes,
                   "min_persistence": self.min_persistence,
                   "random_state": -1 if self.random_state is None else self.random_state,
                   "analogs_version": __version__,
                   "created": pd.Timestamp.now("UTC").isoformat()})

    @classmethod
    def from_dataset(cls, ds: xr.Dataset) -> "KMeansRegimes":
        if ds.attrs.get("model") != "KMeansRegimes" or "cluster_centers" not in ds:
            raise AnalogsInputError("dataset is not a saved KMeansRegimes (no cluster_centers)")
        seed = int(ds.attrs["random_state"])
        model = cls(int(ds.attrs["n_regimes"]), min_persistence=int(ds.attrs["min_persistence"]),
                    random_state=None if seed < 0 else seed)
        model.cluster_centers_ = np.asarray(ds["cluster_centers"].values, dtype=float).copy()
        return model


def read_labelled_days(table, times, allowed=REGIME_LABELS) -> pd.Series:
    """A labelled-days table (``date,regime``; CSV/Parquet path or DataFrame) as a
    Series indexed by date, checked against the archive days and allowed labels."""
    source = "labelled-days table"
    if isinstance(table, (str, PathLike)):
        path = Path(table)
        source = f"labelled-days file {path}"
        if not path.exists():
            raise AnalogsInputError(f"{source} does not exist")
        table = pd.read_parquet(path) if path.suffix == ".parquet" else pd.read_csv(path)
    if not isinstance(table, pd.DataFrame) or not {"date", "regime"} <= set(table.columns):
        raise AnalogsInputError(f"{source} must have columns date,regime")
    try:
        dates = pd.DatetimeIndex(pd.to_datetime(table["date"])).normalize()
    except (ValueError, TypeError) as exc:
        raise AnalogsInputError(f"{source}: column 'date' is not dates ({exc})") from None
    labels = table["regime"].astype(str).to_numpy()
    unknown = sorted(set(labels) - set(allowed))
    if unknown:
        raise AnalogsInputError(
            f"{source}: unknown regime label(s) {', '.join(unknown)}; expected one of "
            f"{', '.join(allowed)}")
    archive_days = pd.DatetimeIndex(times).normalize()
    absent = dates[~dates.isin(archive_days)]
    if len(absent):
        shown = ", ".join(str(d.date()) for d in absent[:5])
        more = f" and {len(absent) - 5} more" if len(absent) > 5 else ""
        raise AnalogsInputError(f"{source}: date(s) not in the archive: {shown}{more}")
    return pd.Series(labels, index=dates, name="regime")


class SupervisedRegimes:
    """Supervised regimes: logistic regression on standardised PCs.

    Parameters
    ----------
    C : inverse regularisation strength of ``sklearn.linear_model.LogisticRegression``.
    max_iter : iterations of its lbfgs solver.
    labels : allowed labels of the training table (default :data:`REGIME_LABELS`).

    Learned: ``classes_``, ``coef_`` (n_classes or 1, n_modes), ``intercept_``,
    ``mean_`` and ``scale_`` (standardisation of the PCs). ``predict`` and
    ``predict_proba`` use only these arrays: the decision is
    :math:`X_s W^T + b` with :math:`X_s = (X - \\mu)/\\sigma`; softmax over classes
    (multinomial) or the logistic function with two classes, as scikit-learn does.
    """

    def __init__(self, C: float = 1.0, *, max_iter: int = 1000, labels=REGIME_LABELS):
        self.C = C
        self.max_iter = max_iter
        self.labels = labels

    def fit(self, pcs: xr.DataArray, labelled_days) -> "SupervisedRegimes":
        """Fit on the archive PCs (time, mode) and a labelled-days table."""
        from sklearn.linear_model import LogisticRegression

        if not isinstance(pcs, xr.DataArray):
            raise AnalogsInputError(
                "SupervisedRegimes.fit needs the PCs as a DataArray (time, mode), to "
                "match labelled dates")
        values, times = _pcs_array(pcs, "SupervisedRegimes.fit")
        target = read_labelled_days(labelled_days, times, tuple(self.labels))
        rows = pd.DatetimeIndex(times).normalize().get_indexer(target.index)
        if np.unique(target.to_numpy()).size < 2:
            raise AnalogsInputError(
                "labelled-days table: at least two different regimes are needed to train")
        x = values[rows]
        self.mean_ = x.mean(axis=0)
        self.scale_ = np.where(x.std(axis=0) > 0, x.std(axis=0), 1.0)
        model = LogisticRegression(C=self.C, max_iter=self.max_iter)
        model.fit((x - self.mean_) / self.scale_, target.to_numpy())
        self.classes_ = model.classes_.astype(str)
        self.coef_ = model.coef_.copy()
        self.intercept_ = model.intercept_.copy()
        return self

    def _check_fitted(self):
        if not hasattr(self, "coef_"):
            raise NotFittedError("SupervisedRegimes is not fitted; call fit(pcs, table) first")

    def decision_function(self, pcs) -> np.ndarray:
        self._check_fitted()
        values, _ = _pcs_array(pcs, "SupervisedRegimes")
        if values.shape[1] != self.coef_.shape[1]:
            raise AnalogsInputError(
                f"SupervisedRegimes: PCs have {values.shape[1]} modes, the model "
                f"{self.coef_.shape[1]}")
        scores = ((values - self.mean_) / self.scale_) @ self.coef_.T + self.intercept_
        return scores[:, 0] if scores.shape[1] == 1 else scores

    def predict_proba(self, pcs) -> np.ndarray:
        scores = self.decision_function(pcs)
        if scores.ndim == 1:
            p = 1.0 / (1.0 + np.exp(-scores))
            return np.column_stack([1.0 - p, p])
        scores = scores - scores.max(axis=1, keepdims=True)
        expo = np.exp(scores)
        return expo / expo.sum(axis=1, keepdims=True)

    def predict(self, pcs) -> np.ndarray:
        return self.classes_[np.argmax(self.predict_proba(pcs), axis=1)]

    def to_dataset(self) -> xr.Dataset:
        self._check_fitted()
        n_rows = self.coef_.shape[0]
        return xr.Dataset(
            {"coef": (("row", "mode"), self.coef_),
             "intercept": (("row",), self.intercept_),
             "classes": (("class",), self.classes_.astype(str)),
             "mean": (("mode",), self.mean_),
             "scale": (("mode",), self.scale_)},
            coords={"row": np.arange(n_rows), "mode": np.arange(self.coef_.shape[1])},
            attrs={"model": "SupervisedRegimes", "C": float(self.C),
                   "max_iter": int(self.max_iter), "labels": ",".join(self.labels),
                   "analogs_version": __version__,
                   "created": pd.Timestamp.now("UTC").isoformat()})

    @classmethod
    def from_dataset(cls, ds: xr.Dataset) -> "SupervisedRegimes":
        if ds.attrs.get("model") != "SupervisedRegimes" or "coef" not in ds:
            raise AnalogsInputError("dataset is not a saved SupervisedRegimes (no coef)")
        model = cls(float(ds.attrs["C"]), max_iter=int(ds.attrs["max_iter"]),
                    labels=tuple(str(ds.attrs["labels"]).split(",")))
        model.coef_ = np.asarray(ds["coef"].values, float).copy()
        model.intercept_ = np.asarray(ds["intercept"].values, float).copy()
        model.classes_ = np.asarray(ds["classes"].values).astype(str)
        model.mean_ = np.asarray(ds["mean"].values, float).copy()
        model.scale_ = np.asarray(ds["scale"].values, float).copy()
        return model
