"""The hidden trigger: a daily cap-breaking index that is never written to the archive.

Whether storms start where the ingredients are favourable also depends on something the
archive does not show (the strength of the cap, low-level convergence, outflow from last
night's storms). The demo models it as a standard-normal field ``h`` with its own
correlation in space and time:

- nodes every :data:`NODE_SPACING_DEG` degrees (5 degrees, about 500 km) over the domain
  and one node beyond each edge, each an AR(1) series with lag-one coefficient
  :data:`NODE_AR` (0.6 a day: a cap holds for a day or two);
- bilinear interpolation between the nodes, divided by the square root of the sum of the
  squared weights, so ``h`` has unit variance at every grid point and does not depend on
  the grid spacing (the nodes are fixed in degrees).

The trigger factor is :math:`T = \\mathrm{logistic}((h - h_0) / w)` with
:data:`TRIGGER_THRESHOLD` h0 = 0.6 and :data:`TRIGGER_WIDTH` w = 0.3: storms start where
the cap breaks, on about a third of the area on an average day.
"""

from __future__ import annotations

import numpy as np

from .geography import logistic

NODE_SPACING_DEG = 5.0
NODE_AR = 0.6
TRIGGER_THRESHOLD = 1.3
TRIGGER_WIDTH = 0.3


def _nodes(start, stop):
    return np.arange(start - NODE_SPACING_DEG, stop + 2.0 * NODE_SPACING_DEG, NODE_SPACING_DEG)


def _linear_weights(points, nodes):
    """Matrix (points, nodes) of 1-D linear interpolation weights."""
    position = np.clip((np.asarray(points) - nodes[0]) / NODE_SPACING_DEG, 0.0, nodes.size - 1.000001)
    left = np.floor(position).astype(int)
    frac = position - left
    weights = np.zeros((position.size, nodes.size))
    weights[np.arange(position.size), left] = 1.0 - frac
    weights[np.arange(position.size), left + 1] = frac
    return weights


class HiddenTrigger:
    """Interpolation from the trigger's nodes to a grid (lat1d, lon1d), both ascending."""

    def __init__(self, lat1d, lon1d):
        lat_nodes = _nodes(float(np.min(lat1d)), float(np.max(lat1d)))
        lon_nodes = _nodes(float(np.min(lon1d)), float(np.max(lon1d)))
        self.lat_weights = _linear_weights(lat1d, lat_nodes)
        self.lon_weights = _linear_weights(lon1d, lon_nodes)
        self.norm = np.outer(np.sqrt((self.lat_weights ** 2).sum(axis=1)),
                             np.sqrt((self.lon_weights ** 2).sum(axis=1)))
        self.node_shape = (lat_nodes.size, lon_nodes.size)

    def start(self, rng):
        """Node values drawn from the stationary law (standard normal)."""
        return rng.normal(size=self.node_shape)

    def step(self, nodes, rng):
        """One day of the AR(1) node series with unit stationary variance."""
        return NODE_AR * nodes + np.sqrt(1.0 - NODE_AR ** 2) * rng.normal(size=self.node_shape)

    def field(self, nodes):
        """The standard-normal field h on the grid: nodes (..., n_lat_nodes, n_lon_nodes)."""
        return (self.lat_weights @ nodes @ self.lon_weights.T) / self.norm


def trigger_factor(h):
    """Share of favourable area where storms start: logistic((h - 0.6) / 0.3), 0-1."""
    return logistic((np.asarray(h) - TRIGGER_THRESHOLD) / TRIGGER_WIDTH)
