"""Numba kernels: line-shape models with analytic Jacobians and a batched Levenberg–Marquardt.

A chunk of spectra (n_pixels, n_channels), float32 or float64, goes to
:func:`lm_batch`, which runs one damped Gauss–Newton (Levenberg–Marquardt,
Marquardt's diagonal scaling) per spectrum in a compiled loop that releases the
GIL, so dask's threads fit different chunks at the same time (one level of
parallelism). :func:`describe_rows` gives the per-spectrum quantities the
starting values need in one compiled pass. Compiled functions are cached on disk
(``cache=True``).

Speed: every loop over channels is written so that LLVM vectorises it (SIMD): the
Jacobian is stored column-major (n_params, n_channels), the exponential is a
branch-free polynomial (:func:`_exp_neg`) instead of a libm call, the Faddeeva
function is evaluated in real arithmetic, and the normal equations are dot
products of contiguous columns. Fast-math flags allow re-association (needed for
vectorised sums) but keep NaN/Inf semantics, so the finiteness tests stay valid.

Parameter layout of one spectrum ("full" parameters): for each peak k
``[centre, fwhm, area(, shape)]`` then the background ``[offset(, slope)]``; the
slope multiplies (E − e_ref). ``free_idx[j]`` maps full parameter j to a free
parameter (shared parameters map to the same free index) or −1 when fixed.
"""

from __future__ import annotations

import math

import numba as nb
import numpy as np
from llvmlite import ir
from numba import types
from numba.extending import intrinsic

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
_W_A = np.ascontiguousarray(_W_A_ARR, dtype=np.float64)  # global array: compile-time constant
_NW = _W_A.size
_SQRT_PI = math.sqrt(math.pi)
_INV_SQRT_PI = 1.0 / _SQRT_PI
_F2S = 1.0 / (2.0 * math.sqrt(2.0 * math.log(2.0)))
_KG = math.sqrt(math.pi / (4.0 * math.log(2.0)))  # area = height·fwhm·_KG (Gaussian)
_OL_A, _OL_B = 0.5346, 0.2166
_LOG2E = 1.0 / math.log(2.0)
_LN2 = math.log(2.0)
_INV_SQRT_2PI = 1.0 / math.sqrt(2.0 * math.pi)

STATUS_CONVERGED, STATUS_MAXITER, STATUS_FAILED = 0, 1, 5
# beyond ±9σ a Gaussian and its derivatives (∝ u·g, u²·g) are below 2.2e-16 of their maximum
_CUT_SIGMA = 9.0

# fast-math without "nnan"/"ninf": sums may be re-associated (SIMD), isfinite still works
FM = {"nsz", "arcp", "contract", "afn", "reassoc"}


@intrinsic
def _pow2(typingctx, kf):
    """2.0**k for an integer-valued float64 k in [−1022, 1023], from the exponent bits.

    k + 1.5·2⁵² puts k in the low bits of the sum's mantissa (exact for |k| < 2⁵¹);
    those bits, rebased and shifted into the exponent field, are 2**k. No
    float→int conversion: AVX2 has no packed one, and a scalar one in a loop
    stops LLVM vectorising it (this made the exponential 1.7× slower).
    """
    sig = types.float64(types.float64)

    def codegen(context, builder, signature, args):
        i64 = ir.IntType(64)
        z = builder.fadd(args[0], ir.Constant(ir.DoubleType(), 6755399441055744.0))
        bits = builder.sub(builder.bitcast(z, i64), ir.Constant(i64, 0x4338000000000000 - 1023))
        return builder.bitcast(builder.shl(bits, ir.Constant(i64, 52)), ir.DoubleType())

    return sig, codegen


# polynomial coefficients, highest power first (global arrays are compile-time constants)
_EXP_C = np.array([1.0 / math.factorial(k) for k in range(12, -1, -1)])  # exp(r), Taylor
_LOG_C = np.array([1.0 / k for k in range(13, 0, -2)])  # atanh(s)/s in s², 1/13 … 1


@nb.njit(cache=True, error_model="numpy", inline="always")
def _horner(coef, r):
    """Σ coef[j]·r**(len−1−j) by Horner's rule (constant length: unrolled, SIMD-friendly)."""
    p = coef[0]
    for j in range(1, coef.size):
        p = p * r + coef[j]
    return p


@intrinsic
def _f64_bits(typingctx, v):
    """The IEEE-754 bits of a float64 as an int64 (no libm call)."""
    sig = types.int64(types.float64)

    def codegen(context, builder, signature, args):
        return builder.bitcast(args[0], ir.IntType(64))

    return sig, codegen


@intrinsic
def _bits_f64(typingctx, k):
    """The float64 with IEEE-754 bits k (int64)."""
    sig = types.float64(types.int64)

    def codegen(context, builder, signature, args):
        return builder.bitcast(args[0], ir.DoubleType())

    return sig, codegen


@nb.njit(cache=True, error_model="numpy", inline="always")
def _log_pos(v):
    """ln(v) for a normal v > 0, |error| < 1e-12: exponent from the bits, then the atanh series.

    v = 2**e·m with m in [√½, √2); ln m = 2 atanh(s), s = (m − 1)/(m + 1), |s| < 0.172.
    """
    bits = _f64_bits(v)
    e = ((bits >> 52) & 0x7FF) - 1023
    m = _bits_f64((bits & 0x000FFFFFFFFFFFFF) | 0x3FF0000000000000)
    if m > 1.4142135623730951:
        m *= 0.5
        e += 1
    sv = (m - 1.0) / (m + 1.0)
    return e * _LN2 + 2.0 * sv * _horner(_LOG_C, sv * sv)


@nb.njit(cache=True, error_model="numpy", inline="always", fastmath=FM)
def _exp_neg(t):
    """exp(t) for t ≤ 0, branch-free so loops calling it vectorise.

    t = k·ln2 + r with |r| ≤ ln2/2, exp(r) by its degree-12 Taylor polynomial
    (truncation < 2e-16), times 2**k from the exponent bits; relative error
    < 1e-13 over t ≥ −708 (< 1e-14 for t ≥ −50), below which it returns ≈ 3e-308, not 0.
    """
    t = max(t, -708.0)
    kf = np.floor(t * _LOG2E + 0.5)
    r = t - kf * _LN2
    return _horner(_EXP_C, r) * _pow2(kf)


@nb.njit(cache=True, error_model="numpy", fastmath=FM)
def _faddeeva_row(x, c, r2s, zi):
    """Weideman's w(z) at z = (x − c)·r2s + i·zi (Im z > 0) for every channel, in real
    arithmetic: (Re w, Im w) arrays.

    The polynomial loop runs outside the channel loop, so that the channel loop
    vectorises (SIMD over channels; 5× faster than channel by channel).
    """
    n = x.size
    Zr = np.empty(n)
    Zi = np.empty(n)
    pr = np.empty(n)
    pi_ = np.empty(n)
    dr = _W_L + zi  # L − iz (real part; the same for every channel)
    nr = _W_L - zi  # L + iz
    for i in range(n):
        zr = (x[i] - c) * r2s
        di = -zr
        inv = 1.0 / (dr * dr + di * di)
        Zr[i] = (nr * dr + zr * di) * inv
        Zi[i] = (zr * dr - nr * di) * inv
        pr[i] = _W_A[0]
        pi_[i] = 0.0
    for j in range(1, _NW):
        a = _W_A[j]
        for i in range(n):
            t = pr[i] * Zr[i] - pi_[i] * Zi[i] + a
            pi_[i] = pr[i] * Zi[i] + pi_[i] * Zr[i]
            pr[i] = t
    for i in range(n):
        zr = (x[i] - c) * r2s
        di = -zr
        inv = 1.0 / (dr * dr + di * di)
        ur = dr * inv  # 1/(L − iz)
        ui = -di * inv
        u2r = ur * ur - ui * ui
        u2i = 2.0 * ur * ui
        Zr[i] = 2.0 * (pr[i] * u2r - pi_[i] * u2i) + _INV_SQRT_PI * ur
        Zi[i] = 2.0 * (pr[i] * u2i + pi_[i] * u2r) + _INV_SQRT_PI * ui
    return Zr, Zi


