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
  sampled by grains far apart, is one type), and known to be: δ/σ plus z standard
  errors of δ (Bonferroni over all pairs, :func:`step_z`) is below ``separation``
  too (two groups in different places, membership nearly a function of position,
  leave δ undetermined: a minority spot and a far part of its host's gradient);
* **the same emission on both sides of their border**: the mean (or the channel-wise
  median) unit-area spectra of the border pixels on each side differ by less than
  ``min_difference`` (10 %), also
  compared after each loses its best non-negative sum of the no-emission continua
  (laser tail, stray light: a wafer's edge where the emission fades into the laser
  tail is that emission, dimmer; :func:`emission_difference`);
* **the same emission against their own surroundings** (groups without a shared
  border): each group's mean spectrum, aligned by the shift that maps the spectrum
  of one group's neighbours onto the other's, differs by less than
  ``min_difference`` (a minority red-shifted from a host whose line drifts across
  the map; :func:`host_aligned_difference`; over-cluster by over-cluster, so that a
  group spread along a drift is not smeared), or after each loses its best
  non-negative sum of the two hosts' spectra (a spot that holds some of its drifting
  host beside a band of fixed energy).

This is merging of mixture components by unimodality of the discriminant projection
(Hennig, Adv. Data Anal. Classif. 4, 3 (2010), the "ridgeline"/"dip" family, with a
density-valley ratio in place of the dip test of Hartigan & Hartigan, Ann. Stat. 13,
70 (1985)), extended by spatial and spectral terms because a PL map's gradients are smooth in
space. Merging is greedy, least separated pair first (each criterion mapped onto the
scale of δ/σ, the smallest counts), until every pair left is separated.

Afterwards a group of fewer pixels than a region needs joins the group it is least
separated from, and a group whose mean spectrum is a non-negative mix of two pieces
of two other groups (mixed pixels along borders: laser spot, carrier diffusion) is
not a region: its pixels go to the nearest remaining cluster.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy.ndimage import gaussian_filter1d

#: Default separation threshold (membership step over residual s.d.).
SEPARATION = 6.0
#: Default valley ratio above which two clusters are one population.
VALLEY_RATIO = 0.8
#: Degree of the polynomial spatial trend (in y and x) of the merge test.
TREND_ORDER = 4
#: Family-wise error rate of the trend test's equivalence bound over all pairs of
#: over-clusters (Bonferroni: the bound is z = Φ⁻¹(1 − α / (2 · pairs)) standard
#: errors, 3.53 for the 120 pairs of 16 over-clusters).
STEP_ALPHA = 0.05


