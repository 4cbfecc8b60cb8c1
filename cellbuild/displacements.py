"""Thermal displacements (Debye model), random rattles and homogeneous strain.

Pure numpy/scipy helpers, no recipe plumbing. Lengths in Angstrom, masses in
atomic mass units, temperatures in kelvin.

The mean-square displacement per Cartesian component of an atom of mass m in
the Debye model, zero-point motion included, is the Debye-Waller form

    <u_x^2> = (3 hbar^2 / (m k_B Theta)) * [Phi(x)/x + 1/4],   x = Theta / T,
    Phi(x)  = (1/x) * integral_0^x t / (e^t - 1) dt

(B. T. M. Willis and A. W. Pryor, Thermal Vibrations in Crystallography (1975);
International Tables for Crystallography Vol. C), with the isotropic
B = 8 pi^2 <u_x^2> and the 3D mean-square displacement 3 <u_x^2>.
"""
from __future__ import annotations

import math

import numpy as np
from scipy import constants
from scipy.integrate import quad

#: SI constants, CODATA values as shipped by scipy.constants.
HBAR = constants.hbar  # J s
KB = constants.k  # J / K
AMU = constants.atomic_mass  # kg
_M2_TO_A2 = 1e20  # m^2 -> Angstrom^2

# Below this x the integral is taken by quad over [0, x]; above it as pi^2/6 minus
# the exact tail series, which then converges in a few terms (e^-5k).
_X_SPLIT = 5.0


def _t_over_expm1(t: float) -> float:
    # t / (e^t - 1) -> 1 as t -> 0; expm1 keeps precision at small t.
    return 1.0 if t == 0.0 else t / math.expm1(t)


def _debye_integral(x: float) -> float:
    """integral_0^x t / (e^t - 1) dt = x Phi(x), dimensionless, for x >= 0."""
    if x <= _X_SPLIT:
        return quad(_t_over_expm1, 0.0, x, epsabs=0.0, epsrel=1e-13)[0]
    # integral_x^inf t/(e^t - 1) dt = sum_k e^(-k x) (x/k + 1/k^2), from expanding
    # 1/(e^t - 1) = sum_k e^(-k t); terms below e^-40 of the first are dropped.
    k = np.arange(1, int(40.0 / x) + 2, dtype=float)
    tail = float(np.sum(np.exp(-k * x) * (x / k + 1.0 / k ** 2)))
    return math.pi ** 2 / 6.0 - tail


def debye_msd(mass_amu: float, temperature: float, debye_temperature: float) -> float:
    """Mean-square displacement <u_x^2> per Cartesian component, Angstrom^2.

    Debye model with zero-point term (formula in the module docstring):
    ``mass_amu`` in atomic mass units, ``temperature`` T and
    ``debye_temperature`` Theta in kelvin. T = 0 gives exactly the zero-point
    value 3 hbar^2 / (4 m k_B Theta); at high T the result tends to the
    classical 3 hbar^2 T / (m k_B Theta^2). Raises ValueError for mass <= 0,
    T < 0, Theta <= 0 or non-finite input.
    """
    m, t, theta = float(mass_amu), float(temperature), float(debye_temperature)
    if not all(math.isfinite(v) for v in (m, t, theta)):
        raise ValueError("mass, temperature and Debye temperature must be finite")
    if m <= 0 or t < 0 or theta <= 0:
        raise ValueError(f"need mass > 0, T >= 0, Theta > 0; got {m}, {t}, {theta}")
    prefactor = 3.0 * HBAR ** 2 / (m * AMU * KB * theta) * _M2_TO_A2
    if t == 0.0:
        return prefactor * 0.25  # x -> infinity: Phi(x)/x -> 0
    x = theta / t
    if x < 1e-3:
        # Bernoulli series of Phi(x)/x (next term x^5/211680); avoids x^2 underflow
        phi_over_x = 1.0 / x - 0.25 + x / 36.0 - x ** 3 / 3600.0
    else:
        phi_over_x = _debye_integral(x) / x ** 2
    return prefactor * (phi_over_x + 0.25)


def rattle(n_atoms: int, sigma, rng: np.random.Generator) -> np.ndarray:
    """(n_atoms, 3) Gaussian displacements, Angstrom.

    ``sigma`` (Angstrom, >= 0) is the standard deviation per Cartesian
    component: a scalar or one value per atom. Drawn in one call,
    ``rng.standard_normal((n_atoms, 3)) * sigma``, so the seed fixes the stream.
    """
    s = np.asarray(sigma, dtype=float)
    if s.ndim > 1 or (s.ndim == 1 and s.shape != (n_atoms,)):
        raise ValueError(f"sigma must be a scalar or one value per atom ({n_atoms})")
    if not np.all(np.isfinite(s)) or np.any(s < 0):
        raise ValueError("sigma must be finite and >= 0")
    # a per-atom sigma scales each row: shape (n, 1) against (n, 3)
    scale = s[:, None] if s.ndim == 1 else s
    return rng.standard_normal((n_atoms, 3)) * scale


