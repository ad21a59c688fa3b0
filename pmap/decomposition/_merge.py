"""How many regions: over-cluster, then merge what is one population.

A map is first cut into more clusters than it can hold (k-means, 16 by default).
Two clusters are then *one emission type* when any of these holds, each measured on
the axis that separates them best (Fisher's discriminant, pooled within-cluster
s.d. 1):

* **continuity across their border**: over 4-neighbour pixel pairs with one pixel in
  each cluster, the median step along that axis is less than ``continuity`` (3) times
  the median step between neighbours inside the clusters (a gradient or a texture cut
  in two by k-means changes smoothly across the cut; two types jump);
* **no density valley**: the smoothed density of both clusters' pixels at its lowest
  point between the two medians exceeds ``valley_ratio`` (0.8) of the lower of the
  two peaks beside it;
* **a smooth spatial trend explains the difference**: in the least-squares fit
  ``t = poly₄(y, x) + δ·[pixel in the second cluster]`` the membership step δ is
  less than ``separation`` (6) residual s.d. (a line that drifts across the map,
  sampled by grains far apart, is one type).

This is merging of mixture components by unimodality of the discriminant projection
(Hennig, Adv. Data Anal. Classif. 4, 3 (2010), the "ridgeline"/"dip" family, with a
density-valley ratio in place of the dip test of Hartigan & Hartigan, Ann. Stat. 13,
70 (1985)), extended by two spatial terms because a PL map's gradients are smooth in
space. Merging is greedy, least separated pair first (each criterion mapped onto the
scale of δ/σ, the smallest counts), until every pair left is separated.

Afterwards a group of fewer pixels than a region needs joins the group it is least
separated from, and a group whose mean spectrum is a non-negative mix of two pieces
of two other groups (mixed pixels along borders: laser spot, carrier diffusion) is
not a region: its pixels go to the nearest remaining cluster.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.ndimage import gaussian_filter1d

#: Default separation threshold (membership step over residual s.d.).
SEPARATION = 6.0
#: Default valley ratio above which two clusters are one population.
VALLEY_RATIO = 0.8
#: Degree of the polynomial spatial trend (in y and x) of the merge test.
TREND_ORDER = 4
#: A group whose mean spectrum is a two-piece mix within this relative residual is mixed pixels.
MIXTURE_TOLERANCE = 0.1


def fisher_direction(za: np.ndarray, zb: np.ndarray, ridge: float = 1e-3) -> np.ndarray:
    """Fisher's discriminant axis of two clusters, scaled to unit pooled s.d."""
    na, nb = len(za), len(zb)
    m = za.shape[1]
    ca = np.cov(za.T, bias=True).reshape(m, m) if na > 1 else np.zeros((m, m))
    cb = np.cov(zb.T, bias=True).reshape(m, m) if nb > 1 else np.zeros((m, m))
    sw = (ca * na + cb * nb) / (na + nb)
    tr = np.trace(sw) / m
    sw = sw + (ridge * tr if tr > 0 else 1e-12) * np.eye(m)
    d = zb.mean(axis=0) - za.mean(axis=0)
    w = np.linalg.solve(sw, d)
    norm = np.sqrt(max(float(w @ sw @ w), 1e-300))
    return w / norm


def fisher_projection(za: np.ndarray, zb: np.ndarray, ridge: float = 1e-3):
    """Project two clusters on Fisher's discriminant axis, scaled to unit pooled s.d."""
    w = fisher_direction(za, zb, ridge)
    return za @ w, zb @ w


#: Rows of each cluster used by the trend fit and the density valley.
MAX_ROWS = 3000