@nb.njit(cache=True, error_model="numpy")
def faddeeva_approx(zr, zi):
    """Vectorised test hook: Weideman approximation of w(z) on arrays (Im z > 0)."""
    out = np.empty(zr.size, dtype=np.complex128)
    one = np.empty(1)
    for i in range(zr.size):
        one[0] = zr[i]
        wr, wi = _faddeeva_row(one, 0.0, 1.0, zi[i])
        out[i] = complex(wr[0], wi[0])
    return out


@nb.njit(cache=True, error_model="numpy", fastmath=FM)
def _model_cols(model, x, xref, p, K, nbg, f, J, want_j):
    """Model values f (n,) and, if want_j, the Jacobian J (n_full, n) (column-major)."""
    n = x.size
    npp = 3 if (model == GAUSSIAN or model == LORENTZIAN) else 4
    for i in range(n):
        f[i] = 0.0
    for k in range(K):
        o = k * npp
        c = p[o]
        fw = p[o + 1]
        A = p[o + 2]
        inv_fw = 1.0 / fw
        if model == GAUSSIAN:
            inv_s = 1.0 / (fw * _F2S)
            norm = inv_s / math.sqrt(2.0 * math.pi)
            for i in range(n):
                u = (x[i] - c) * inv_s
                g = _exp_neg(-0.5 * u * u) * norm
                ag = A * g
                f[i] += ag
                if want_j:
                    J[o, i] = ag * u * inv_s
                    J[o + 1, i] = ag * (u * u - 1.0) * inv_fw
                    J[o + 2, i] = g
        elif model == LORENTZIAN:
            gam = 0.5 * fw
            for i in range(n):
                d = x[i] - c
                iD = 1.0 / (d * d + gam * gam)
                lv = gam * iD * (1.0 / math.pi)
                f[i] += A * lv
                if want_j:
                    J[o, i] = A * lv * 2.0 * d * iD
                    J[o + 1, i] = A * lv * inv_fw * (1.0 - 2.0 * gam * gam * iD)
                    J[o + 2, i] = lv
        elif model == PSEUDO_VOIGT:
            eta = p[o + 3]
            inv_s = 1.0 / (fw * _F2S)
            norm = inv_s / math.sqrt(2.0 * math.pi)
            gam = 0.5 * fw
            for i in range(n):
                d = x[i] - c
                u = d * inv_s
                g = _exp_neg(-0.5 * u * u) * norm
                iD = 1.0 / (d * d + gam * gam)
                lv = gam * iD * (1.0 / math.pi)
                f[i] += A * (eta * lv + (1.0 - eta) * g)
                if want_j:
                    J[o, i] = A * (eta * lv * 2.0 * d * iD + (1.0 - eta) * g * u * inv_s)
                    J[o + 1, i] = (
                        A
                        * inv_fw
                        * (
                            eta * lv * (1.0 - 2.0 * gam * gam * iD)
                            + (1.0 - eta) * g * (u * u - 1.0)
                        )
                    )
                    J[o + 2, i] = eta * lv + (1.0 - eta) * g
                    J[o + 3, i] = A * (lv - g)
        elif model == SPLIT_GAUSSIAN:
            asym = p[o + 3]
            h = 1.0 / (fw * _KG)
            for i in range(n):
                d = x[i] - c
                sgn = -1.0 if d < 0 else 1.0
                fac = 1.0 + sgn * asym
                inv_s = 1.0 / (fw * fac * _F2S)
                u = d * inv_s
                g = _exp_neg(-0.5 * u * u) * h
                f[i] += A * g
                if want_j:
                    J[o, i] = A * g * u * inv_s
                    J[o + 1, i] = A * g * (u * u - 1.0) * inv_fw
                    J[o + 2, i] = g
                    J[o + 3, i] = A * g * u * u * sgn / fac
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
            wre, wim = _faddeeva_row(x, c, r2s, zi)
            for i in range(n):
                zr = (x[i] - c) * r2s
                wr, wi = wre[i], wim[i]
                v = wr * nrm
                f[i] += A * v
                if want_j:
                    # w'(z) = −2 z w + 2i/√π
                    wpr = -2.0 * (zr * wr - zi * wi)
                    wpi = -2.0 * (zr * wi + zi * wr) + 2.0 * _INV_SQRT_PI
                    dvdx = wpr * r2s * nrm
                    dvdg = -wpi * r2s * nrm
                    dvds = -(wpr * zr - wpi * zi) * nrm / sig - v / sig
                    J[o, i] = -A * dvdx
                    J[o + 1, i] = A * (dvds * sig + dvdg * gam) * inv_fw
                    J[o + 2, i] = v
                    J[o + 3, i] = A * (dvds * fw * dg * _F2S + dvdg * 0.5 * fw)
    ob = K * npp
    if nbg >= 1:
        b0 = p[ob]
        b1 = p[ob + 1] if nbg >= 2 else 0.0
        for i in range(n):
            f[i] += b0 + b1 * (x[i] - xref)
            if want_j:
                J[ob, i] = 1.0
                if nbg >= 2:
                    J[ob + 1, i] = x[i] - xref


@nb.njit(cache=True, error_model="numpy")
def eval_model(model, x, xref, p, K, nbg, f, J, want_j):
    """Model values f (n,) and, if want_j, Jacobian J (n, n_full) at full parameters p."""
    _model_cols(model, x, xref, p, K, nbg, f, J.T, want_j)


@nb.njit(cache=True, error_model="numpy", fastmath=FM)
def _set_weights(f, y, var_mode, nv, w):
    """Inverse variances: 1 (var_mode 0), from the model f (1) or the data y (2).

    ``nv`` = (sa, q, fl) per channel: variance = max(sa·value + q, fl) (see
    :mod:`pmap.noise`: sa = a·s, q = s²(a·p + b), fl = s²·floor).
    """
    sa, q, fl = nv
    if var_mode == 0:  # unit weights; 0 where the variance is infinite (masked channel)
        for i in range(w.size):
            w[i] = 1.0 if fl[i] < np.inf else 0.0
        return
    if var_mode == 1 or var_mode == 3:
        for i in range(w.size):
            w[i] = 1.0 / max(sa[i] * f[i] + q[i], fl[i])
    else:
        for i in range(w.size):
            w[i] = 1.0 / max(sa[i] * y[i] + q[i], fl[i])


