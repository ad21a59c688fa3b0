"""Put scanned positions onto a regular grid.

A scan visits positions ``origin + k·step`` (k integer) with some jitter. From
the distinct positions seen along one axis we find the grid lines (clusters of
nearly equal positions), the step (the typical spacing of neighbouring lines)
and the integer index of every position. Missing grid lines are allowed (the
cube gets NaN there); positions that do not sit within ``tolerance·step`` of a
grid line raise :class:`~pmap.errors.FormatError`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import FormatError

#: Default largest distance of a position from its grid line, as a fraction of the step.
DEFAULT_TOLERANCE = 0.15


@dataclass(frozen=True)
class Grid:
    """A regular 1-D grid: ``origin + step * arange(n)`` (same units as the positions)."""

    origin: float
    step: float
    n: int

    @property
    def values(self) -> np.ndarray:
        return self.origin + self.step * np.arange(self.n)

    def index(self, positions: np.ndarray, *, tolerance: float, axis: str) -> np.ndarray:
        """Integer grid index of each position; FormatError if one is off the grid."""
        pos = np.asarray(positions, dtype=float)
        if not np.all(np.isfinite(pos)):
            raise FormatError(f"{axis} positions contain missing or non-finite values")
        k = np.rint((pos - self.origin) / self.step)
        off = np.abs(pos - (self.origin + k * self.step))
        bad = (off > tolerance * self.step) | (k < 0) | (k >= self.n)
        if np.any(bad):
            i = int(np.flatnonzero(bad)[0])
            raise FormatError(
                f"{axis} position {pos[i]:g} does not fit the regular grid "
                f"(origin {self.origin:g}, step {self.step:g}; off by {off[i] / self.step:.2f} "
                f"steps, tolerance {tolerance:g}): the points are not on a regular grid"
            )
        return k.astype(np.int64)


def infer_grid(
    positions: np.ndarray,
    *,
    step: float | None = None,
    tolerance: float = DEFAULT_TOLERANCE,
    min_fill: float = 0.5,
    axis: str = "x",
) -> Grid:
    """Infer the regular grid behind scanned positions along one axis.

    Parameters
    ----------
    positions : array_like
        Positions along the axis (any order, repeats allowed), e.g. in µm.
    step : float, optional
        Known step (pixel size); inferred from the positions when omitted.
    tolerance : float
        Largest allowed distance of a position from its grid line, as a fraction
        of the step (default 0.15).
    min_fill : float
        Smallest fraction of grid lines (columns or rows) that must hold at least
        one position; sparser sets are not a scan grid (default 0.5). Missing
        pixels are fine; whole missing columns beyond this are not.
    axis : str
        Axis name used in error messages.

    Returns
    -------
    Grid
        Origin (first grid line), step and number of grid lines.

    Raises
    ------
    FormatError
        Positions that do not fit one regular grid, or a grid that is almost empty.
    """
    u = np.unique(np.asarray(positions, dtype=float))
    if not np.all(np.isfinite(u)):
        raise FormatError(f"{axis} positions contain missing or non-finite values")
    if u.size == 0:
        raise FormatError(f"no {axis} positions")
    if step is not None and not step > 0:
        raise FormatError(f"{axis} step must be positive, got {step}")
    if u.size == 1:
        return Grid(float(u[0]), float(step) if step else 1.0, 1)
    fit = None
    for cand in [float(step)] if step is not None else _candidates(np.diff(u)):
        fit = _fit(u, cand, tolerance)
        if fit is not None:
            break  # the largest step that fits; finer ones would leave lines empty
    if fit is None:
        if step is not None:
            raise FormatError(
                f"{axis} positions do not fit a regular grid of step {step:g} "
                f"(tolerance {tolerance:g} of a step): the points are not on a regular grid"
            )
        if np.ptp(u) <= 2 * tolerance * np.max(np.diff(u)) or u.size == 2:
            return Grid(float(u.mean()), 1.0, 1)
        raise FormatError(
            f"{axis} positions do not fit any regular grid within {tolerance:g} of a step: "
            "the points are not on a regular grid"
        )
    origin, found, k = fit
    # snap away float noise (1e-16 offsets) so exact grids give exact coordinates
    found = float(f"{found:.10g}")
    origin = round(origin / found, 6) * found
    n = int(k[-1]) + 1
    filled = np.unique(k).size
    if n > 1 and filled / n < min_fill:
        raise FormatError(
            f"{axis} positions do not form a regular grid: with step {found:g} only "
            f"{filled} of {n} grid lines would be filled"
        )
    grid = Grid(origin, found, n)
    grid.index(u, tolerance=tolerance, axis=axis)  # raises if any position is off-grid
    return grid


def _candidates(d: np.ndarray) -> list[float]:
    """Candidate steps from neighbour spacings, largest first (one per 2 % bin)."""
    d = d[d > 0]
    bins = np.rint(np.log(d) / 0.02)
    out = []
    for b in np.unique(bins)[::-1]:
        out.append(float(np.median(d[bins == b])))
    return out


def _fit(u: np.ndarray, step: float, tolerance: float):
    """Index sorted positions by neighbour spacing, fit origin and step; None if off-grid."""
    k = np.concatenate([[0.0], np.cumsum(np.rint(np.diff(u) / step))])
    if k[-1] == 0:
        return None
    slope, origin = np.polyfit(k, u, 1)
    if not slope > 0:
        return None
    resid = np.abs(u - (origin + k * slope))
    if resid.max() > tolerance * slope:
        return None
    k0 = k - k.min()
    return float(origin + k.min() * slope), float(slope), k0.astype(np.int64)
