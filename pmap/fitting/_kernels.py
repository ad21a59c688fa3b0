"""Numba kernels: line-shape models with analytic Jacobians and a batched Levenberg–Marquardt.

The whole chunk of spectra (n_pixels, n_channels) goes to :func:`lm_batch`, which
runs one damped Gauss–Newton (Levenberg–Marquardt, Marquardt's diagonal scaling)
per spectrum in parallel threads (``numba.prange``) — no Python loop over pixels.
Compiled functions are cached on disk (``cache=True``).

Parameter layout of one spectrum ("full" parameters): for each peak k
``[centre, fwhm, area(, shape)]`` then the background ``[offset(, slope)]``; the
slope multiplies (E − e_ref). ``free_idx[j]`` maps full parameter j to a free
parameter (shared parameters map to the same free index) or −1 when fixed.
"""

from __future__ import annotations

import math

import numba as nb
import numpy as np

from ._lineshapes import weideman_coefficients

GAUSSIAN, LORENTZIAN, VOIGT, PSEUDO_VOIGT, SPLIT_GAUSSIAN = 0, 1, 2, 3, 4
MODEL_CODES = {
    "gaussian": GAUSSIAN,
    "lorentzian": LORENTZIAN,
    "voigt": VOIGT,
    "pseudo_voigt": PSEUDO_VOIGT,
    "split_gaussian": SPLIT_GAUSSIAN,
}
N_PEAK_PARAMS = {GAUSSIAN: 3, LORENTZIAN: 3, VOIGT: 4, PSEUDO_VOIGT: 4, SPLIT_GAUSSIAN: 4}

# Weideman (1994) rational approximation, N = 16: |w − w_exact| < 2e-7·|w(0)| on the
# upper half plane region used here (checked against scipy.special.wofz in the tests).
_W_A_ARR, _W_L = weideman_coefficients(16)
_W_A = tuple(float(v) for v in _W_A_ARR)  # a tuple is a compile-time constant (cacheable)
_SQRT_PI = math.sqrt(math.pi)
_F2S = 1.0 / (2.0 * math.sqrt(2.0 * math.log(2.0)))
_KG = math.sqrt(math.pi / (4.0 * math.log(2.0)))  # area = height·fwhm·_KG (Gaussian)
_OL_A, _OL_B = 0.5346, 0.2166

STATUS_CONVERGED, STATUS_MAXITER, STATUS_FAILED = 0, 1, 5


@nb.njit(cache=True, inline="always")
def _faddeeva(zr, zi, a, L):
    z = complex(zr, zi)
    iz = 1j * z
    den = L - iz
    Z = (L + iz) / den
    p = a[0] + 0j
    for j in range(1, len(a)):
        p = p * Z + a[j]
    return 2.0 * p / (den * den) + (1.0 / _SQRT_PI) / den


@nb.njit(cache=True)
def faddeeva_approx(zr, zi):
    """Vectorised test hook: Weideman approximation of w(z) on arrays (Im z > 0)."""
    out = np.empty(zr.size, dtype=np.complex128)
    for i in range(zr.size):
        out[i] = _faddeeva(zr[i], zi[i], _W_A, _W_L)
    return out