def _thin(n: int) -> slice:
    return slice(None, None, max(1, -(-n // MAX_ROWS)))


def trend_design(pos: np.ndarray, order: int = 2) -> np.ndarray:
    """Columns 1, y, x, y², xy, x², … up to ``order`` of positions (n, 2) in [0, 1]."""
    y, x = pos[:, 0], pos[:, 1]
    cols = [np.ones_like(y)]
    for deg in range(1, order + 1):
        for i in range(deg + 1):
            cols.append(y**i * x ** (deg - i))
    return np.stack(cols, axis=1)


def valley(ta: np.ndarray, tb: np.ndarray) -> float:
    """Density at the lowest point between the clusters' medians over the lower side peak.

    Gaussian-smoothed histogram, bandwidth 0.9·n^(−1/5) within-cluster s.d.
    (Silverman's rule for unit s.d.).
    """
    t = np.concatenate([ta, tb])
    h = 0.9 * len(t) ** -0.2
    lo, hi = float(t.min()) - 3 * h, float(t.max()) + 3 * h
    nb = int(np.clip((hi - lo) / (h / 4), 16, 4096))
    cnt, edges = np.histogram(t, nb, range=(lo, hi))
    bw = edges[1] - edges[0]
    f = gaussian_filter1d(cnt.astype(float), h / bw)
    c = 0.5 * (edges[1:] + edges[:-1])
    a, b = sorted((float(np.median(ta)), float(np.median(tb))))
    sel = (c >= a) & (c <= b)
    if not sel.any():
        return 1.0
    iv = np.flatnonzero(sel)[np.argmin(f[sel])]
    peak = min(f[: iv + 1].max(), f[iv:].max())
    return float(f[iv] / peak) if peak > 0 else 1.0


#: Border jump over the within-cluster neighbour step below which two clusters are continuous.
CONTINUITY = 3.0
#: Border pixel pairs needed before the continuity test speaks.
MIN_BORDER_PAIRS = 8
#: Relative difference of the unit-area spectra on the two sides of a border below
#: which two clusters are one emission type however significant the difference.
MIN_DIFFERENCE = 0.1


@dataclass
class MergeData:
    """What the merge tests look at: features (n, m), positions (n, 2) in [0, 1], and
    4-neighbour pixel pairs (p, 2) of row indices (both pixels fitted)."""

    feats: np.ndarray
    pos: np.ndarray
    pairs: np.ndarray
    separation: float = SEPARATION
    valley_ratio: float = VALLEY_RATIO
    continuity: float = CONTINUITY
    order: int = TREND_ORDER
    #: Maps shape features (n, k) to unit-area spectra (n, C), or None.
    to_spectra: Any = None
    n_shape: int = 0
    min_difference: float = MIN_DIFFERENCE


def pair_score(data: MergeData, ra: np.ndarray, rb: np.ndarray):
    """(score, δ/σ, valley ratio, border jump ratio or NaN) of two clusters given by
    their row indices; score < ``data.separation`` means one emission type."""
    za, zb = data.feats[ra], data.feats[rb]
    w = fisher_direction(za, zb)
    ta, tb = za @ w, zb @ w
    # The trend fit and the density use at most MAX_ROWS rows of each cluster (evenly
    # spaced in the sample's order, so the choice is reproducible).
    sa, sb = _thin(len(ra)), _thin(len(rb))
    t = np.concatenate([ta[sa], tb[sb]])
    ind = np.concatenate([np.zeros(len(ta[sa])), np.ones(len(tb[sb]))])
    design = np.column_stack(
        [trend_design(np.concatenate([data.pos[ra[sa]], data.pos[rb[sb]]]), data.order), ind]
    )
    gram = design.T @ design
    gram += 1e-10 * np.trace(gram) / len(gram) * np.eye(len(gram))
    coef = np.linalg.solve(gram, design.T @ t)  # normal equations: a (p x p) solve, p <= 16
    res = t - design @ coef
    dof = max(len(t) - design.shape[1], 1)
    sd = np.sqrt(max(float(res @ res) / dof, 1e-300))
    sep = abs(float(coef[-1])) / sd
    scores = [sep]
    r = valley(ta[sa], tb[sb])
    if r > data.valley_ratio and data.valley_ratio < 1:
        scores.append(data.separation * (1.0 - r) / (1.0 - data.valley_ratio))
    jump, diff = border_jump(data, ra, rb, np.concatenate([ta, tb]))
    if np.isfinite(jump):
        scores.append(data.separation * jump / data.continuity)
    if np.isfinite(diff) and data.min_difference > 0:
        scores.append(data.separation * diff / data.min_difference)
    return min(scores), sep, r, jump, diff


def border_jump(data: MergeData, ra: np.ndarray, rb: np.ndarray, t: np.ndarray):
    """(jump ratio, spectral difference) across the A–B border; NaN with too few pairs.

    Jump ratio: median |Δt| over neighbour pairs straddling the border over the median
    |Δt| of neighbour pairs inside A or inside B (``t``: projections of the rows ``ra``
    then ``rb``). Spectral difference: |s̄_A − s̄_B| / |s̄_A| of the mean unit-area
    spectra of the border pixels on each side (when ``data.to_spectra`` is given).
    """
    pairs = data.pairs
    nan = float("nan")
    if pairs.size == 0:
        return nan, nan
    n = len(data.feats)
    side = np.zeros(n, dtype=np.int8)
    side[ra], side[rb] = 1, 2
    val = np.zeros(n)
    val[ra], val[rb] = t[: len(ra)], t[len(ra) :]
    s0, s1 = side[pairs[:, 0]], side[pairs[:, 1]]
    border = (s0 > 0) & (s1 > 0) & (s0 != s1)
    inside = (s0 > 0) & (s0 == s1)
    if border.sum() < MIN_BORDER_PAIRS or inside.sum() < MIN_BORDER_PAIRS:
        return nan, nan
    d = np.abs(val[pairs[:, 0]] - val[pairs[:, 1]])
    ref = float(np.median(d[inside]))
    jump = float(np.median(d[border]) / ref) if ref > 0 else float("inf")
    diff = nan
    if data.to_spectra is not None:
        bp = pairs[border]
        a_rows = np.where(s0[border] == 1, bp[:, 0], bp[:, 1])
        b_rows = np.where(s0[border] == 1, bp[:, 1], bp[:, 0])
        k = data.n_shape
        sa = data.to_spectra(data.feats[a_rows, :k].mean(axis=0)[None, :])[0]
        sb = data.to_spectra(data.feats[b_rows, :k].mean(axis=0)[None, :])[0]
        norm = float(np.linalg.norm(sa)) or 1.0
        diff = float(np.linalg.norm(sa - sb) / norm)
    return jump, diff


@dataclass
class MergeState:
    """Groups of over-clusters after some merges, and the score of the last merge."""

    groups: dict[int, list[int]]
    score: float
    detail: tuple = ()


def merge_history(data: MergeData, lab: np.ndarray, clusters) -> list[MergeState]:
    """Greedy merges of the over-clusters ``clusters`` (ids in ``lab``, one per row; rows
    of other ids take no part) down to one group; states[0] is the start."""
    groups = {int(j): [int(j)] for j in clusters if np.any(lab == j)}
    idx = {j: np.flatnonzero(lab == j) for j in groups}
    states = [MergeState({g: list(v) for g, v in groups.items()}, 0.0)]
    cache: dict[tuple[int, int], tuple] = {}
    while len(groups) > 1:
        keys = sorted(groups)
        best, pair = np.inf, (keys[0], keys[1])
        for i, a in enumerate(keys):
            for b in keys[i + 1 :]:
                if (a, b) not in cache:
                    cache[(a, b)] = pair_score(data, idx[a], idx[b])
                if cache[(a, b)][0] < best:
                    best, pair = cache[(a, b)][0], (a, b)
        a, b = pair
        detail = cache[pair][1:]
        idx[a] = np.concatenate([idx[a], idx.pop(b)])
        groups[a] = groups[a] + groups.pop(b)
        cache = {k: v for k, v in cache.items() if a not in k and b not in k}
        states.append(MergeState({g: list(v) for g, v in groups.items()}, float(best), detail))
    return states


def group_labels(lab: np.ndarray, groups: dict[int, list[int]], n0: int) -> np.ndarray:
    m = np.full(n0, -1)
    for g, members in groups.items():
        m[members] = g
    return m[lab]


def _two_end_fit(c: np.ndarray, a: np.ndarray, b: np.ndarray) -> tuple[float, float, float]:
    """Non-negative least squares c ≈ u·a + v·b; returns (relative residual, u, v)."""
    g = np.array([[a @ a, a @ b], [a @ b, b @ b]])
    r = np.array([a @ c, b @ c])
    best = (np.inf, 0.0, 0.0)
    try:
        u, v = np.linalg.solve(g, r)
        if u >= 0 and v >= 0:
            best = (float(np.linalg.norm(c - u * a - v * b)), float(u), float(v))
    except np.linalg.LinAlgError:
        pass
    for u, v in ((max(r[0], 0) / g[0, 0] if g[0, 0] > 0 else 0.0, 0.0),
                 (0.0, max(r[1], 0) / g[1, 1] if g[1, 1] > 0 else 0.0)):
        res = float(np.linalg.norm(c - u * a - v * b))
        if res < best[0]:
            best = (res, float(u), float(v))
    norm = float(np.linalg.norm(c)) or 1.0
    return best[0] / norm, best[1], best[2]


def mixed_groups(
    piece_means: np.ndarray,
    piece_sizes: np.ndarray,
    groups: dict[int, list[int]],
    *,
    tolerance: float = MIXTURE_TOLERANCE,
    keep: set | frozenset = frozenset(),
) -> dict[int, str]:
    """Groups of mixed pixels: their mean spectrum is a non-negative mix of two pieces.

    ``piece_means`` (n0, C) are the mean spectra of the over-clusters, ``groups`` maps
    a group to its over-clusters. Group g is *mixed pixels* when its mean spectrum c
    is within ``tolerance`` (relative residual) of u·a + v·b, u, v > 0 and each term at
    least 5 % of |c|, where a and b are the mean spectra of two over-clusters of two
    different other groups, each larger than g or in ``keep`` (the no-emission
    continuum). Spectra add linearly, so pixels straddling a border (laser spot,
    carrier diffusion) are such mixes; local pieces (not whole-group means) are used
    so that a group with a gradient offers the part of it that borders g.
    """
    owner = {m: g for g, members in groups.items() for m in members}
    size = {g: float(sum(piece_sizes[m] for m in members)) for g, members in groups.items()}
    out: dict[int, str] = {}
    for g in sorted(groups, key=lambda k: (size[k], k)):
        if g in keep or size[g] <= 0:
            continue
        w = np.array([piece_sizes[m] for m in groups[g]], dtype=float)
        c = (w[:, None] * piece_means[groups[g]]).sum(axis=0) / w.sum()
        ends = [m for m, h in owner.items()
                if h != g and h not in out and (size[h] > size[g] or h in keep)]
        best = None
        for i, a in enumerate(ends):
            for b in ends[i + 1 :]:
                if owner[a] == owner[b]:
                    continue
                res, u, v = _two_end_fit(c, piece_means[a], piece_means[b])
                cn = float(np.linalg.norm(c)) or 1.0
                if (u * np.linalg.norm(piece_means[a]) < 0.05 * cn
                        or v * np.linalg.norm(piece_means[b]) < 0.05 * cn):
                    continue
                if best is None or res < best[0]:
                    best = (res, owner[a], owner[b])
        if best is not None and best[0] < tolerance:
            out[g] = (f"mixed pixels: mean spectrum within {best[0]:.0%} of a mix of groups "
                      f"{best[1]} and {best[2]}")
    return out
