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

#: Ratio between the spacing of grid lines and the spread within a line above
#: which small differences are read as jitter rather than as grid steps.
_JITTER_RATIO = 3.0


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
    tolerance: float = 0.25,
    min_fill: float = 0.02,
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
        of the step (default 0.25).
    min_fill : float
        Smallest fraction of grid lines that must hold at least one position;
        sparser sets are not a scan grid (default 0.02).
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
    if u.size == 1:
        return Grid(float(u[0]), float(step) if step else 1.0, 1)
    if step is not None:
        if not step > 0:
            raise FormatError(f"{axis} step must be positive, got {step}")
        centres = u
    else:
        d = np.diff(u)
        ds = np.sort(d)
        ratios = ds[1:] / np.maximum(ds[:-1], np.finfo(float).tiny)
        split = None
        if ratios.size and ratios.max() >= _JITTER_RATIO:
            j = int(np.argmax(ratios))
            split = ds[j]  # largest within-line spacing
        if split is None:
            centres = u
        else:
            breaks = np.flatnonzero(d > split)
            groups = np.split(u, breaks + 1)
            centres = np.array([g.mean() for g in groups])
        if centres.size == 1:
            return Grid(float(centres[0]), 1.0, 1)
        cd = np.diff(centres)
        base = cd.min()
        near = cd[cd < 1.5 * base]
        step = float(np.median(near))
    origin = float(centres[0])
    k = np.rint((centres - origin) / step)
    if centres.size > 2 and k[-1] > 0:
        # refine the step by least squares through all grid lines
        step = float(np.polyfit(k, centres, 1)[0])
        origin = float(np.mean(centres - k * step))
    # snap away float noise (1e-16 offsets) so exact grids give exact coordinates
    step = float(f"{step:.10g}")
    origin = round(origin / step, 6) * step
    n = int(k[-1]) + 1
    if n > 1 and np.unique(k).size / n < min_fill:
        raise FormatError(
            f"{axis} positions do not form a regular grid: with step {step:g} only "
            f"{np.unique(k).size} of {n} grid lines would be filled"
        )
    grid = Grid(origin, step, n)
    grid.index(u, tolerance=tolerance, axis=axis)  # raises if any position is off-grid
    return grid