@nb.njit(cache=True, error_model="numpy", fastmath=FM)
def _wcost(y, f, w):
    s = 0.0
    for i in range(y.size):
        r = y[i] - f[i]
        s += w[i] * r * r
    return s


@nb.njit(cache=True, error_model="numpy", fastmath=FM)
def _collapse(J, free_idx, nfree, ident, Jf):
    """Jacobian columns of the free parameters (shared → summed, fixed → dropped)."""
    if ident:
        return J
    n = J.shape[1]
    for a in range(nfree):
        for i in range(n):
            Jf[a, i] = 0.0
    for j in range(free_idx.size):
        fj = free_idx[j]
        if fj >= 0:
            for i in range(n):
                Jf[fj, i] += J[j, i]
    return Jf


@nb.njit(cache=True, error_model="numpy", fastmath=FM)
def _normal_eq(Jf, y, f, w, A, g, wj):
    """A = Jᵀ W J and g = Jᵀ W (y − f) from the free columns Jf (nfree, n)."""
    nfree, n = Jf.shape
    for a in range(nfree):
        s = 0.0
        for i in range(n):
            v = w[i] * Jf[a, i]
            wj[i] = v
            s += v * (y[i] - f[i])
        g[a] = s
        for b in range(a + 1):
            s = 0.0
            for i in range(n):
                s += wj[i] * Jf[b, i]
            A[a, b] = s
            A[b, a] = s


@nb.njit(cache=True, error_model="numpy", inline="always", fastmath=FM)
def _bg_sums(a, b, y, w, wn, b0, model_w, sa, q, fl):
    """Channels a ≤ i < b (unsigned indices: no wrap-around code, SIMD) where the peak is
    below 2.2e-16 of its maximum: offset terms only.

    Returns (Σ w r², Σ wn r², Σ wn, Σ wn r) with r = y − b0.
    """
    c_old = c_new = h33 = g3 = 0.0
    for i in range(a, b):
        r = y[i] - b0
        wo = w[i]
        wv = 1.0 / max(sa[i] * b0 + q[i], fl[i]) if model_w else wo
        wn[i] = wv
        c_old += wo * r * r
        c_new += wv * r * r
        h33 += wv
        g3 += wv * r
    return c_old, c_new, h33, g3


@nb.njit(cache=True, error_model="numpy", inline="always")
def _tail(v):
    """(upper-tail probability beyond |v| of a standard normal, sign of v ≥ 0)."""
    return 0.5 * math.erfc(abs(v) * 0.7071067811865476), v >= 0.0


@nb.njit(cache=True, error_model="numpy", inline="always")
def _phi_diff(t_lo, pos_lo, t_hi, pos_hi):
    """Φ(v_hi) − Φ(v_lo) from tails, without cancellation in either wing."""
    if pos_lo:
        return t_lo - t_hi
    if not pos_hi:
        return t_hi - t_lo
    return 1.0 - t_lo - t_hi


@nb.njit(cache=True, error_model="numpy", _nrt=False, fastmath=FM)
def _gauss1_pass(p, nbg, x, xe, dmax, y, w, var_mode, sa, q, fl, wn, H, gv, g_, d0, d1):
    """One Gaussian + constant offset: costs, new weights and normal equations in one pass.

    Slots [centre, fwhm, area, offset] (without a background the offset column is
    zero). The model is the line's average over each channel (edges ``xe``): for
    σ ≥ 2 channel widths (``dmax``, the widest) the midpoint value plus its
    curvature term, g·[1 + Δ²(u² − 1)/(24σ²)] (error O(Δ⁴/σ⁴), below 1e-4), and
    for narrower lines the exact integral (Φ(v_hi) − Φ(v_lo))/Δ from the normal
    CDF at the channel edges. Fills wn (weights at p: from the model for var_mode
    1, else a copy of w), H (4, 4) = Jᵀ Wn J and gv (4,) = Jᵀ Wn (y − f); returns
    (Σ w r², Σ wn r²): the cost under the old and the new weights. The Gaussian and
    its derivatives are evaluated only within ±9σ of the centre (beyond, they are
    below 2.2e-16, the double-precision epsilon, times their maximum); the offset
    terms use every channel. ``g_``, ``d0``, ``d1`` (n,): work rows for the model and
    its two derivatives over the window (filled first, then summed in a second loop,
    so that both loops vectorise). ``sa``, ``q``, ``fl``: the noise law (see
    :func:`_set_weights`). Loops run over unsigned channel indices: no wrap-around
    code (SIMD) and no array views (whose reference counts cost as much as the
    arithmetic at this size).
    """
    c = p[0]
    fw = p[1]
    A = p[2]
    b0 = p[3] if nbg >= 1 else 0.0
    jb0 = 1.0 if nbg >= 1 else 0.0
    sig = fw * _F2S
    inv_s = 1.0 / sig
    norm = inv_s / math.sqrt(2.0 * math.pi)
    inv_fw = 1.0 / fw
    model_w = var_mode == 1 or var_mode == 3
    one = np.uint64(1)
    i0 = np.uint64(np.searchsorted(x, c - _CUT_SIGMA * sig))
    i1 = np.uint64(max(np.searchsorted(x, c + _CUT_SIGMA * sig, side="right"), i0))
    lo_ = _bg_sums(np.uint64(0), i0, y, w, wn, b0, model_w, sa, q, fl)
    hi_ = _bg_sums(i1, np.uint64(x.size), y, w, wn, b0, model_w, sa, q, fl)
    c_old = lo_[0] + hi_[0]
    c_new = lo_[1] + hi_[1]
    h33 = (lo_[2] + hi_[2]) * jb0 * jb0
    g3 = (lo_[3] + hi_[3]) * jb0
    h00 = h01 = h02 = h03 = h11 = h12 = h13 = h22 = h23 = 0.0
    g0 = g1 = g2 = 0.0
    if sig < 2.0 * dmax:  # exact channel integrals (edges shared by neighbours)
        v_lo = (xe[i0] - c) * inv_s
        t_lo, p_lo = _tail(v_lo)
        ph_lo = _exp_neg(-0.5 * v_lo * v_lo) * _INV_SQRT_2PI
        for i in range(i0, i1):
            v_hi = (xe[i + one] - c) * inv_s
            t_hi, p_hi = _tail(v_hi)
            ph_hi = _exp_neg(-0.5 * v_hi * v_hi) * _INV_SQRT_2PI
            idw = 1.0 / (xe[i + one] - xe[i])
            g_[i] = _phi_diff(t_lo, p_lo, t_hi, p_hi) * idw
            d0[i] = A * idw * (ph_lo - ph_hi) * inv_s
            d1[i] = A * idw * (ph_lo * v_lo - ph_hi * v_hi) * inv_fw
            v_lo, t_lo, p_lo, ph_lo = v_hi, t_hi, p_hi, ph_hi
    else:  # midpoint value plus its curvature term
        for i in range(i0, i1):
            u = (x[i] - c) * inv_s
            uu = u * u
            G = _exp_neg(-0.5 * uu) * norm
            dw = (xe[i + one] - xe[i]) * inv_s
            h = dw * dw * (1.0 / 24.0)
            T = 1.0 + h * (uu - 1.0)
            g_[i] = G * T
            d0[i] = A * G * u * inv_s * (T - 2.0 * h)
            d1[i] = A * G * inv_fw * ((uu - 1.0) * T - 2.0 * h * (2.0 * uu - 1.0))
    for i in range(i0, i1):
        gi, j0, j1 = g_[i], d0[i], d1[i]
        fi = A * gi + b0
        r = y[i] - fi
        wo = w[i]
        wv = 1.0 / max(sa[i] * fi + q[i], fl[i]) if model_w else wo
        wn[i] = wv
        c_old += wo * r * r
        c_new += wv * r * r
        w0, w1, w2, w3 = wv * j0, wv * j1, wv * gi, wv * jb0
        h00 += w0 * j0
        h01 += w0 * j1
        h02 += w0 * gi
        h03 += w0 * jb0
        h11 += w1 * j1
        h12 += w1 * gi
        h13 += w1 * jb0
        h22 += w2 * gi
        h23 += w2 * jb0
        h33 += w3 * jb0
        g0 += w0 * r
        g1 += w1 * r
        g2 += w2 * r
        g3 += w3 * r
    vals = (h00, h01, h02, h03, h11, h12, h13, h22, h23, h33)
    k = 0
    for a in range(4):
        for b in range(a, 4):
            H[a, b] = vals[k]
            H[b, a] = vals[k]
            k += 1
    gv[0], gv[1], gv[2], gv[3] = g0, g1, g2, g3
    return c_old, c_new


