"""Compiled labelling pass of :func:`pmap.decomposition.segment` (numba, nogil).

One row pass per spatial chunk does, for each spectrum, what
``_segment._predict`` does with numpy for the emission feature space and the
merge method's nearest-centroid model: the no-signal test (finite, not all zero,
channel sum over ``min_snr`` × its noise from the mean absolute first difference),
the shape and log-intensity scores of :class:`._emission.EmissionSpace`, the
nearest centroid and the runner-up label, and the 5σ matched-filter check of the
nearest cluster's template (:func:`._segment.template_snr`: quadratic baseline
projected out, noise from 1.4826·MAD of the second differences / √6, two medians
by quickselect in O(C)). The spectrum is read in its stored dtype (no float64
copy of the chunk) and every buffer is allocated once per chunk.

Same arithmetic as the numpy path, except the order of floating-point sums (dot
products and channel sums are accumulated left to right here, blocked or pairwise
in numpy/BLAS): values agree to rounding, labels are identical unless a pixel sits
within rounding of a threshold or of two centroids (tests/test_decomposition_segment.py
compares both paths over the scene bank). Rows with some non-finite channels are
flagged for the numpy path (their masked channels are filled there).
"""

from __future__ import annotations

import math

import numba as nb
import numpy as np

from ..spectral._robust import median_of

#: Status of a row after the kernel: labelled here, or left to the numpy path.
DONE = 0
FALLBACK = 1


#: Floating-point freedom of the row sums: reassociation only (vectorised sums; NaN
#: and infinity keep their IEEE meaning, so the finiteness checks hold).
_FAST = {"reassoc"}


@nb.njit(cache=True, nogil=True, fastmath=_FAST)
def _dot(a, b, n):  # pragma: no cover - compiled
    s = 0.0
    for i in range(n):
        s += a[i] * b[i]
    return s


@nb.njit(cache=True, nogil=True)
def _second_differences(x, buf, nd):  # pragma: no cover - compiled
    """buf[:nd] = x[i] − 2·x[i+1] + x[i+2], evaluated in that order (as numpy does)."""
    for i in range(nd):
        buf[i] = x[i] - 2.0 * x[i + 1] + x[i + 2]


@nb.njit(cache=True, nogil=True)
def _keeps_template(buf, nd, proj_t, min_snr):  # pragma: no cover - compiled
    """Whether proj_t / sig >= min_snr (sig = 1.4826·MAD(buf[:nd]) / √6; sig 0: yes),
    as :func:`._segment.template_snr` decides it. One quickselect for the median; the
    MAD is then compared with the threshold by counting deviations (O(n), no second
    selection) unless it lies within 1e-9 (relative) of it, where it is selected
    exactly and the ratio formed as in numpy. Reorders buf."""
    med = median_of(buf, nd)
    k = nd // 2
    need = k + 1  # deviations <= t needed for the upper middle order statistic <= t
    if proj_t <= 0.0:  # kept only when sig == 0, i.e. MAD == 0
        c = 0
        for i in range(nd):
            c += abs(buf[i] - med) <= 0.0
        return c >= need
    t = proj_t * math.sqrt(6.0) / (min_snr * 1.4826)
    lo = t * (1.0 - 1e-9)
    hi = t * (1.0 + 1e-9)
    c_lo = 0
    c_hi = 0
    for i in range(nd):
        dv = abs(buf[i] - med)
        c_lo += dv <= lo
        c_hi += dv <= hi
    if c_lo >= need:  # both middle order statistics <= lo: MAD < t
        return True
    low_need = k if nd % 2 == 0 else k + 1  # the lower (or only) middle one > hi: MAD > t
    if c_hi < low_need:
        return False
    for i in range(nd):  # within rounding of the threshold: as numpy does it
        buf[i] = abs(buf[i] - med)
    sig = 1.4826 * median_of(buf, nd)
    sig = sig / math.sqrt(6.0)
    snr = proj_t / sig if sig > 0.0 else np.inf
    return snr >= min_snr


#: Half-width of the interval around 0 in which the median of a row's second
#: differences is confirmed by counting, as a share of the MAD threshold (see
#: :func:`_template_check`).
_MEDIAN_BRACKET = 0.25


@nb.njit(cache=True, nogil=True)
def _template_check(x, buf, nd, proj_t, min_snr):  # pragma: no cover - compiled
    """What ``_second_differences(x, buf, nd)`` then ``_keeps_template(buf, nd, proj_t,
    min_snr)`` return, most rows decided by counting alone (no median selection).

    With t the MAD threshold and ε = ``_MEDIAN_BRACKET``·t, one pass over the second
    differences d counts d < −ε, d ≤ ε, |d| ≤ t − ε and |d| ≤ t + ε (t with the 1e-9
    margins of :func:`_keeps_template`, widened to 2e-9 for rounding). When the counts
    place the median of d inside [−ε, ε], every deviation |d − median| lies within ε of
    |d|, so the MAD is below the threshold when enough |d| lie within t − ε, and above
    it when too few lie within t + ε: :func:`_keeps_template` then answers the same
    from its counts. Otherwise (median outside the bracket, MAD within ε of t) its
    exact path decides."""
    if proj_t > 0.0:
        t = proj_t * math.sqrt(6.0) / (min_snr * 1.4826)
        eps = _MEDIAN_BRACKET * t
        lo2 = t * (1.0 - 2e-9) - eps
        hi2 = t * (1.0 + 2e-9) + eps
        n_below = 0
        n_upto = 0
        c_lo = 0
        c_hi = 0
        for i in range(nd):
            d = x[i] - 2.0 * x[i + 1] + x[i + 2]
            buf[i] = d
            n_below += d < -eps
            n_upto += d <= eps
            a = abs(d)
            c_lo += a <= lo2
            c_hi += a <= hi2
        k = nd // 2
        lower_mid = k - 1 if nd % 2 == 0 else k
        if n_below <= lower_mid and n_upto >= k + 1:  # median within [-eps, eps]
            if c_lo >= k + 1:
                return True
            if c_hi < (k if nd % 2 == 0 else k + 1):
                return False
    else:
        _second_differences(x, buf, nd)
    return _keeps_template(buf, nd, proj_t, min_snr)