@nb.njit(cache=True)
def eval_model(model, x, xref, p, K, nbg, f, J, want_j):
    """Model values f (n,) and, if want_j, Jacobian J (n, n_full) at full parameters p."""
    n = x.size
    npp = 3 if (model == GAUSSIAN or model == LORENTZIAN) else 4
    for i in range(n):
        f[i] = 0.0
    for k in range(K):
        o = k * npp
        c = p[o]
        fw = p[o + 1]
        A = p[o + 2]
        if model == GAUSSIAN:
            s = fw * _F2S
            norm = 1.0 / (s * math.sqrt(2.0 * math.pi))
            for i in range(n):
                u = (x[i] - c) / s
                g = math.exp(-0.5 * u * u) * norm
                f[i] += A * g
                if want_j:
                    J[i, o] = A * g * u / s
                    J[i, o + 1] = A * g * (u * u - 1.0) / fw
                    J[i, o + 2] = g
        elif model == LORENTZIAN:
            gam = 0.5 * fw
            for i in range(n):
                d = x[i] - c
                D = d * d + gam * gam
                lv = gam / (math.pi * D)
                f[i] += A * lv
                if want_j:
                    J[i, o] = A * 2.0 * gam * d / (math.pi * D * D)
                    J[i, o + 1] = 0.5 * A * (D - 2.0 * gam * gam) / (math.pi * D * D)
                    J[i, o + 2] = lv
        elif model == PSEUDO_VOIGT:
            eta = p[o + 3]
            s = fw * _F2S
            norm = 1.0 / (s * math.sqrt(2.0 * math.pi))
            gam = 0.5 * fw
            for i in range(n):
                d = x[i] - c
                u = d / s
                g = math.exp(-0.5 * u * u) * norm
                D = d * d + gam * gam
                lv = gam / (math.pi * D)
                f[i] += A * (eta * lv + (1.0 - eta) * g)
                if want_j:
                    J[i, o] = A * (eta * 2.0 * gam * d / (math.pi * D * D)
                                   + (1.0 - eta) * g * u / s)
                    J[i, o + 1] = A * (eta * 0.5 * (D - 2.0 * gam * gam) / (math.pi * D * D)
                                       + (1.0 - eta) * g * (u * u - 1.0) / fw)
                    J[i, o + 2] = eta * lv + (1.0 - eta) * g
                    J[i, o + 3] = A * (lv - g)
        elif model == SPLIT_GAUSSIAN:
            asym = p[o + 3]
            h = 1.0 / (fw * _KG)
            for i in range(n):
                d = x[i] - c
                sgn = -1.0 if d < 0 else 1.0
                fac = 1.0 + sgn * asym
                s = fw * fac * _F2S
                u = d / s
                g = math.exp(-0.5 * u * u) * h
                f[i] += A * g
                if want_j:
                    J[i, o] = A * g * u / s
                    J[i, o + 1] = A * g * (u * u - 1.0) / fw
                    J[i, o + 2] = g
                    J[i, o + 3] = A * g * u * u * sgn / fac
        else:  # VOIGT: (centre, total fwhm, area, rho = f_L / f_V)
            rho = p[o + 3]
            q = (1.0 - _OL_A * rho) ** 2 - _OL_B * rho * rho
            if q < 1e-12:
                q = 1e-12
            gfac = math.sqrt(q)
            dg = (-_OL_A * (1.0 - _OL_A * rho) - _OL_B * rho) / gfac
            sig = fw * gfac * _F2S
            gam = 0.5 * rho * fw
            r2s = 1.0 / (sig * math.sqrt(2.0))
            nrm = 1.0 / (sig * math.sqrt(2.0 * math.pi))
            zi = gam * r2s
            for i in range(n):
                zr = (x[i] - c) * r2s
                w = _faddeeva(zr, zi, _W_A, _W_L)
                v = w.real * nrm
                f[i] += A * v
                if want_j:
                    z = complex(zr, zi)
                    wp = -2.0 * z * w + 2j / _SQRT_PI
                    dvdx = wp.real * r2s * nrm
                    dvdg = -wp.imag * r2s * nrm
                    dvds = (wp * (-z)).real * nrm / sig - v / sig
                    J[i, o] = -A * dvdx
                    J[i, o + 1] = A * (dvds * sig + dvdg * gam) / fw
                    J[i, o + 2] = v
                    J[i, o + 3] = A * (dvds * fw * dg * _F2S + dvdg * 0.5 * fw)
    ob = K * npp
    if nbg >= 1:
        for i in range(n):
            f[i] += p[ob]
            if want_j:
                J[i, ob] = 1.0
    if nbg >= 2:
        for i in range(n):
            f[i] += p[ob + 1] * (x[i] - xref)
            if want_j:
                J[i, ob + 1] = x[i] - xref