@nb.njit(cache=True, error_model="numpy", _nrt=False)
def _collapse_normal(H, gv, free_idx, A, g):
    """Normal equations of the free parameters from those of the full ones (shared → summed)."""
    nf = g.size
    for a in range(nf):
        g[a] = 0.0
        for b in range(nf):
            A[a, b] = 0.0
    for j in range(free_idx.size):
        fj = free_idx[j]
        if fj < 0:
            continue
        g[fj] += gv[j]
        for k in range(free_idx.size):
            fk = free_idx[k]
            if fk >= 0:
                A[fj, fk] += H[j, k]


@nb.njit(cache=True, error_model="numpy", _nrt=False)
def _cholesky(A, lam, L):
    """Factor A + lam·diag(A) = L Lᵀ (lower L); False when not positive definite."""
    n = A.shape[0]
    for i in range(n):
        for j in range(i + 1):
            s = A[i, j]
            if i == j and lam > 0.0:
                s += lam * A[i, i] + 1e-300
            for k in range(j):
                s -= L[i, k] * L[j, k]
            if i == j:
                if not (s > 0.0):
                    return False
                L[i, i] = math.sqrt(s)
            else:
                L[i, j] = s / L[j, j]
    return True


@nb.njit(cache=True, error_model="numpy", _nrt=False)
def _chol_solve(L, b, out):
    n = b.size
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


@nb.njit(cache=True, error_model="numpy", _nrt=False)
def _spd_inverse(A, scale, L, e, d, cov):
    """cov = scale·A⁻¹ for symmetric positive definite A (one factorisation); NaN if singular."""
    nf = A.shape[0]
    if not _cholesky(A, 0.0, L):
        cov[:, :] = np.nan
        return
    for c in range(nf):
        for a in range(nf):
            e[a] = 1.0 if a == c else 0.0
        _chol_solve(L, e, d)
        for a in range(nf):
            cov[a, c] = d[a] * scale


@nb.njit(cache=True, error_model="numpy")
def _cov_inactive(A, p, lo, hi, free_idx, scale, L, e, d, cov, work):
    """Covariance with parameters at a bound, or without any leverage, held fixed.

    A free parameter at a bound (or whose column of Jᵀ W J is ~0, e.g. the centre of
    a peak whose area went to 0) carries no Gaussian uncertainty and would make
    Jᵀ W J singular; it is held fixed (standard practice for bounded least squares),
    its variance set NaN and its covariances 0, so the others stay defined.
    """
    act = np.zeros(A.shape[0], dtype=np.bool_)
    _cov_inactive_into(A, p, lo, hi, free_idx, scale, L, e, d, cov, work, act)


@nb.njit(cache=True, error_model="numpy", _nrt=False)
def _cov_inactive_into(A, p, lo, hi, free_idx, scale, L, e, d, cov, work, act):
    """:func:`_cov_inactive` with the mask ``act`` (nfree,) bool given (no allocation)."""
    nf = A.shape[0]
    for a in range(nf):
        act[a] = False
        for b in range(nf):
            work[a, b] = A[a, b]
    for j in range(free_idx.size):
        fj = free_idx[j]
        if fj >= 0 and (p[j] <= lo[j] or p[j] >= hi[j]):
            act[fj] = True
    for a in range(nf):
        if not (A[a, a] > 0.0):  # an exactly zero column (e.g. a peak of zero area)
            act[a] = True
    for a in range(nf):
        if act[a]:
            for b in range(nf):
                work[a, b] = 0.0
                work[b, a] = 0.0
            work[a, a] = 1.0
    _spd_inverse(work, scale, L, e, d, cov)
    for a in range(nf):
        if act[a]:
            for b in range(nf):
                cov[a, b] = 0.0
                cov[b, a] = 0.0
            cov[a, a] = np.nan


@nb.njit(cache=True, error_model="numpy", _nrt=False)
def _predicted_drop(A, g, d):
    """Cost decrease the quadratic model predicts for step d: 2 d·g − d·A·d."""
    s = 0.0
    for a in range(g.size):
        q = 0.0
        for b in range(g.size):
            q += A[a, b] * d[b]
        s += d[a] * (2.0 * g[a] - q)
    return s


# 3-point Gauss–Legendre on one channel, as an average: nodes m ± √(3/5)·Δ/2 and m
_GL_X = math.sqrt(0.6) * 0.5
_GL_W_SIDE, _GL_W_MID = 5.0 / 18.0, 8.0 / 18.0
# with every FWHM ≥ this many (widest) channels, the midpoint value stands for the
# channel average (Gaussian FWHM bias Δ²/(24σ²) < 0.25 %); narrower: Gauss–Legendre
_NARROW_CHANNELS = 10.0


@nb.njit(cache=True, error_model="numpy", fastmath=FM)
def _model_avg(model, x, x3, xref, p, K, nbg, f, J, f3, J3, narrow_lim):
    """Channel averages of the model and its Jacobian (see ``_NARROW_CHANNELS``)."""
    npp = 3 if (model == GAUSSIAN or model == LORENTZIAN) else 4
    narrow = False
    for k in range(K):
        if p[k * npp + 1] < narrow_lim:
            narrow = True
    if not narrow:
        _model_cols(model, x, xref, p, K, nbg, f, J, True)
        return
    _model_cols(model, x3, xref, p, K, nbg, f3, J3, True)
    n = x.size
    for i in range(n):
        f[i] = _GL_W_SIDE * (f3[3 * i] + f3[3 * i + 2]) + _GL_W_MID * f3[3 * i + 1]
    for j in range(J.shape[0]):
        for i in range(n):
            J[j, i] = _GL_W_SIDE * (J3[j, 3 * i] + J3[j, 3 * i + 2]) + _GL_W_MID * J3[j, 3 * i + 1]


