"""Debye-model thermal displacements, rattles and strain, against outside sources.

Sources: the Debye-Waller form and its high-temperature expansion (B. T. M.
Willis and A. W. Pryor, Thermal Vibrations in Crystallography (1975));
Cu's Debye temperature 343 K (C. Kittel, Introduction to Solid State Physics,
Table 5.1 -- from memory); Cu's room-temperature B of about 0.55 A^2
(International Tables Vol. C / L.-M. Peng et al., Acta Cryst. A52 (1996) 456 --
from memory); the standard error of a sample variance of N normal values,
sigma^2 sqrt(2/N) (a textbook result of normal sampling theory).
Statistical checks use 4 standard errors, so they hold for any seed except with
probability ~1e-4 per check; they are run for several seeds.
"""
from __future__ import annotations

import json
import math

import numpy as np
import pytest

from cellbuild.displacements import (AMU, HBAR, KB, debye_msd, rattle, recovered_strain,
                                     rms_by_species, strain_matrix, thermal_sigma)

CU_MASS = 63.546  # amu, standard atomic weight (IUPAC)
CU_THETA = 343.0  # K, Kittel Table 5.1 (from memory)
A2 = 1e20  # m^2 -> Angstrom^2


def prefactor(mass, theta):
    """3 hbar^2 / (m k_B Theta) in Angstrom^2, computed here independently of the module."""
    return 3 * HBAR ** 2 / (mass * AMU * KB * theta) * A2


def test_high_temperature_expansion():
    # Willis & Pryor: Phi(x)/x + 1/4 = 1/x + x/36 - x^3/3600 + ..., x = Theta/T, so
    # <u_x^2> ~ prefactor * (T/Theta + Theta/(36 T)). At 3000 K the omitted term is
    # x^4/3600 ~ 5e-8 of the total, so a 1e-6 tolerance is far inside the 1 % asked.
    t = 3000.0
    expansion = prefactor(CU_MASS, CU_THETA) * (t / CU_THETA + CU_THETA / (36 * t))
    assert debye_msd(CU_MASS, t, CU_THETA) == pytest.approx(expansion, rel=1e-6)
    # ratio to the pure classical 3 hbar^2 T / (m k_B Theta^2) falls to 1 as T grows
    ratios = [debye_msd(CU_MASS, t, CU_THETA) / (prefactor(CU_MASS, CU_THETA) * t / CU_THETA)
              for t in (3000.0, 10000.0, 30000.0)]
    assert ratios[0] > ratios[1] > ratios[2] > 1.0
    assert ratios[2] == pytest.approx(1.0, rel=1e-3)


def test_debye_function_at_one():
    # At T = Theta (x = 1), Phi(1) = integral_0^1 t/(e^t - 1) dt = 0.777505
    # (Abramowitz & Stegun, Table 27.1 -- from memory).
    phi = debye_msd(CU_MASS, CU_THETA, CU_THETA) / prefactor(CU_MASS, CU_THETA) - 0.25
    assert phi == pytest.approx(0.777505, abs=1e-6)


def test_zero_point():
    # T = 0: only 3 hbar^2 / (4 m k_B Theta) remains (equal to rounding)
    zero = 3 * HBAR ** 2 / (4 * CU_MASS * AMU * KB * CU_THETA) * A2
    assert debye_msd(CU_MASS, 0.0, CU_THETA) == pytest.approx(zero, rel=1e-14)
    # and T -> 0+ joins it continuously (thermal part ~ (pi^2/6) (T/Theta)^2)
    assert debye_msd(CU_MASS, 1e-3, CU_THETA) == pytest.approx(zero, rel=1e-12)


def test_monotonic():
    temps = [0.0, 1.0, 10.0, 100.0, 343.0, 1000.0, 1e4, 1e6]
    by_t = [debye_msd(CU_MASS, t, CU_THETA) for t in temps]
    assert all(a < b for a, b in zip(by_t, by_t[1:]))
    by_mass = [debye_msd(m, 300.0, CU_THETA) for m in (1.0, 12.0, 63.546, 200.0)]
    assert all(a > b for a, b in zip(by_mass, by_mass[1:]))
    by_theta = [debye_msd(CU_MASS, 300.0, th) for th in (50.0, 200.0, 343.0, 1000.0, 2000.0)]
    assert all(a > b for a, b in zip(by_theta, by_theta[1:]))


def test_copper_room_temperature_b():
    # published B(Cu, room T) ~ 0.55 A^2 (Int. Tables C / Peng et al. 1996 -- from memory)
    b = 8 * math.pi ** 2 * debye_msd(CU_MASS, 300.0, CU_THETA)
    assert 0.4 < b < 0.7


@pytest.mark.parametrize("args", [(0.0, 300, 343), (-1.0, 300, 343), (63.5, -1, 343),
                                  (63.5, 300, 0.0), (63.5, 300, -5), (63.5, math.nan, 343)])