@nb.njit(cache=True)
def _weights(f, y, var_mode, gain, rn2, w):
    for i in range(f.size):
        if var_mode == 0:
            w[i] = 1.0
        else:
            m = f[i] if var_mode == 1 else y[i]
            v = max(m, 0.0) / gain + rn2
            floor = 1.0 / (gain * gain) + rn2
            w[i] = 1.0 / max(v, floor)


@nb.njit(cache=True)
def _cost(y, f, w):
    s = 0.0
    for i in range(y.size):
        r = y[i] - f[i]
        s += w[i] * r * r
    return s


@nb.njit(cache=True)
def _cholesky_solve(A, b, L, out):
    """Solve A out = b for symmetric positive definite A; False when not SPD."""
    n = b.size
    for i in range(n):
        for j in range(i + 1):
            s = A[i, j]
            for k in range(j):
                s -= L[i, k] * L[j, k]
            if i == j:
                if not (s > 0.0):
                    return False
                L[i, i] = math.sqrt(s)
            else:
                L[i, j] = s / L[j, j]
    for i in range(n):
        s = b[i]
        for k in range(i):
            s -= L[i, k] * out[k]
        out[i] = s / L[i, i]
    for i in range(n - 1, -1, -1):
        s = out[i]
        for k in range(i + 1, n):
            s -= L[k, i] * out[k]
        out[i] = s / L[i, i]
    return True


@nb.njit(cache=True)
def _normal_eq(J, r, w, free_idx, nfree, A, g):
    n = r.size
    nfull = free_idx.size
    for a in range(nfree):
        g[a] = 0.0
        for b in range(nfree):
            A[a, b] = 0.0
    # collapse full-parameter columns onto free parameters
    for i in range(n):
        wi = w[i]
        for ja in range(nfull):
            fa = free_idx[ja]
            if fa < 0:
                continue
            ja_v = J[i, ja] * wi
            g[fa] += ja_v * r[i]
            for jb in range(nfull):
                fb = free_idx[jb]
                if fb < 0 or fb > fa:
                    continue
                A[fa, fb] += ja_v * J[i, jb]
    for a in range(nfree):
        for b in range(a + 1, nfree):
            A[a, b] = A[b, a]