@nb.njit(cache=True, error_model="numpy")
def _evaluate(p, y, w, wk, fused, free_idx, ident, var_mode, nv, f, wn, A, g):
    """Model, costs, new weights and normal equations at p; returns (cost_old_w, cost_new_w).

    ``wk`` = (x, xref, model, K, nbg, J, Jf, H, gv, wj, xe, x3, f3, J3, dmax, gb) work
    items; ``fused``: the single-Gaussian one-pass kernel, else channel-averaged
    model + Jacobian columns then dot products. ``nv`` = (sa, q, fl): the noise law.
    """
    x, xref, model, K, nbg, J, Jf, H, gv, wj, xe, x3, f3, J3, dmax, gb = wk
    if fused:
        sa, q, fl = nv
        c_old, c_new = _gauss1_pass(p, nbg, x, xe, dmax, y, w, var_mode, sa, q, fl, wn, H, gv,
                                    gb[0], gb[1], gb[2])
        _collapse_normal(H, gv, free_idx, A, g)
        return c_old, c_new
    _model_avg(model, x, x3, xref, p, K, nbg, f, J, f3, J3, _NARROW_CHANNELS * dmax)
    c_old = _wcost(y, f, w)
    if var_mode == 1 or var_mode == 3:
        _set_weights(f, y, var_mode, nv, wn)
        c_new = _wcost(y, f, wn)
    else:
        wn[:] = w
        c_new = c_old
    _normal_eq(_collapse(J, free_idx, g.size, ident, Jf), y, f, wn, A, g, wj)
    return c_old, c_new


@nb.njit(cache=True, error_model="numpy")
def _fit_one(y, p, lo, hi, free_idx, ident, fused, var_mode, nv, max_iter, ftol, xtol, stol,
             wk, vec, mats, small_vec, pn):  # fmt: skip
    """Fit one spectrum in place (p); return (status, chi2_red, n_iter); cov in mats[3].

    With Poisson weights (var_mode 1) the weights are refreshed from the model at
    every accepted point (iteratively reweighted), so they converge to the
    variance of the fitted model; a trial step is judged with the weights of the
    point it starts from. Each evaluation also forms the normal equations at the
    new point, so an accepted step costs one pass over the channels and the last
    accepted point's Jᵀ W J gives the covariance without another pass.
    """
    n = y.size
    nfull = p.size
    nfree = small_vec.shape[1]
    fl = nv[2]
    n_used = 0
    for i in range(n):
        if fl[i] < np.inf:
            n_used += 1
    dof = max(n_used - nfree, 1)
    f, fn, w, wn = vec[0], vec[1], vec[2], vec[3]
    A, An, L, cov = mats[0], mats[1], mats[2], mats[3]
    g, gn, d, e = small_vec[0], small_vec[1], small_vec[2], small_vec[3]
    for j in range(nfull):
        p[j] = min(max(p[j], lo[j]), hi[j])
    # weights for the first evaluation: unit, or from the data (var_mode 2); with
    # var_mode 1 the evaluation replaces them by weights from the model
    _set_weights(y, y, 2 if var_mode == 2 else 0, nv, w)
    _, cost = _evaluate(p, y, w, wk, fused, free_idx, ident, var_mode, nv, f, wn, A, g)
    w, wn = wn, w
    status = STATUS_MAXITER
    lam = 1e-3
    it = 0
    while it < max_iter:
        it += 1
        accepted = final = False
        cost_trial = cost_new = cost
        for _trial in range(12):
            if not _cholesky(A, lam, L):
                lam *= 10.0
                continue
            _chol_solve(L, g, d)
            for j in range(nfull):
                fj = free_idx[j]
                pn[j] = p[j] if fj < 0 else min(max(p[j] + d[fj], lo[j]), hi[j])
            # a step of stol standard errors lowers χ² by stol² (absolute weights) or by
            # stol²·χ²_red (unit weights, errors scaled by χ²_red)
            drop_tol = stol * stol * (cost / dof if var_mode == 0 or var_mode == 3 else 1.0)
            if lam <= 1e-2 and _predicted_drop(A, g, d) <= max(ftol * cost, drop_tol):
                # an (almost) Gauss–Newton step whose predicted cost drop is below ftol
                # (the test after evaluating it would stop) or that moves the
                # parameters by less than ~stol standard errors:
                # take it unevaluated and stop; what remains is of second order in
                # the step (covariance and χ² from this point)
                for j in range(nfull):
                    p[j] = pn[j]
                final = True
                break
            cost_trial, cost_new = _evaluate(
                pn, y, w, wk, fused, free_idx, ident, var_mode, nv, fn, wn, An, gn
            )
            if cost_trial <= cost and math.isfinite(cost_trial):
                accepted = True
                break
            lam *= 10.0
        if final:
            status = STATUS_CONVERGED
            break
        if not accepted:
            status = STATUS_CONVERGED  # no downhill step left: at a minimum
            break
        small = True
        for j in range(nfull):
            if abs(pn[j] - p[j]) > xtol * (abs(p[j]) + 1e-12):
                small = False
            p[j] = pn[j]
        f, fn = fn, f
        w, wn = wn, w
        A, An = An, A
        g, gn = gn, g
        lam = max(lam * 0.1, 1e-12)
        done = cost - cost_trial <= ftol * cost_trial or small
        cost = cost_new
        if done:
            status = STATUS_CONVERGED
            break
    chi2 = cost / dof
    scaled = var_mode == 0 or var_mode == 3  # errors scaled by the residual
    _cov_inactive(A, p, lo, hi, free_idx, chi2 if scaled else 1.0, L, e, d, cov, An)
    for j in range(nfull):
        if not math.isfinite(p[j]):
            status = STATUS_FAILED
    if not math.isfinite(chi2):
        status = STATUS_FAILED
    return status, chi2, it


