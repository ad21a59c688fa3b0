"""The map's own no-emission continuum as the baseline of the emission test.

:func:`pmap.spectral.detect_signal` asks, per pixel, whether a box of channels
stands out from a baseline. A straight line is the right baseline for a dark,
flat background; stray laser light, a laser tail or a substrate's thermal glow
are smooth but curved continua, and a straight line calls them emission in every
pixel. This module finds the continuum in the map itself and adds it to the
baseline, so that the test keeps its stated false-alarm probability there.

Method (on variance-stabilised data, unit noise per channel):

1. Seed: the spectra with the lowest statistic over a cubic baseline (a curved
   continuum is no excess there, lines narrower than the window still are): the
   lowest 2 % of the sample, at least 24.
2. A continuum is *convex*: at every scale d = 4, 8, 16 … channels the second
   difference of the seed's mean spectrum in count units (running means of width
   d) stays above −5 s.d. Sums of decaying exponentials (laser tails), of rising
   Boltzmann tails and of straight lines are convex; an emission band is concave at
   its top. A seed that fails keeps the straight line: the test then errs towards
   calling light emission, as before.
3. Basis: the seed's mean shape (beyond constant and slope), kept when its
   squared norm exceeds that of a mean of noise spectra by 5 s.d., and the
   singular vectors of the seed's spread about it above the noise edge
   1.1·(√m + √n) of an m × n matrix of unit-variance noise (Marchenko & Pastur,
   Math. USSR-Sbornik 1, 457 (1967); the largest singular value of such a matrix is
   close to √m + √n, Geman, Ann. Probab. 8, 252 (1980), with Tracy–Widom
   fluctuations, Johnstone, Ann. Stat. 29, 295 (2001): for m = 24, n = 512 the
   factor 1.1 is 9 of their s.d. above the edge): at most 3 vectors, each
   smoothed by a cubic Savitzky–Golay filter over n/16 channels (Savitzky & Golay,
   Anal. Chem. 36, 1627 (1964)). The spread carries the change of the continuum's
   shape with its level through the square-root transform.
4. Each box's residual is taken against the least-squares fit of {1, x, basis}
   (projected out exactly, so under "no emission" every box statistic is N(0, 1)
   again); the Bonferroni threshold is unchanged.

Only the seed shapes the basis. Letting the basis grow from every spectrum that
passes the test was tried and rejected: broad bands (FWHM 20 % of the window) at
matched SNR 8 over a laser tail then passed, joined the set and became part of the
"continuum" (0.1 % of them found). A line whose shape overlaps the basis still
loses that part of its excess: over the tripling laser tail of the tests, lines of
FWHM 3 and 10 % of the window at SNR 8 are found in ≥ 98 % of pixels, lines of
20 % in 79 %.
"""

from __future__ import annotations

import math

import numba as nb
import numpy as np

#: fraction of the sample (at least ``_SEED_MIN`` spectra) that seeds the continuum
_SEED_FRACTION = 0.02
_SEED_MIN = 24
_MAX_RANK = 3
#: singular values above this many times √m + √n are structure, not noise
_EDGE = 1.1
#: the seed's baseline: polynomials up to this degree (curved continua are not excess)
_SEED_DEGREE = 3
#: second differences below −this many s.d. make a spectrum concave (a line's top)
_CONVEX_Z = 5.0


def orthonormal_basis(n: int, extra: np.ndarray | None = None) -> np.ndarray:
    """(n, r) orthonormal columns spanning {1, channel index} and the rows of ``extra``."""
    i = np.arange(n, dtype=np.float64)
    cols = [np.ones(n), i - i.mean()]
    if extra is not None:
        cols += list(np.atleast_2d(np.asarray(extra, dtype=np.float64)))
    q, r = np.linalg.qr(np.stack(cols, axis=1))
    keep = np.abs(np.diag(r)) > 1e-9 * np.abs(r[0, 0])
    return np.ascontiguousarray(q[:, keep])


@nb.njit(cache=True, nogil=True)
def scan_rows_basis(Z, Q, widths, strides):  # pragma: no cover - compiled
    """Per row of Z (m, n): max over boxes of (Σ_box e)/sqrt(q), e the residual of the
    least-squares fit of the orthonormal columns Q (n, r), q = Var(Σ_box e) = w − ‖Σ_box Q‖².

    The box terms that do not depend on the spectrum (ends, Σ_box Q, 1/sqrt(q)) are
    tabled once per call."""
    m, n = Z.shape
    r = Q.shape[1]
    cq = np.zeros((n + 1, r))
    for i in range(n):
        for j in range(r):
            cq[i + 1, j] = cq[i, j] + Q[i, j]
    nb_ = 0
    for k in range(widths.size):
        nb_ += (n - widths[k]) // strides[k] + 1 if n >= widths[k] else 0
    lo = np.empty(nb_, np.int64)
    hi = np.empty(nb_, np.int64)
    bq = np.empty((nb_, r))
    inv = np.empty(nb_)
    t = 0
    for k in range(widths.size):
        w = widths[k]
        for i in range(0, n - w + 1, strides[k]):
            q = float(w)
            for j in range(r):
                v = cq[i + w, j] - cq[i, j]
                bq[t, j] = v
                q -= v * v
            lo[t] = i
            hi[t] = i + w
            inv[t] = 1.0 / math.sqrt(q) if q > 1e-12 else 0.0
            t += 1
    out = np.empty(m)
    c = np.empty(n + 1)
    coef = np.empty(r)
    for row in range(m):
        c[0] = 0.0
        for j in range(r):
            coef[j] = 0.0
        for i in range(n):
            v = Z[row, i]
            c[i + 1] = c[i] + v
            for j in range(r):
                coef[j] += v * Q[i, j]
        best = -np.inf
        for b in range(nb_):
            if inv[b] == 0.0:
                continue
            num = c[hi[b]] - c[lo[b]]
            for j in range(r):
                num -= coef[j] * bq[b, j]
            tv = num * inv[b]
            if tv > best:
                best = tv
        out[row] = best
    return out