@nb.njit(cache=True)
def _fit_one(y, x, xref, p, lo, hi, free_idx, nfree, model, K, nbg, var_mode, gain, rn2,
             n_pass, max_iter, ftol, xtol, f, fn, J, w, r, A, Ad, g, d, L, pn, cov):
    """Fit one spectrum in place (p); return (status, chi2_red, n_iter)."""
    n = y.size
    nfull = p.size
    for j in range(nfull):
        p[j] = min(max(p[j], lo[j]), hi[j])
    status = STATUS_MAXITER
    total_it = 0
    for pas in range(n_pass):
        eval_model(model, x, xref, p, K, nbg, f, J, False)
        _weights(f, y, var_mode, gain, rn2, w)
        cost = _cost(y, f, w)
        lam = 1e-3
        status = STATUS_MAXITER
        iters = max_iter if pas == n_pass - 1 else max(3, max_iter // 4)
        for it in range(iters):
            total_it += 1
            eval_model(model, x, xref, p, K, nbg, f, J, True)
            for i in range(n):
                r[i] = y[i] - f[i]
            _normal_eq(J, r, w, free_idx, nfree, A, g)
            accepted = False
            cost_new = cost
            for _trial in range(12):
                for a in range(nfree):
                    for b in range(nfree):
                        Ad[a, b] = A[a, b]
                    Ad[a, a] = A[a, a] * (1.0 + lam) + 1e-30
                if not _cholesky_solve(Ad, g, L, d):
                    lam *= 10.0
                    continue
                for j in range(nfull):
                    fj = free_idx[j]
                    pn[j] = p[j] if fj < 0 else min(max(p[j] + d[fj], lo[j]), hi[j])
                eval_model(model, x, xref, pn, K, nbg, fn, J, False)
                cost_new = _cost(y, fn, w)
                if cost_new <= cost and math.isfinite(cost_new):
                    accepted = True
                    break
                lam *= 10.0
            if not accepted:
                status = STATUS_CONVERGED  # no downhill step left: at a minimum
                break
            small = True
            for j in range(nfull):
                if abs(pn[j] - p[j]) > xtol * (abs(p[j]) + 1e-12):
                    small = False
                p[j] = pn[j]
            dc = cost - cost_new
            cost = cost_new
            lam = max(lam * 0.1, 1e-12)
            if dc <= ftol * cost or small:
                status = STATUS_CONVERGED
                break
    # covariance of the free parameters at the solution
    eval_model(model, x, xref, p, K, nbg, f, J, True)
    for i in range(n):
        r[i] = y[i] - f[i]
    cost = _cost(y, f, w)
    dof = max(n - nfree, 1)
    chi2 = cost / dof
    _normal_eq(J, r, w, free_idx, nfree, A, g)
    ok = True
    for c in range(nfree):
        for a in range(nfree):
            g[a] = 1.0 if a == c else 0.0
        for a in range(nfree):
            for b in range(nfree):
                Ad[a, b] = A[a, b]
        if not _cholesky_solve(Ad, g, L, d):
            ok = False
            break
        for a in range(nfree):
            cov[a, c] = d[a] * (chi2 if var_mode == 0 else 1.0)
    if not ok:
        for a in range(nfree):
            for b in range(nfree):
                cov[a, b] = np.nan
    for j in range(nfull):
        if not math.isfinite(p[j]):
            status = STATUS_FAILED
    if not math.isfinite(chi2):
        status = STATUS_FAILED
    return status, chi2, total_it


@nb.njit(cache=True, parallel=True)
def lm_batch(Y, x, xref, P0, active, lo, hi, free_idx, nfree, model, K, nbg, var_mode, gain, rn2,
             n_pass, max_iter, ftol, xtol, nblk):
    """Batched Levenberg–Marquardt over the rows of Y (n_pix, n_ch).

    Returns (P (n_pix, n_full), COV (n_pix, nfree, nfree), chi2_red, status, n_iter).
    ``nblk``: number of work blocks (a few per thread). Rows with ``active`` False are skipped (their outputs NaN, status −1).
    ``lo``/``hi``: (n_pix, n_full) bounds; fixed parameters take their value from P0.
    """
    npix, n = Y.shape
    nfull = P0.shape[1]
    P = P0.copy()
    COV = np.full((npix, nfree, nfree), np.nan)
    chi2 = np.full(npix, np.nan)
    status = np.full(npix, -1, dtype=np.int64)
    niter = np.zeros(npix, dtype=np.int64)
    nblk = min(npix, nblk)
    for b in nb.prange(nblk):
        start = (b * npix) // nblk
        stop = ((b + 1) * npix) // nblk
        y = np.empty(n)
        f = np.empty(n)
        fn = np.empty(n)
        J = np.zeros((n, nfull))
        w = np.empty(n)
        r = np.empty(n)
        A = np.empty((nfree, nfree))
        Ad = np.empty((nfree, nfree))
        g = np.empty(nfree)
        d = np.empty(nfree)
        L = np.zeros((nfree, nfree))
        pn = np.empty(nfull)
        p = np.empty(nfull)
        cov = np.empty((nfree, nfree))
        for i in range(start, stop):
            if not active[i]:
                for j in range(nfull):
                    P[i, j] = np.nan
                continue
            for c in range(n):
                y[c] = Y[i, c]
            for j in range(nfull):
                p[j] = P0[i, j]
            st, c2, it = _fit_one(y, x, xref, p, lo[i], hi[i], free_idx, nfree, model, K, nbg,
                                  var_mode, gain, rn2, n_pass, max_iter, ftol, xtol, f, fn, J, w,
                                  r, A, Ad, g, d, L, pn, cov)
            for j in range(nfull):
                P[i, j] = p[j]
            for a in range(nfree):
                for c in range(nfree):
                    COV[i, a, c] = cov[a, c]
            chi2[i] = c2
            status[i] = st
            niter[i] = it
    return P, COV, chi2, status, niter