def test_debye_msd_rejects(args):
    with pytest.raises(ValueError):
        debye_msd(*args)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_thermal_rattle_variance(seed):
    n = 100_000
    sigma = thermal_sigma(np.full(n, CU_MASS), 300.0, CU_THETA)
    d = rattle(n, sigma, np.random.default_rng(seed))
    msd = debye_msd(CU_MASS, 300.0, CU_THETA)
    m = 3 * n  # every Cartesian component is one normal sample
    measured = np.mean(d ** 2)  # the mean is known to be 0
    assert abs(measured - msd) < 4 * msd * math.sqrt(2 / m)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_rattle_mean_and_variance(seed):
    n, s = 100_000, 0.05
    d = rattle(n, s, np.random.default_rng(seed))
    assert d.shape == (n, 3)
    m = d.size
    assert abs(d.mean()) < 4 * s / math.sqrt(m)  # s.e. of a mean
    assert abs(d.var(ddof=1) - s ** 2) < 4 * s ** 2 * math.sqrt(2 / (m - 1))


def test_rattle_same_seed_same_stream():
    a = rattle(1000, 0.1, np.random.default_rng(7))
    b = rattle(1000, 0.1, np.random.default_rng(7))
    assert np.array_equal(a, b)
    # one standard_normal((n, 3)) call: the stream the brief fixes
    assert np.array_equal(a, np.random.default_rng(7).standard_normal((1000, 3)) * 0.1)
    assert not np.array_equal(a, rattle(1000, 0.1, np.random.default_rng(8)))


def test_rattle_rejects():
    rng = np.random.default_rng(0)
    with pytest.raises(ValueError):
        rattle(3, -0.1, rng)
    with pytest.raises(ValueError):
        rattle(3, np.array([0.1, 0.2]), rng)


def test_thermal_sigma_per_atom():
    masses = np.array([63.546, 26.98, 63.546, 26.98, 63.546])
    thetas = np.array([343.0, 428.0, 343.0, 428.0, 300.0])
    got = thermal_sigma(masses, 300.0, thetas)
    want = [math.sqrt(debye_msd(m, 300.0, th)) for m, th in zip(masses, thetas)]
    assert np.allclose(got, want, rtol=1e-15, atol=0)
    assert got[0] != got[4]  # same mass, different Theta


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_rms_by_species(seed):
    rng = np.random.default_rng(seed)
    n = 60_000
    species = rng.integers(0, 2, n) * 2  # codes 0 and 2; code 1 ("Zr") has no atoms
    sigmas = np.array([0.03, 0.0, 0.08])
    d = rattle(n, sigmas[species], rng)
    rms = rms_by_species(d, species, ("Ni", "Zr", "Al"))
    assert list(rms) == ["Ni", "Al"]
    for code, name in ((0, "Ni"), (2, "Al")):
        m = 3 * np.count_nonzero(species == code)
        s2 = sigmas[code] ** 2
        assert abs(rms[name] ** 2 - s2) < 4 * s2 * math.sqrt(2 / m)


def test_volumetric_strain():
    f = strain_matrix(volumetric=0.02)
    assert abs(np.linalg.det(f) - 1.02) < 1e-12
    assert np.allclose(f, f[0, 0] * np.eye(3), rtol=0, atol=0)


def test_tensor_stretches_a_only():
    cell0 = 3.615 * np.eye(3)
    cell = cell0 @ strain_matrix(tensor=[[0.01, 0, 0], [0, 0, 0], [0, 0, 0]]).T
    lengths = np.linalg.norm(cell, axis=1)
    assert lengths[0] == pytest.approx(3.615 * 1.01, rel=1e-15)
    assert np.array_equal(cell[1:], cell0[1:])


def test_recovered_strain_round_trip():
    cell0 = np.array([[4.0, 0.0, 0.0], [1.2, 3.8, 0.0], [0.7, -0.9, 5.1]])  # triclinic
    eps = np.array([[0.01, 0.002, -0.003], [0.002, -0.004, 0.001], [-0.003, 0.001, 0.006]])
    cell = cell0 @ strain_matrix(tensor=eps).T
    got = recovered_strain(cell0, cell)
    json.dumps(got)  # JSON-ready
    assert np.allclose(got["tensor"], eps, rtol=0, atol=1e-12)
    assert abs(got["volumetric"] - (np.linalg.det(np.eye(3) + eps) - 1)) < 1e-12
    cell_v = cell0 @ strain_matrix(volumetric=0.02).T
    got_v = recovered_strain(cell0, cell_v)
    assert abs(got_v["volumetric"] - 0.02) < 1e-12
    assert np.allclose(got_v["tensor"], (1.02 ** (1 / 3) - 1) * np.eye(3), rtol=0, atol=1e-12)


@pytest.mark.parametrize("kwargs", [
    {"tensor": [[0.0, 0.01, 0.0], [0.0, 0.0, 0.0], [0.0, 0.0, 0.0]]},  # non-symmetric
    {"tensor": -2 * np.eye(3)},  # det F = -1
    {"tensor": np.diag([-1.0, 0.0, 0.0])},  # det F = 0
    {"tensor": np.diag([math.nan, 0.0, 0.0])},
    {"tensor": np.zeros((2, 2))},
    {"volumetric": -1.0},
    {"volumetric": -1.5},
    {"volumetric": math.inf},
    {"volumetric": 0.01, "tensor": np.zeros((3, 3))},  # both
    {},  # neither
])
def test_strain_matrix_rejects(kwargs):
    with pytest.raises(ValueError):
        strain_matrix(**kwargs)