def is_convex(raw_mean: np.ndarray, var_mean: np.ndarray, z: float = _CONVEX_Z) -> bool:
    """True if the spectrum ``raw_mean`` (n,) in count units curves upwards (or not at
    all) everywhere, within noise: at every scale d = 4, 8, 16 … ≤ n/4 channels the
    second difference s(i − d) − 2 s(i) + s(i + d) of its running mean s of width d
    is above −z of its s.d. (``var_mean``: the variance of each channel of the mean).
    An emission band is concave at its top at the scale of its width."""
    n = raw_mean.size
    d = 4
    while d <= n // 4:
        wd = d | 1
        k = np.full(wd, 1.0 / wd)
        s = np.convolve(raw_mean, k, mode="valid")  # whole windows only (no edge bias)
        v = np.convolve(var_mean, k, mode="valid") / wd
        m = s.size
        d2 = s[: m - 2 * d] - 2.0 * s[d : m - d] + s[2 * d :]
        sd = np.sqrt(v[: m - 2 * d] + 4.0 * v[d : m - d] + v[2 * d :])
        if np.any(d2 < -z * sd):
            return False
        d *= 2
    return True


def _polynomial_basis(n: int, degree: int) -> np.ndarray:
    """(n, degree + 1) orthonormal polynomials in the channel index (the seed's baseline)."""
    t = np.linspace(-1.0, 1.0, n)
    return orthonormal_basis(n, np.array([t**k for k in range(2, degree + 1)]))


def _smooth_rows(v: np.ndarray) -> np.ndarray:
    """Cubic Savitzky–Golay smoothing over n/16 channels along the last axis (a continuum
    is smooth; lines narrower than that are not kept)."""
    from scipy.signal import savgol_filter

    n = v.shape[-1]
    return savgol_filter(v, max(7, (n // 16) | 1), 3, mode="interp", axis=-1)


def _directions(Zq: np.ndarray, Q: np.ndarray) -> list[np.ndarray]:
    """Continuum directions of the quiet spectra Zq (m, n) beyond the columns of Q: their
    mean shape when its squared norm exceeds that of the mean of m noise spectra (χ²_n/m:
    mean n/m, s.d. √(2n)/m) by 5 s.d., then singular vectors of the spread about it above
    the noise edge; all smoothed (:func:`_smooth_rows`)."""
    mq, n = Zq.shape
    Zq = Zq - (Zq @ Q) @ Q.T
    vecs = []
    mu = Zq.mean(axis=0)
    if float(mu @ mu) > (n + 5.0 * math.sqrt(2.0 * n)) / mq:
        vecs.append(mu)
    _, sv, vt = np.linalg.svd(Zq - mu, full_matrices=False)
    edge = _EDGE * (math.sqrt(mq) + math.sqrt(n))
    for j in range(min(_MAX_RANK - len(vecs), sv.size)):
        if sv[j] <= edge:
            break
        vecs.append(vt[j])
    return [_smooth_rows(v) for v in vecs]


def estimate_continuum(Z: np.ndarray, raw: np.ndarray, widths, strides, thr: float,
                       var_of_raw) -> tuple[np.ndarray, dict]:
    """Baseline basis (n, r) for the box scan from a sample of spectra, and a summary.

    Z (m, n): stabilised spectra (unit noise); raw (m, n): the same in count units
    (dark level removed); ``var_of_raw(raw)``: the variance per channel in counts².
    Returns the orthonormal basis of {1, x} plus the continuum vectors found (none:
    the straight line) and a dict ``{"rank", "seed", "quiet", "rejected"}``.
    """
    m, n = Z.shape
    Q = orthonormal_basis(n)
    info = {"rank": 0, "seed": 0, "quiet": 0, "rejected": ""}
    ok = np.all(np.isfinite(Z), axis=1) & np.all(np.isfinite(raw), axis=1)
    Z, raw = Z[ok], raw[ok]
    m = Z.shape[0]
    if m < _SEED_MIN or n < 32:
        return Q, info
    # seed: the quietest spectra over a cubic baseline (a curved continuum is no excess
    # there, while lines narrower than the window still are)
    stat = scan_rows_basis(Z, _polynomial_basis(n, _SEED_DEGREE), widths, strides)
    n_seed = max(_SEED_MIN, int(round(_SEED_FRACTION * m)))
    quiet = np.argsort(stat)[:n_seed]
    info["seed"] = int(quiet.size)
    rmean = raw[quiet].mean(axis=0)
    if not is_convex(rmean, np.maximum(var_of_raw(rmean), 1e-12) / quiet.size):
        info["rejected"] = "the quietest spectra are not a convex continuum (a line?)"
        return Q, info
    vecs = _directions(Z[quiet], Q)
    if not vecs:
        return Q, info
    basis = orthonormal_basis(n, np.array(vecs))
    info["rank"] = int(basis.shape[1] - Q.shape[1])
    info["quiet"] = int(np.sum(scan_rows_basis(Z, basis, widths, strides) <= thr))
    return basis, info