@nb.njit(cache=True, error_model="numpy", _nrt=False)
def _fit_gauss1(y, p, lo, hi, free_idx, nbg, var_mode, sa, q, fl, x, xe, dmax, max_iter,
                ftol, xtol, stol, W0, W1, g_, d0, d1, H, gv, A, An, L, cov, g, gn, d, e,
                pn, act):  # fmt: skip
    """:func:`_fit_one` for one Gaussian + constant (or no) background, in place (p).

    The same iterations, tests and arithmetic as :func:`_fit_one` with the fused pass
    (results bit-identical), written without tuples of arrays, array views or
    allocations in the loop: their reference counting and allocation cost more than
    the two passes over the channels themselves. The weights alternate between W0 and
    W1 (which one is current: ``cur``) instead of swapping array variables. Returns
    (status, chi2_red, n_iter); the covariance is left in ``cov``.
    """
    n = y.size
    nfull = p.size
    nfree = g.size
    n_used = 0
    for i in range(n):
        if fl[i] < np.inf:
            n_used += 1
    dof = max(n_used - nfree, 1)
    for j in range(nfull):
        p[j] = min(max(p[j], lo[j]), hi[j])
    if var_mode == 2:
        for i in range(n):
            W0[i] = 1.0 / max(sa[i] * y[i] + q[i], fl[i])
    else:
        for i in range(n):
            W0[i] = 1.0 if fl[i] < np.inf else 0.0
    _, cost = _gauss1_pass(p, nbg, x, xe, dmax, y, W0, var_mode, sa, q, fl, W1, H, gv,
                           g_, d0, d1)  # fmt: skip
    _collapse_normal(H, gv, free_idx, A, g)
    cur = 1  # W1 holds the weights at p
    status = STATUS_MAXITER
    lam = 1e-3
    it = 0
    while it < max_iter:
        it += 1
        accepted = final = False
        cost_trial = cost_new = cost
        for _trial in range(12):
            if not _cholesky(A, lam, L):
                lam *= 10.0
                continue
            _chol_solve(L, g, d)
            for j in range(nfull):
                fj = free_idx[j]
                pn[j] = p[j] if fj < 0 else min(max(p[j] + d[fj], lo[j]), hi[j])
            drop_tol = stol * stol * (cost / dof if var_mode == 0 or var_mode == 3 else 1.0)
            if lam <= 1e-2 and _predicted_drop(A, g, d) <= max(ftol * cost, drop_tol):
                for j in range(nfull):
                    p[j] = pn[j]
                final = True
                break
            if cur == 1:
                cost_trial, cost_new = _gauss1_pass(pn, nbg, x, xe, dmax, y, W1, var_mode, sa,
                                                    q, fl, W0, H, gv, g_, d0, d1)  # fmt: skip
            else:
                cost_trial, cost_new = _gauss1_pass(pn, nbg, x, xe, dmax, y, W0, var_mode, sa,
                                                    q, fl, W1, H, gv, g_, d0, d1)  # fmt: skip
            _collapse_normal(H, gv, free_idx, An, gn)
            if cost_trial <= cost and math.isfinite(cost_trial):
                accepted = True
                break
            lam *= 10.0
        if final:
            status = STATUS_CONVERGED
            break
        if not accepted:
            status = STATUS_CONVERGED  # no downhill step left: at a minimum
            break
        small = True
        for j in range(nfull):
            if abs(pn[j] - p[j]) > xtol * (abs(p[j]) + 1e-12):
                small = False
            p[j] = pn[j]
        cur = 1 - cur
        for a in range(nfree):
            g[a] = gn[a]
            for b in range(nfree):
                A[a, b] = An[a, b]
        lam = max(lam * 0.1, 1e-12)
        done = cost - cost_trial <= ftol * cost_trial or small
        cost = cost_new
        if done:
            status = STATUS_CONVERGED
            break
    chi2 = cost / dof
    scaled = var_mode == 0 or var_mode == 3  # errors scaled by the residual
    _cov_inactive_into(A, p, lo, hi, free_idx, chi2 if scaled else 1.0, L, e, d, cov, An, act)
    for j in range(nfull):
        if not math.isfinite(p[j]):
            status = STATUS_FAILED
    if not math.isfinite(chi2):
        status = STATUS_FAILED
    return status, chi2, it


@nb.njit(cache=True, error_model="numpy")
def _lm_gauss1_batch(Y, rows, x, xe, P0, lo, hi, free_idx, nfree, nbg, var_mode, VS, VP, va,
                     vb, vfl, max_iter, ftol, xtol, stol, dmax, P, COV, chi2, status,
                     niter):  # fmt: skip
    """The rows loop of :func:`lm_batch` for one Gaussian + constant (or no) background.

    Work arrays are allocated once; the noise law is set up once when it is the same
    for every row (VS and VP of one row), and only masked channels' floors are then
    changed and restored per row.
    """
    m = rows.size
    n = Y.shape[1]
    nfull = P0.shape[1]
    y = np.empty(n)
    sa, q, fl, fl0 = np.ones(n), np.zeros(n), np.ones(n), np.ones(n)
    W0, W1 = np.empty(n), np.empty(n)
    g_, d0, d1 = np.empty(n), np.empty(n), np.empty(n)
    H, gv = np.zeros((4, 4)), np.zeros(4)
    A, An, L, cov = (np.zeros((nfree, nfree)), np.zeros((nfree, nfree)),
                     np.zeros((nfree, nfree)), np.zeros((nfree, nfree)))  # fmt: skip
    g, gn, d, e = np.zeros(nfree), np.zeros(nfree), np.zeros(nfree), np.zeros(nfree)
    pn, p = np.empty(nfull), np.empty(nfull)
    act = np.zeros(nfree, dtype=np.bool_)
    s_wide, p_wide = VS.shape[1] > 1, VP.shape[1] > 1
    per_row = var_mode != 0 and (VS.shape[0] > 1 or VP.shape[0] > 1)
    if var_mode != 0 and not per_row:
        for c in range(n):
            sc = VS[0, c if s_wide else 0]
            pc = VP[0, c if p_wide else 0]
            sa[c] = va * sc
            q[c] = sc * sc * (va * pc + vb)
            fl0[c] = sc * sc * vfl
    for k in range(m):
        i = rows[k]
        if per_row:
            si, pi = min(i, VS.shape[0] - 1), min(i, VP.shape[0] - 1)
            for c in range(n):
                sc = VS[si, c if s_wide else 0]
                pc = VP[pi, c if p_wide else 0]
                sa[c] = va * sc
                q[c] = sc * sc * (va * pc + vb)
                fl0[c] = sc * sc * vfl
        for c in range(n):  # a masked (NaN) channel: infinite variance, weight 0
            v = Y[i, c]
            if math.isfinite(v):
                y[c] = v
                fl[c] = fl0[c]
            else:
                y[c] = 0.0
                fl[c] = np.inf
        for j in range(nfull):
            p[j] = P0[k, j]
        st, c2, it = _fit_gauss1(y, p, lo, hi, free_idx, nbg, var_mode, sa, q, fl, x, xe,
                                 dmax, max_iter, ftol, xtol, stol, W0, W1, g_, d0, d1, H,
                                 gv, A, An, L, cov, g, gn, d, e, pn, act)  # fmt: skip
        for j in range(nfull):
            P[k, j] = p[j]
        for a in range(nfree):
            for b in range(nfree):
                COV[k, a, b] = cov[a, b]
        chi2[k] = c2
        status[k] = st
        niter[k] = it


