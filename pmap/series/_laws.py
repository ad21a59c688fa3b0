"""Published laws of a map quantity against a stack coordinate (temperature, power).

Each law gives the model, its analytic Jacobian, and a starting point found by a
grid over its one nonlinear parameter with the others solved by weighted linear
least squares (variable projection), so the Levenberg–Marquardt refinement in
:mod:`pmap.series._fit` starts in the right basin.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

#: Boltzmann constant in eV/K (exact under the 2019 SI: 1.380649e-23 J/K / 1.602176634e-19 C)
K_B_EV = 1.380649e-23 / 1.602176634e-19


@dataclass(frozen=True)
class Law:
    """One law: parameters (internal names, output names, units), model, Jacobian, start."""

    name: str
    dim: str  # the stack dimension it is written for
    dim_units: str
    default_quantities: tuple[str, ...]
    params: tuple[str, ...]  # output names without the law prefix
    units: tuple[str, ...]  # units of each parameter; "y" = units of the fitted quantity
    descriptions: tuple[str, ...]
    model: Callable  # model(x (n,), p (N, k)) -> (N, n)
    jac: Callable  # jac(x, p) -> (N, n, k)
    start: Callable  # start(x, y (N, n), w (N, n)) -> p0 (N, k)
    implausible: Callable  # implausible(p) -> bool (N,)
    reference: str
    log_params: tuple[int, ...] = field(default=())  # fitted as ln(value), reported as value

    @property
    def n_params(self) -> int:
        return len(self.params)


def _linear_grid_start(x, y, w, grid, basis, to_params):
    """Best grid point of a model linear in its other parameters (weighted LS per pixel).

    basis(x, theta) -> (n, m); to_params(coef (N, m), theta) -> (params (N, k), ok (N,)).
    """
    n_pix = y.shape[0]
    best = np.full(n_pix, np.inf)
    out = None
    w2 = w * w
    w2y = w2 * y
    yy = np.sum(w2y * y, axis=1)
    for theta in grid:
        b = basis(x, theta)  # (n, m)
        m = b.shape[1]
        outer = (b[:, :, None] * b[:, None, :]).reshape(len(x), m * m)
        a = (w2 @ outer).reshape(n_pix, m, m)  # BᵀWB per pixel, one matmul
        rhs = w2y @ b
        a += np.eye(m) * (1e-12 * np.einsum("pii->p", a)[:, None, None] + 1e-300)
        coef = np.linalg.solve(a, rhs[..., None])[..., 0]
        chi2 = yy - np.einsum("pi,pi->p", coef, rhs)  # at the LS solution
        params, ok = to_params(coef, theta)
        chi2 = np.where(ok & np.isfinite(chi2), chi2, np.inf)
        if out is None:
            out = np.array(params, dtype=float)
        better = chi2 < best
        out[better] = params[better]
        best[better] = chi2[better]
    return out


def _bose(e, t):
    """Bose–Einstein occupation 1/(exp(e/kT) − 1) and its derivative in e (1/eV)."""
    z = e / (K_B_EV * t)
    n = 1.0 / np.expm1(z)
    dn_de = -np.exp(z) * n * n / (K_B_EV * t)
    return n, dn_de


# --- Varshni, Physica 34, 149 (1967): E(T) = E0 − αT²/(T + β) -------------------------------

def _varshni_model(t, p):
    e0, a, b = p[:, 0:1], p[:, 1:2], p[:, 2:3]
    return e0 - a * t * t / (t + b)


def _varshni_jac(t, p):
    a, b = p[:, 1:2], p[:, 2:3]
    g = t * t / (t + b)
    return np.stack([np.ones_like(g), -g, a * g / (t + b)], axis=-1)


def _varshni_start(t, y, w):
    def to_params(c, beta):
        p = np.stack([c[:, 0], -c[:, 1], np.full(len(c), beta)], axis=1)
        return p, np.ones(len(c), bool)
    return _linear_grid_start(t, y, w, np.geomspace(1.0, 3000.0, 48),
                              lambda t, beta: np.stack([np.ones_like(t), t * t / (t + beta)], 1),
                              to_params)


# --- O'Donnell & Chen, Appl. Phys. Lett. 58, 2924 (1991) -------------------------------------
# E(T) = E0 − S⟨ħω⟩[coth(⟨ħω⟩/2kT) − 1] = E0 − 2S⟨ħω⟩/(exp(⟨ħω⟩/kT) − 1)

def _be_model(t, p):
    e0, s, w = p[:, 0:1], p[:, 1:2], p[:, 2:3]
    n, _ = _bose(w, t)
    return e0 - 2.0 * s * w * n


def _be_jac(t, p):
    s, w = p[:, 1:2], p[:, 2:3]
    n, dn = _bose(w, t)
    return np.stack([np.ones_like(n), -2.0 * w * n, -2.0 * s * (n + w * dn)], axis=-1)


def _be_start(t, y, w):
    def to_params(c, hw):
        return np.stack([c[:, 0], c[:, 1], np.full(len(c), hw)], axis=1), np.ones(len(c), bool)
    return _linear_grid_start(t, y, w, np.geomspace(1e-3, 0.1, 40),
                              lambda t, hw: np.stack([np.ones_like(t), -2 * hw * _bose(hw, t)[0]], 1),
                              to_params)


# --- Rudin, Reinecke & Segall, Phys. Rev. B 42, 11218 (1990) ---------------------------------
# Γ(T) = Γ0 + γT + Γ_LO/(exp(E_LO/kT) − 1)

def _lw_model(t, p):
    n, _ = _bose(p[:, 3:4], t)
    return p[:, 0:1] + p[:, 1:2] * t + p[:, 2:3] * n


def _lw_jac(t, p):
    n, dn = _bose(p[:, 3:4], t)
    return np.stack([np.ones_like(n), np.broadcast_to(t, n.shape), n, p[:, 2:3] * dn], axis=-1)


def _lw_start(t, y, w):
    def to_params(c, elo):
        return np.concatenate([c, np.full((len(c), 1), elo)], axis=1), np.ones(len(c), bool)
    return _linear_grid_start(
        t, y, w, np.linspace(0.005, 0.1, 39),
        lambda t, e: np.stack([np.ones_like(t), t, _bose(e, t)[0]], 1), to_params)


# --- thermal quenching, one channel (common practice): I(T) = I0/(1 + C exp(−Ea/kT)) ---------
# fitted with ln C (C spans decades)

def _arr_model(t, p):
    q = np.exp(p[:, 1:2] - p[:, 2:3] / (K_B_EV * t))
    return p[:, 0:1] / (1.0 + q)


def _arr_jac(t, p):
    i0 = p[:, 0:1]
    q = np.exp(p[:, 1:2] - p[:, 2:3] / (K_B_EV * t))
    d = 1.0 / (1.0 + q)
    return np.stack([d, -i0 * q * d * d, i0 * q * d * d / (K_B_EV * t)], axis=-1)


def _arr_start(t, y, w):
    # 1/I = 1/I0 + (C/I0)·exp(−Ea/kT); σ(1/I) = σ/I²
    yy = np.where(y > 0, 1.0 / np.where(y > 0, y, 1.0), 0.0)
    ww = np.where(y > 0, w * y * y, 0.0)

    def to_params(c, ea):
        ok = (c[:, 0] > 0) & (c[:, 1] > 0)
        with np.errstate(all="ignore"):
            p = np.stack([1.0 / c[:, 0], np.log(c[:, 1] / c[:, 0]), np.full(len(c), ea)], axis=1)
        return p, ok
    p = _linear_grid_start(t, yy, ww, np.geomspace(1e-3, 1.0, 40),
                           lambda t, ea: np.stack([np.ones_like(t), np.exp(-ea / (K_B_EV * t))], 1),
                           to_params)
    bad = ~np.all(np.isfinite(p), axis=1)  # no quenching seen: start from a flat curve
    if bad.any():
        i_max = np.nanmax(np.where(w > 0, y, np.nan), axis=1)
        p[bad] = np.stack([i_max[bad], np.zeros(bad.sum()), np.full(bad.sum(), 0.01)], axis=1)
    return p


# --- power law (Schmidt, Lischka & Zulehner, Phys. Rev. B 45, 8989 (1992)): I = A·(P/P_ref)^k

def _pl_model(x, p):
    return p[:, 0:1] * x ** p[:, 1:2]


def _pl_jac(x, p):
    xk = x ** p[:, 1:2]
    return np.stack([xk, p[:, 0:1] * xk * np.log(x)], axis=-1)


def _pl_start(x, y, w):
    def to_params(c, k):
        return np.stack([c[:, 0], np.full(len(c), k)], axis=1), np.ones(len(c), bool)
    return _linear_grid_start(x, y, w, np.linspace(0.1, 4.0, 40),
                              lambda x, k: (x ** k)[:, None], to_params)


LAWS: dict[str, Law] = {
    "varshni": Law(
        "varshni", "temperature", "K", ("peak_energy",),
        ("e0", "alpha", "beta"), ("eV", "eV/K", "K"),
        ("energy at 0 K", "high-temperature slope -dE/dT", "temperature scale (about the Debye "
         "temperature)"),
        _varshni_model, _varshni_jac, _varshni_start,
        lambda p: (p[:, 2] <= 0) | (p[:, 1] <= 0),
        "Varshni, Physica 34, 149 (1967): E(T) = E0 - alpha T^2/(T + beta)"),
    "bose_einstein": Law(
        "bose_einstein", "temperature", "K", ("peak_energy",),
        ("e0", "s", "phonon_energy"), ("eV", "1", "eV"),
        ("energy at 0 K", "dimensionless coupling S", "average phonon energy <hbar omega>"),
        _be_model, _be_jac, _be_start,
        lambda p: (p[:, 2] <= 0) | (p[:, 1] <= 0),
        "O'Donnell & Chen, Appl. Phys. Lett. 58, 2924 (1991): "
        "E(T) = E0 - S <hw> [coth(<hw>/2kT) - 1]"),
    "linewidth": Law(
        "linewidth", "temperature", "K", ("peak_fwhm",),
        ("gamma0", "gamma_ac", "gamma_lo", "lo_energy"), ("eV", "eV/K", "eV", "eV"),
        ("inhomogeneous width at 0 K", "acoustic-phonon coefficient",
         "LO-phonon coupling", "LO-phonon energy"),
        _lw_model, _lw_jac, _lw_start,
        lambda p: (p[:, 3] <= 0) | (p[:, 2] < 0),
        "Rudin, Reinecke & Segall, Phys. Rev. B 42, 11218 (1990): "
        "G(T) = G0 + gT + G_LO/(exp(E_LO/kT) - 1)"),
    "arrhenius": Law(
        "arrhenius", "temperature", "K", ("peak_area", "integrated_intensity"),
        ("i0", "c", "ea"), ("y", "1", "eV"),
        ("intensity at 0 K", "ratio of non-radiative to radiative rate prefactors",
         "activation energy"),
        _arr_model, _arr_jac, _arr_start,
        lambda p: (p[:, 2] <= 0) | (p[:, 0] <= 0),
        "one-channel thermal quenching (common practice): I(T) = I0/(1 + C exp(-Ea/kT))",
        log_params=(1,)),
    "power_law": Law(
        "power_law", "excitation_power", "W", ("peak_area", "integrated_intensity"),
        ("a", "k"), ("y", "1"),
        ("intensity at the reference power (attrs reference_power_W)", "power-law exponent"),
        _pl_model, _pl_jac, _pl_start,
        lambda p: p[:, 0] <= 0,
        "Schmidt, Lischka & Zulehner, Phys. Rev. B 45, 8989 (1992): I = A P^k"),
}