@nb.njit(cache=True, nogil=True, fastmath=_FAST)
def label_rows(
    X, min_snr, projT, offset, floor, li_mu, li_sd, weight,
    centroids, c2, region_of, relabel, ambiguous2,
    qT, tp, qtp, use_templates, min_template_snr,
):  # pragma: no cover - compiled
    """Labels of the rows of X (n, C) (see the module docstring).

    Parameters (all float64 unless said): min_snr (< 0: no channel-sum test); projT
    (k, C) and offset (k,): shape scores = (projT @ x) / area − offset; floor, li_mu,
    li_sd, weight: the area floor and log-intensity standardisation/weight (weight 0:
    no intensity feature); centroids (m, d), c2 (m,) their squared norms, region_of
    (m,) int64, relabel (K,) int32 final region numbers; ambiguous2: squared
    runner-up distance factor; qT (3, C) orthonormal quadratic basis, tp (m, C)
    unit-norm baseline-free templates, qtp (m, 3) = tp @ qT.T; use_templates (bool),
    min_template_snr.

    Returns (label (n,) int32, runner-up (n,) int32, status (n,) int8: 0 done,
    1 left to the numpy path because some but not all channels are not finite, or
    a sum overflowed).
    """
    n, C = X.shape
    k = projT.shape[0]
    m, d = centroids.shape
    lab = np.full(n, -1, dtype=np.int32)
    alt = np.full(n, -2, dtype=np.int32)
    status = np.zeros(n, dtype=np.int8)
    xr = np.empty(C)
    z = np.empty(d)
    e = np.empty(m)
    nd = max(C - 2, 1)
    buf = np.empty(nd)
    sqrt_c = math.sqrt(C)
    half_sqrt_pi = 0.5 * math.sqrt(math.pi)
    for r in range(n):
        total = 0.0
        asum = 0.0
        for i in range(C):
            v = np.float64(X[r, i])
            xr[i] = v
            total += v
            asum += abs(v)
        if not math.isfinite(asum):
            n_fin = 0
            for i in range(C):
                n_fin += math.isfinite(xr[i])
            if n_fin > 0:  # partly masked (or overflow): the numpy path fills it
                status[r] = FALLBACK
            continue  # no finite value: no signal
        if not asum > 0.0:
            continue  # all zero: no signal
        if min_snr >= 0.0:
            sd = 0.0
            for i in range(C - 1):
                sd += abs(xr[i + 1] - xr[i])
            noise = half_sqrt_pi * (sd / (C - 1)) * sqrt_c
            if not (total > 0.0 and total > min_snr * noise):
                continue
        # shape and intensity scores
        area = max(max(total, 0.5 * asum), floor)
        for j in range(k):
            z[j] = _dot(xr, projT[j], C) / area - offset[j]
        if weight > 0.0:
            z[k] = weight * ((math.log(area) - li_mu) / li_sd)
        # nearest centroid (as _Nearest.nearest) and label / runner-up (as predict2)
        zz = 0.0
        for j in range(d):
            zz += z[j] * z[j]
        near = 0
        best = 0
        bestd = np.inf
        for c in range(m):
            s = 0.0
            for j in range(d):
                s += z[j] * centroids[c, j]
            e[c] = c2[c] - 2.0 * s
            if e[c] < e[near]:
                near = c
            dc = max(e[c] + zz, 0.0)
            if dc < bestd:
                bestd = dc
                best = c
        p = region_of[best]
        alt_c = -1
        alt_d = np.inf
        for c in range(m):
            if region_of[c] != p:
                dc = max(e[c] + zz, 0.0)
                if alt_c < 0 or dc < alt_d:
                    alt_d = dc
                    alt_c = c
        if alt_c >= 0 and alt_d <= ambiguous2 * bestd:
            qq = region_of[alt_c]
            alt[r] = relabel[qq] if qq >= 0 else qq
        if p < 0:
            continue
        lab[r] = relabel[p]
        if not use_templates:
            continue
        # matched filter of the nearest cluster's template, baseline projected out
        proj_t = _dot(xr, tp[near], C) - (
            _dot(xr, qT[0], C) * qtp[near, 0]
            + _dot(xr, qT[1], C) * qtp[near, 1]
            + _dot(xr, qT[2], C) * qtp[near, 2]
        )
        if not _template_check(xr, buf, nd, proj_t, min_template_snr):
            lab[r] = -1
    return lab, alt, status