@nb.njit(cache=True, error_model="numpy", nogil=True)
def lm_batch(Y, rows, x, xe, xref, P0, lo, hi, free_idx, nfree, model, K, nbg, var_mode,
             VS, VP, va, vb, vfl, max_iter, ftol, xtol, stol):  # fmt: skip
    """Batched Levenberg–Marquardt over the rows ``rows`` of Y (n_pix, n_ch), float32/64.

    ``xe`` (n_ch + 1): channel edges (the model is averaged over each channel).
    var_mode: 0 unit weights, errors scaled by the residual; 1 weights from the model
    and the noise law, absolute errors; 2 weights from the data; 3 weights from the
    model and the noise law, errors scaled by the residual (the law's shape is right,
    its level is not: correlated noise). Noise law (see :mod:`pmap.noise`): per row i and channel c,
    variance = max(a·s·value + s²(a·p + b), s²·floor) with s = VS[i, c], p = VP[i, c]
    (a row or column of length 1 broadcasts), a = ``va``, b = ``vb``, floor = ``vfl``.

    ``P0`` (len(rows), n_full): starting values (fixed parameters hold their value);
    ``lo``/``hi`` (n_full,): bounds. Returns (P (m, n_full), COV (m, nfree, nfree),
    chi2_red (m,), status (m,), n_iter (m,)) for the m = len(rows) spectra.
    One Gaussian peak with a constant (or no) background uses the one-pass kernel. Releases the GIL: dask threads
    run chunks concurrently.
    """
    m = rows.size
    n = Y.shape[1]
    nfull = P0.shape[1]
    P = np.empty((m, nfull))
    COV = np.empty((m, nfree, nfree))
    chi2 = np.empty(m)
    status = np.empty(m, dtype=np.int64)
    niter = np.empty(m, dtype=np.int64)
    ident = nfree == nfull
    for j in range(nfull):
        if free_idx[j] != j:
            ident = False
    fused = model == GAUSSIAN and K == 1 and nbg <= 1
    dmax = 0.0
    for c in range(n):
        dmax = max(dmax, xe[c + 1] - xe[c])
    if fused:
        _lm_gauss1_batch(Y, rows, x, xe, P0, lo, hi, free_idx, nfree, nbg, var_mode, VS, VP,
                         va, vb, vfl, max_iter, ftol, xtol, stol, dmax, P, COV, chi2, status,
                         niter)  # fmt: skip
        return P, COV, chi2, status, niter
    y = np.empty(n)
    vec = np.empty((4, n))
    x3 = np.empty(3 * n)
    for c in range(n):
        mid = 0.5 * (xe[c] + xe[c + 1])
        h = (xe[c + 1] - xe[c]) * _GL_X
        x3[3 * c], x3[3 * c + 1], x3[3 * c + 2] = mid - h, mid, mid + h
    wk = (x, xref, model, K, nbg, np.zeros((nfull, n)), np.zeros((nfree, n)),
          np.zeros((4, 4)), np.zeros(4), np.empty(n), xe, x3, np.empty(3 * n),
          np.zeros((nfull, 3 * n)), dmax, np.empty((3, n)))  # fmt: skip
    sa, q, fl = np.ones(n), np.zeros(n), np.ones(n)
    nv = (sa, q, fl)
    s_wide, p_wide = VS.shape[1] > 1, VP.shape[1] > 1
    mats = np.zeros((4, nfree, nfree))
    small_vec = np.zeros((4, nfree))
    pn = np.empty(nfull)
    p = np.empty(nfull)
    for k in range(m):
        i = rows[k]
        if var_mode != 0:
            si, pi = min(i, VS.shape[0] - 1), min(i, VP.shape[0] - 1)
            for c in range(n):
                sc = VS[si, c if s_wide else 0]
                pc = VP[pi, c if p_wide else 0]
                sa[c] = va * sc
                q[c] = sc * sc * (va * pc + vb)
                fl[c] = sc * sc * vfl
        for c in range(n):  # a masked (NaN) channel: infinite variance, weight 0
            v = Y[i, c]
            if math.isfinite(v):
                y[c] = v
                if var_mode == 0:
                    fl[c] = 1.0
            else:
                y[c] = 0.0
                fl[c] = np.inf
        for j in range(nfull):
            p[j] = P0[k, j]
        st, c2, it = _fit_one(y, p, lo, hi, free_idx, ident, fused, var_mode, nv,
                              max_iter, ftol, xtol, stol, wk, vec, mats, small_vec,
                              pn)  # fmt: skip
        P[k] = p
        COV[k] = mats[3]
        chi2[k] = c2
        status[k] = st
        niter[k] = it
    return P, COV, chi2, status, niter


@nb.njit(cache=True, error_model="numpy", nogil=True, fastmath=FM)
def count_finite(Y):
    """Number of finite values in each row of Y (m, n): (m,) int64."""
    m, n = Y.shape
    out = np.empty(m, dtype=np.int64)
    for r in range(m):
        row = Y[r]
        c = 0
        for i in range(n):
            c += 1 if math.isfinite(row[i]) else 0
        out[r] = c
    return out


@nb.njit(cache=True, error_model="numpy", fastmath=FM)
def _smooth3(yb, s):
    """s[c] = mean of yb[c−1..c+1] for 1 ≤ c ≤ n−2 (views: indices provably ≥ 0, SIMD)."""
    a, b, c, t = yb[:-2], yb[1:-1], yb[2:], s[1:-1]
    for i in range(t.size):
        t[i] = (a[i] + b[i] + c[i]) * (1.0 / 3.0)


@nb.njit(cache=True, error_model="numpy", fastmath=FM)
def _sum_d2_squared(yb):
    """Σ (second difference)² of yb."""
    a, b, c = yb[:-2], yb[1:-1], yb[2:]
    q = 0.0
    for i in range(a.size):
        d2 = c[i] - 2.0 * b[i] + a[i]
        q += d2 * d2
    return q


@nb.njit(cache=True, error_model="numpy", fastmath=True)
def _min_max(s):
    """(min, max) of a finite array, four interleaved chains (latency, not one long chain)."""
    n = s.size
    l0 = l1 = l2 = l3 = h0 = h1 = h2 = h3 = s[0]
    m = n - n % 4
    for c in range(0, m, 4):
        a, b, d, e = s[c], s[c + 1], s[c + 2], s[c + 3]
        l0, l1, l2, l3 = min(l0, a), min(l1, b), min(l2, d), min(l3, e)
        h0, h1, h2, h3 = max(h0, a), max(h1, b), max(h2, d), max(h3, e)
    for c in range(m, n):
        l0, h0 = min(l0, s[c]), max(h0, s[c])
    return min(min(l0, l1), min(l2, l3)), max(max(h0, h1), max(h2, h3))


@nb.njit(cache=True, error_model="numpy")
def _half_width(x, s, im, half):
    """Width where s crosses ``half`` nearest im on each side (linear interpolation).

    Returns (width, left, right): left/right are the first channels below ``half``
    (−1 / n when none; width NaN then).
    """
    n = s.size
    left = im - 1
    while left >= 0 and not (s[left] < half):
        left -= 1
    right = im + 1
    while right < n and not (s[right] < half):
        right += 1
    if left < 0 or right >= n:
        return np.nan, left, right
    xl = x[left] + (half - s[left]) * (x[left + 1] - x[left]) / (s[left + 1] - s[left])
    xr = x[right - 1] + (half - s[right - 1]) * (x[right] - x[right - 1]) / (
        s[right] - s[right - 1]
    )
    return xr - xl, left, right