def step_z(n_clusters: int, alpha: float = STEP_ALPHA) -> float:
    """Two-sided Bonferroni normal quantile for the pairs of ``n_clusters`` clusters (units 1)."""
    from scipy.stats import norm

    pairs = max(n_clusters * (n_clusters - 1) // 2, 1)
    return float(norm.isf(alpha / (2.0 * pairs)))
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
    #: Unit-area spectra (m, C) of the no-emission continua (clusters without an
    #: emission peak: laser tail, stray light, glow), or None; with ``spectra`` (n, C),
    #: the rows' measured spectra, the spectral difference across a border is also taken
    #: on what is left after the best non-negative sum of the continua.
    continuum: Any = None
    spectra: Any = None
    #: The spectral axis (C,) of ``spectra`` and which rows may serve as a host (rows of
    #: emission clusters, not of no-emission continua), for :func:`host_aligned_difference`.
    axis: Any = None
    host_ok: Any = None
    #: The over-cluster of each row (n,), or None: groups are then compared piece by
    #: piece in :func:`host_aligned_difference` (results cached here).
    piece: Any = None
    aligned_cache: dict = field(default_factory=dict)
    #: Standard errors of the membership step in the trend test's equivalence bound
    #: (:func:`step_z` of the number of over-clusters; 3.53 for 16).
    step_z: float = 3.53


def pair_score(data: MergeData, ra: np.ndarray, rb: np.ndarray):
    """(score, δ/σ, valley ratio, border jump ratio, border spectral difference,
    host-aligned difference) of two clusters given by their row indices (NaN where a
    test cannot speak); score < ``data.separation`` means one emission type."""
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
    # Normal equations: a (p x p) solve, p <= 16; the last column of the inverse gives
    # the standard error of the membership step.
    unit = np.zeros(len(gram))
    unit[-1] = 1.0
    sol = np.linalg.solve(gram, np.column_stack([design.T @ t, unit]))
    coef, se_unit = sol[:, 0], float(np.sqrt(max(sol[-1, 1], 0.0)))
    res = t - design @ coef
    dof = max(len(t) - design.shape[1], 1)
    sd = np.sqrt(max(float(res @ res) / dof, 1e-300))
    sep = abs(float(coef[-1])) / sd
    # The trend says "one type" only when the step is known to be below the threshold:
    # its upper confidence bound, ``data.step_z`` standard errors above the estimate,
    # under ``separation`` (an equivalence test: Schuirmann, J. Pharmacokinet.
    # Biopharm. 15, 657 (1987)). Two groups in different places make membership nearly
    # a function of position: the step is then undetermined (a standard error of many
    # s.d.) and the trend, which could take up any difference between them, says
    # nothing for merging (the other tests still speak). Its score stays δ/σ where the
    # bound holds (the order of the merges it can judge is unchanged), and is the bound,
    # at or above ``separation``, where it does not: finite, so that merging on to a
    # given K still takes the least separated pairs first.
    bound = sep + data.step_z * se_unit
    scores = [sep if bound < data.separation else bound]
    r = valley(ta[sa], tb[sb])
    if r > data.valley_ratio and data.valley_ratio < 1:
        scores.append(data.separation * (1.0 - r) / (1.0 - data.valley_ratio))
    jump, diff = border_jump(data, ra, rb, np.concatenate([ta, tb]))
    if np.isfinite(jump):
        scores.append(data.separation * jump / data.continuity)
    if np.isfinite(diff) and data.min_difference > 0:
        scores.append(data.separation * diff / data.min_difference)
    aligned = float("nan")
    if not np.isfinite(jump) and data.min_difference > 0:
        aligned = host_aligned_difference(data, ra, rb, data.min_difference)
        if np.isfinite(aligned):
            scores.append(data.separation * aligned / data.min_difference)
    return min(scores), sep, r, jump, diff, aligned


def border_jump(data: MergeData, ra: np.ndarray, rb: np.ndarray, t: np.ndarray):
    """(jump ratio, spectral difference) across the A–B border; NaN with too few pairs.

    Jump ratio: median |Δt| over neighbour pairs straddling the border over the median
    |Δt| of neighbour pairs inside A or inside B (``t``: projections of the rows ``ra``
    then ``rb``). Spectral difference: |s_A − s_B| / |s_A| of the unit-area spectra of
    the border pixels on each side, the smaller of the values with their mean and with
    their channel-wise median spectra (when ``data.to_spectra`` is given).
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
        # Each side's spectrum as its mean (the efficient estimate under noise) and as
        # its median (a few pixels of a third kind caught in an over-cluster along the
        # border, a minority spot or a missed spike, do not set it): the border is one
        # emission when either agrees.
        diff = float("inf")
        for centre in (np.mean, np.median):
            sa = data.to_spectra(centre(data.feats[a_rows, :k], axis=0)[None, :])[0]
            sb = data.to_spectra(centre(data.feats[b_rows, :k], axis=0)[None, :])[0]
            diff = min(diff, emission_difference(sa, sb))
        if data.continuum is not None and data.spectra is not None:
            for side in (_mean_unit_area, _median_unit_area):
                ma = _unit_area(side(data.spectra[a_rows]))
                mb = _unit_area(side(data.spectra[b_rows]))
                diff = min(diff, emission_difference(ma, mb, data.continuum))
    return jump, diff


def _hosts(data: MergeData, rows: np.ndarray, other: np.ndarray) -> np.ndarray:
    """Rows that are 4-neighbours of ``rows`` and belong to neither group (host rows)."""
    pairs = data.pairs
    n = len(data.feats)
    side = np.zeros(n, dtype=np.int8)
    side[rows], side[other] = 1, 2
    s0, s1 = side[pairs[:, 0]], side[pairs[:, 1]]
    out = np.concatenate([pairs[(s0 == 1) & (s1 == 0), 1], pairs[(s1 == 1) & (s0 == 0), 0]])
    if data.host_ok is not None:
        out = out[np.asarray(data.host_ok)[out]]
    return out


def best_shift(
    ref: np.ndarray, s: np.ndarray, axis: np.ndarray, max_shift: float,
    *, lo: float | None = None, hi: float | None = None,
) -> float:
    """Shift Δ (axis units) minimising |ref(E) − s(E − Δ)| over |Δ| ≤ ``max_shift``
    (or over [``lo``, ``hi``] when given): a grid at the median channel step (ends
    included), refined by a parabola through the best three and kept in the range."""
    step = float(np.median(np.abs(np.diff(axis)))) or 1.0
    if lo is None or hi is None:
        n = int(max_shift / step)
        shifts = step * np.arange(-n, n + 1)
        lo, hi = float(shifts[0]), float(shifts[-1])
    else:
        n = max(int(np.ceil((hi - lo) / step)), 1)
        shifts = np.linspace(lo, hi, n + 1)
    # every shift's interpolation at once (elementwise, as one call per shift) and each
    # row's sum of squares over the channels (the same pairwise sum as a 1-D np.sum)
    moved = np.interp((axis[None, :] - shifts[:, None]).ravel(), axis, s).reshape(len(shifts), -1)
    cost = np.sum((ref - moved) ** 2, axis=1)
    i = int(np.argmin(cost))
    if 0 < i < len(cost) - 1:
        den = cost[i - 1] - 2 * cost[i] + cost[i + 1]
        h = shifts[1] - shifts[0]
        if den > 0:
            return float(np.clip(shifts[i] + 0.5 * h * (cost[i - 1] - cost[i + 1]) / den, lo, hi))
    return float(shifts[i])


#: Largest host shift tried by :func:`host_aligned_difference`, as a share of the window.
MAX_HOST_SHIFT = 0.2
#: Two hosts are one host type, shifted, when they agree after the shift within this
#: many times the spectral tolerance (a drift that moves a line often widens it too).
HOST_AGREEMENT = 3.0


def host_aligned_difference(
    data: MergeData, ra: np.ndarray, rb: np.ndarray, tolerance: float
) -> float:
    """Spectral difference of two groups that share no border, each seen against its own
    surroundings (NaN when it cannot be judged).

    With ``data.piece`` (the over-cluster of each row), groups made of several
    over-clusters are compared piece by piece (:func:`_aligned_pair` on each pair of
    one piece of A and one of B, its hosts taken around that piece) and the results
    averaged with weights n_a·n_b over the pairs that can be judged: a group whose
    spots lie far apart along a drift has a mean spectrum smeared over the drift,
    while each over-cluster holds pixels of one emission at one place in it.
    """
    piece = data.piece
    if piece is None:
        return _aligned_pair(data, ra, rb, tolerance)
    pa, pb = _distinct(piece[ra]), _distinct(piece[rb])
    if len(pa) == 1 and len(pb) == 1:
        return _aligned_pair(data, ra, rb, tolerance)
    rows = {int(j): np.flatnonzero(piece == j) for j in np.concatenate([pa, pb])}
    num = den = 0.0
    for i in pa:
        for j in pb:
            key = (int(min(i, j)), int(max(i, j)), float(tolerance))
            if key not in data.aligned_cache:
                data.aligned_cache[key] = _aligned_pair(data, rows[int(i)], rows[int(j)], tolerance)
            v = data.aligned_cache[key]
            if np.isfinite(v):
                w = float(len(rows[int(i)]) * len(rows[int(j)]))
                num, den = num + w * v, den + w
    return num / den if den > 0 else _aligned_pair(data, ra, rb, tolerance)


def _distinct(v: np.ndarray) -> np.ndarray:
    """``np.unique(v)`` of non-negative integers (row or cluster indices), by marking
    them in a table instead of sorting (the same sorted values)."""
    v = np.asarray(v)
    if v.size == 0 or v.dtype.kind not in "iu" or v.min() < 0:
        return np.unique(v)
    seen = np.zeros(int(v.max()) + 1, dtype=bool)
    seen[v] = True
    return np.flatnonzero(seen).astype(v.dtype, copy=False)


def _mean_rows(x: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """``x[rows].mean(axis=0)`` (the same values), without copying the rows where x is a
    C-ordered float64 array of at least 2 columns (the compiled sum)."""
    rows = np.asarray(rows)
    if (len(rows) == 0 or x.ndim != 2 or x.shape[1] < 2 or x.dtype != np.float64
            or not x.flags.c_contiguous or rows.dtype.kind not in "iu"):
        return x[rows].mean(axis=0)
    from ._fit_kernel import mean_of_rows

    return mean_of_rows(x, rows.astype(np.int64, copy=False))


def _unit_mean(data: MergeData, rows: np.ndarray) -> np.ndarray:
    """Unit-area mean spectrum of the rows ``rows`` of ``data.spectra``, cached by the
    exact row list (the same rows in the same order give the same values): a group's
    hosts are mostly the same whichever other group it is compared with, and an
    over-cluster is compared with every other."""
    rows = np.ascontiguousarray(rows, dtype=np.int64)
    key = ("unit_mean", rows.tobytes())
    got = data.aligned_cache.get(key)
    if got is None:
        got = data.aligned_cache[key] = _unit_area(_mean_rows(data.spectra, rows))
    return got


def _aligned_pair(data: MergeData, ra: np.ndarray, rb: np.ndarray, tolerance: float) -> float:
    """Host-aligned spectral difference of the rows ``ra`` and ``rb`` (NaN when it
    cannot be judged).

    A minority that sits inside a host whose line drifts across the map (a dot-size or
    composition gradient) is red- or blue-shifted *from its host*, so its spots far
    apart emit at different absolute energies. Here the host spectrum around A (mean
    unit-area spectrum of A's 4-neighbours in neither group) and around B are aligned
    by the shift Δ that best maps one onto the other (:func:`best_shift`, at most
    ``MAX_HOST_SHIFT`` of the window); if the two hosts then agree within
    ``HOST_AGREEMENT`` × ``tolerance`` (the same host type, shifted and perhaps
    broadened), the groups' own mean spectra are compared after the best shift between
    0 and Δ (:func:`emission_difference` at :func:`best_shift` within [0, Δ]: lines
    that follow the host move by Δ, a defect band of fixed energy by 0). Spectra add linearly
    and a gradient moves host and minority together, so two spots of one minority type
    agree; two different minority types in one host do not.
    """
    if data.spectra is None or data.axis is None:
        return float("nan")
    ha, hb = _hosts(data, ra, rb), _hosts(data, rb, ra)
    if len(ha) < MIN_BORDER_PAIRS or len(hb) < MIN_BORDER_PAIRS:
        return float("nan")
    axis = np.asarray(data.axis, dtype=float)
    host_a = _unit_mean(data, _distinct(ha))
    host_b = _unit_mean(data, _distinct(hb))
    span = float(abs(axis[-1] - axis[0]))
    d = best_shift(host_a, host_b, axis, MAX_HOST_SHIFT * span)
    if emission_difference(host_a, np.interp(axis - d, axis, host_b)) >= HOST_AGREEMENT * tolerance:
        return float("nan")
    own_a = _unit_mean(data, ra)
    own_b = _unit_mean(data, rb)
    # Lines that follow the host's drift move by Δ, lines that do not (a defect band
    # of fixed energy) by 0: the groups are compared at the best shift between the two
    # (searched at the channel step and refined, as in :func:`best_shift`: a coarser
    # grid misses the best shift by a sizeable part of a line width).
    f = best_shift(own_a, own_b, axis, abs(d), lo=min(0.0, d), hi=max(0.0, d))
    shifted = emission_difference(own_a, np.interp(axis - f, axis, own_b))
    # A spot that holds some of its host's emission (which drifts) beside its own
    # lines (which may not: a defect band of fixed energy) is also compared by what is
    # left once each loses its best non-negative sum of the two hosts' spectra (spectra
    # add linearly; as a continuum is taken off in :func:`emission_difference`).
    return min(shifted, emission_difference(own_a, own_b, np.stack([host_a, host_b])))


def _mean_unit_area(rows: np.ndarray) -> np.ndarray:
    """Mean of the rows (their summed spectrum over their number)."""
    return rows.mean(axis=0)


def _median_unit_area(rows: np.ndarray) -> np.ndarray:
    """Channel-wise median of the rows' unit-area spectra (each row over its channel
    sum, or half its absolute sum when larger), times their median area."""
    a = np.maximum(rows.sum(axis=1), 0.5 * np.abs(rows).sum(axis=1))
    ok = a > 0
    if not ok.any():
        return rows.mean(axis=0)
    return np.median(rows[ok] / a[ok, None], axis=0) * float(np.median(a[ok]))


def _unit_area(s: np.ndarray) -> np.ndarray:
    """A spectrum over its channel sum, or half its absolute sum when that is larger
    (as :func:`pmap.decomposition._emission.unit_area`)."""
    a = max(float(s.sum()), 0.5 * float(np.abs(s).sum()))
    return s / a if a > 0 else s


#: A border side whose spectrum is within this fraction of a sum of no-emission continua
#: has no emission shape of its own to compare.
MIN_EMISSION_LEFT = 0.05


def emission_difference(sa: np.ndarray, sb: np.ndarray, continuum=None) -> float:
    """Relative difference |ŝ_A − ŝ_B| / |ŝ_A| of two (unit-area) spectra's emission.

    Without ``continuum`` ŝ = s. With the no-emission continua B (m, C), each spectrum
    first loses its best non-negative sum of them (``scipy.optimize.nnls``), and the
    rest is scaled to unit norm: a pixel where an emission fades into the laser tail or
    stray light (a wafer's edge exclusion, a flake's rim) is compared with its brighter
    neighbour by the emission it still has, not by how much continuum lies under it.
    Spectra add linearly (dim emission + continuum), so this is the shape test of
    :func:`pair_score` on the emission part. A side that is all continuum (less than
    ``MIN_EMISSION_LEFT`` of its norm left) is compared as it is.
    """
    sa, sb = np.asarray(sa, dtype=float), np.asarray(sb, dtype=float)
    na = float(np.linalg.norm(sa)) or 1.0
    plain = float(np.linalg.norm(sa - sb) / na)
    if continuum is None or len(continuum) == 0:
        return plain
    from scipy.optimize import nnls

    basis = np.asarray(continuum, dtype=float).T
    left = []
    for s in (sa, sb):
        coef, _ = nnls(basis, s)
        r = s - basis @ coef
        nr = float(np.linalg.norm(r))
        if nr < MIN_EMISSION_LEFT * (float(np.linalg.norm(s)) or 1.0):
            return plain
        left.append(r / nr)
    return float(np.linalg.norm(left[0] - left[1]))


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