def thermal_sigma(masses_amu: np.ndarray, temperature: float, debye_temperature) -> np.ndarray:
    """Per-atom standard deviation per component, sqrt(debye_msd), Angstrom.

    ``masses_amu`` (N,) in amu; ``debye_temperature`` (K) a scalar or (N,).
    debye_msd is evaluated once per unique (mass, Theta) pair.
    """
    masses = np.asarray(masses_amu, dtype=float).reshape(-1)
    theta = np.broadcast_to(np.asarray(debye_temperature, dtype=float), masses.shape)
    if len(masses) == 0:
        return np.zeros(0)
    pairs, inverse = np.unique(np.column_stack([masses, theta]), axis=0, return_inverse=True)
    # the loop runs over distinct (mass, Theta) pairs (a few elements), not atoms
    sigma = np.sqrt([debye_msd(m, temperature, th) for m, th in pairs])
    return sigma[inverse.reshape(-1)]


def rms_by_species(displacement: np.ndarray, species: np.ndarray, symbols) -> dict[str, float]:
    """Measured RMS displacement per Cartesian component for each element present.

    ``displacement`` (N, 3) Angstrom, ``species`` (N,) integer codes indexing
    ``symbols``. Value: sqrt(mean of d^2 over that element's atoms and the three
    components), Angstrom; keys in ``symbols`` order, absent elements omitted.
    """
    d = np.asarray(displacement, dtype=float)
    codes = np.asarray(species, dtype=np.int64)
    k = len(symbols)
    counts = np.bincount(codes, minlength=k)
    sums = np.bincount(codes, weights=np.sum(d * d, axis=1), minlength=k)
    return {symbols[c]: float(np.sqrt(sums[c] / (3 * counts[c])))
            for c in range(k) if counts[c] > 0}


def strain_matrix(volumetric: float | None = None, tensor=None) -> np.ndarray:
    """The 3x3 deformation gradient F, applied as x' = x @ F.T to cell rows and positions.

    Exactly one of: ``volumetric`` v = V/V0 - 1 (> -1), giving F = (1 + v)^(1/3) I;
    or ``tensor`` eps, the symmetric 3x3 small-strain tensor itself (not Voigt
    engineering shears gamma = 2 eps_ij), giving F = I + eps. Dimensionless.
    Raises ValueError otherwise, for non-finite values, a non-symmetric tensor
    (|eps - eps.T| > 1e-12), v <= -1 or det F <= 0.
    """
    if (volumetric is None) == (tensor is None):
        raise ValueError("give exactly one of volumetric and tensor")
    if volumetric is not None:
        v = float(volumetric)
        if not math.isfinite(v) or v <= -1:
            raise ValueError(f"volumetric strain must be finite and > -1, got {v}")
        return np.cbrt(1.0 + v) * np.eye(3)
    eps = np.asarray(tensor, dtype=float)
    if eps.shape != (3, 3):
        raise ValueError(f"strain tensor must be 3x3, got shape {eps.shape}")
    if not np.all(np.isfinite(eps)):
        raise ValueError("strain tensor must be finite")
    if np.max(np.abs(eps - eps.T)) > 1e-12:
        raise ValueError("strain tensor must be symmetric (rotations are not strain)")
    f = np.eye(3) + eps
    if np.linalg.det(f) <= 0:
        raise ValueError("strain tensor gives det(I + eps) <= 0 (cell inverted or collapsed)")
    return f


def recovered_strain(cell0: np.ndarray, cell: np.ndarray) -> dict:
    """The strain taking ``cell0`` to ``cell`` (rows, Angstrom), JSON-ready.

    ``{"volumetric": det(cell)/det(cell0) - 1, "tensor": (F + F.T)/2 - I}`` as a
    float and a nested list, where F solves cell = cell0 @ F.T (dimensionless).
    """
    c0 = np.asarray(cell0, dtype=float)
    c = np.asarray(cell, dtype=float)
    f = np.linalg.solve(c0, c).T  # cell0 @ F.T = cell
    eps = 0.5 * (f + f.T) - np.eye(3)
    volumetric = np.linalg.det(c) / np.linalg.det(c0) - 1.0
    return {"volumetric": float(volumetric), "tensor": eps.tolist()}