@nb.njit(cache=True, error_model="numpy")
def _log_parabola(x, yb, s, im, b, fw):
    """Non-iterative Gaussian estimate: offset from the wings, then Caruana's log-parabola.

    Offset = mean of the channels further than 2·fw from the maximum (≥ 8 of them);
    then ln(y − offset) = a0 + a1 t + a2 t² (t = x − x[imax]) by least squares over
    (about 12 of) the channels above half maximum, weighted by (y − offset)² (Guo's weighting
    against the noise that the logarithm amplifies). Returns (offset, height,
    centre, fwhm), NaN where the estimate fails. Caruana et al., Anal. Chem. 58,
    1162 (1986); Guo, IEEE Signal Process. Mag. 28, 134 (2011).
    """
    n = x.size
    nan = np.nan
    xm = x[im]
    off = b
    if math.isfinite(fw):
        acc = 0.0
        cnt = 0
        for c in range(n):
            if abs(x[c] - xm) > 2.0 * fw:
                acc += yb[c]
                cnt += 1
        if cnt >= 8:
            off = acc / cnt
    h = s[im] - off
    if not h > 0.0:
        return nan, nan, nan, nan
    _, left, right = _half_width(x, s, im, off + 0.5 * h)
    lo = left + 1
    hi = right - 1
    if hi - lo < 2:
        return nan, nan, nan, nan
    S0 = S1 = S2 = S3 = S4 = T0 = T1 = T2 = 0.0
    step = max(1, (hi - lo + 1) // 1000)  # ~1000 channels are plenty for a starting value
    for c in range(lo, hi + 1, step):
        v = yb[c] - off
        if not v > 0.0:
            continue
        t = x[c] - xm
        w = v * v
        lv = _log_pos(v)
        t2 = t * t
        S0 += w
        S1 += w * t
        S2 += w * t2
        S3 += w * t2 * t
        S4 += w * t2 * t2
        T0 += w * lv
        T1 += w * lv * t
        T2 += w * lv * t2
    # 3×3 symmetric system [[S0,S1,S2],[S1,S2,S3],[S2,S3,S4]] a = T, Cramer's rule
    det = S0 * (S2 * S4 - S3 * S3) - S1 * (S1 * S4 - S3 * S2) + S2 * (S1 * S3 - S2 * S2)
    if not abs(det) > 0.0:
        return nan, nan, nan, nan
    d0 = T0 * (S2 * S4 - S3 * S3) - S1 * (T1 * S4 - S3 * T2) + S2 * (T1 * S3 - S2 * T2)
    d1 = S0 * (T1 * S4 - T2 * S3) - T0 * (S1 * S4 - S3 * S2) + S2 * (S1 * T2 - T1 * S2)
    d2 = S0 * (S2 * T2 - S3 * T1) - S1 * (S1 * T2 - T1 * S2) + T0 * (S1 * S3 - S2 * S2)
    a0, a1, a2 = d0 / det, d1 / det, d2 / det
    if not a2 < 0.0:
        return nan, nan, nan, nan
    centre = xm - a1 / (2.0 * a2)
    fwhm = math.sqrt(-1.0 / (2.0 * a2)) / _F2S
    height = math.exp(min(a0 - a1 * a1 / (4.0 * a2), 700.0))
    if not (x[left + 1] <= centre <= x[right - 1]) or not (0.0 < fwhm < 4.0 * (x[-1] - x[0])):
        return nan, nan, nan, nan
    return off, height, centre, fwhm


@nb.njit(cache=True, error_model="numpy", nogil=True)
def _parabolic_vertex(x, y, im):
    """Abscissa of the parabola through channel im and its neighbours (any spacing);
    x[im] at the axis ends or when the vertex falls outside the three channels."""
    n = y.size
    i1 = min(max(im, 1), n - 2)
    x0, x1, x2 = x[i1 - 1], x[i1], x[i1 + 1]
    y0, y1, y2 = y[i1 - 1], y[i1], y[i1 + 1]
    num = (x1 - x0) ** 2 * (y1 - y2) - (x1 - x2) ** 2 * (y1 - y0)
    den = (x1 - x0) * (y1 - y2) - (x1 - x2) * (y1 - y0)
    xv = x1 - 0.5 * num / den if den != 0.0 else np.nan
    if im <= 0 or im >= n - 1 or not math.isfinite(xv) or xv < x0 or xv > x2:
        return x[im]
    return xv


@nb.njit(cache=True, error_model="numpy", nogil=True, fastmath=FM)
def describe_rows(Y, x):
    """Per-spectrum quantities for starting values and the signal test, one pass per row.

    On the 3-channel running mean s (edges kept): ``base`` = min s, ``imax`` =
    argmax s, ``height`` = s[imax] − base, ``e_max`` = vertex of the parabola
    through imax and its neighbours (x[imax] at the edges), ``fwhm`` = width where
    s crosses base + height/2 nearest imax on each side (linear interpolation; NaN
    when a side never crosses); on the raw row, ``noise`` = white-noise σ from
    second differences, var(Δ²y) = 6σ²; then a refined Gaussian estimate
    (:func:`_log_parabola`: offset, height, centre, fwhm; NaN where it fails).
    Returns (finite (m,) bool, imax (m,), D (m, 9) = [base, height, e_max, fwhm,
    noise, offset_est, height_est, centre_est, fwhm_est]); rows with NaN/Inf are NaN.
    """
    m, n = Y.shape
    finite = np.zeros(m, dtype=np.bool_)
    imax = np.zeros(m, dtype=np.int64)
    D = np.full((m, 9), np.nan)
    yb = np.empty(n)
    s = np.empty(n)
    for r in range(m):
        tot = 0.0
        for c in range(n):
            v = float(Y[r, c])
            yb[c] = v
            tot += v * 0.0  # NaN when any channel is NaN or infinite
        if not math.isfinite(tot):
            continue
        finite[r] = True
        s[0] = yb[0]
        s[n - 1] = yb[n - 1]
        _smooth3(yb, s)
        b, top = _min_max(s)
        im = 0
        while s[im] < top:
            im += 1
        h = s[im] - b
        xv = _parabolic_vertex(x, s, im)
        fw, _, _ = _half_width(x, s, im, b + 0.5 * h)
        q = _sum_d2_squared(yb)
        imax[r] = im
        D[r, 0] = b
        D[r, 1] = h
        D[r, 2] = xv
        D[r, 3] = fw
        D[r, 4] = math.sqrt(q / (n - 2) / 6.0) if n >= 4 else 0.0
        D[r, 5], D[r, 6], D[r, 7], D[r, 8] = _log_parabola(x, yb, s, im, b, fw)
    return finite, imax, D


@nb.njit(cache=True, error_model="numpy", nogil=True)
def descriptor_rows(Y, x, win, ww, ratio, wr1, wr2):
    """Spectral descriptors of rows Y (m, n), one pass per row, into (m, 5).

    Columns: [vertex of the parabola through the maximum channel and its neighbours
    (x[imax] at the edges), centroid Σ w·x·y / Σ w·y over ``win`` = (start, stop) with
    trapezoid weights ``ww``, the integral Σ w·y, the FWHM at half the maximum (linear
    interpolation, NaN when a side never falls below it or the maximum is ≤ 0), the
    ratio of the integrals over ratio = (a0, a1, b0, b1) with weights wr1, wr2 (NaN
    when a0 < 0)]. Rows with any NaN/Inf give NaN throughout.
    """
    m, n = Y.shape
    out = np.full((m, 5), np.nan)
    yb = np.empty(n)
    for r in range(m):
        tot = 0.0
        im = 0
        top = -np.inf
        for c in range(n):
            v = float(Y[r, c])
            yb[c] = v
            tot += v * 0.0  # NaN when any channel is NaN or infinite
            if v > top:
                top = v
                im = c
        if not math.isfinite(tot):
            continue
        out[r, 0] = _parabolic_vertex(x, yb, im)
        s0 = 0.0
        s1 = 0.0
        for j in range(win[1] - win[0]):
            wy = ww[j] * yb[win[0] + j]
            s0 += wy
            s1 += wy * x[win[0] + j]
        out[r, 1] = s1 / s0
        out[r, 2] = s0
        if top > 0:
            fw, _, _ = _half_width(x, yb, im, 0.5 * top)
            out[r, 3] = fw
        if ratio[0] >= 0:
            a = 0.0
            for j in range(ratio[1] - ratio[0]):
                a += wr1[j] * yb[ratio[0] + j]
            b = 0.0
            for j in range(ratio[3] - ratio[2]):
                b += wr2[j] * yb[ratio[2] + j]
            out[r, 4] = a / b if b != 0.0 else np.nan
    return out
