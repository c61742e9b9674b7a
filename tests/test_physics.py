"""Physics of collisions checked against published equations, handbook values and scipy."""

import math

import numpy as np
import pytest
from impactline import physics
from impactline.physics import (
    FARADAY,
    MATERIALS,
    MaterialError,
    charge_from_diameter,
    collision_frequency_disc,
    diameter_from_charge,
    diffusion_limited_collision_rate,
    disc_steady_state_current,
    get_material,
    poisson_rate_interval,
    stokes_einstein_diffusion,
    water_density,
    water_viscosity,
)
from scipy import stats


# ------------------------------------------------------------------------------------------------ Faraday
def test_faraday_constant_is_exact_si_value():
    # 2019 SI: F = e N_A exactly, 96485.33212... C/mol (BIPM SI Brochure, 9th ed., 2019).
    assert FARADAY == pytest.approx(1.602176634e-19 * 6.02214076e23, rel=1e-15)
    assert FARADAY == pytest.approx(96485.33212, abs=1e-5)


@pytest.mark.parametrize(("material", "diameter", "expected_pC", "last_digit"), [
    # Worked values of Q = n F rho (pi d^3/6) / M with rho Ag = 10.5, Cu = 8.96 g/cm^3, n = 1 (Ag), 2 (Cu):
    # /work/shared/REFERENCES.md, "Faraday's law" (arithmetic from Faraday's law).
    ("Ag", 50e-9, 0.6147, 1e-4),
    ("Ag", 100e-9, 4.918, 1e-3),
    ("Cu", 50e-9, 1.781, 1e-3),
    ("Cu", 100e-9, 14.25, 1e-2),
])
def test_faraday_worked_charges(material, diameter, expected_pC, last_digit):
    charge = charge_from_diameter(diameter, material)
    assert isinstance(charge, float)
    assert charge * 1e12 == pytest.approx(expected_pC, abs=0.5 * last_digit)  # half a unit of the last digit


def test_faraday_charge_recomputed_by_hand():
    # Faraday's law written out with the CODATA/SI literal F and CIAAW 2021 molar mass of Cu (63.546 g/mol).
    d = 73e-9
    by_hand = 2 * 96485.33212 * 8960.0 * (math.pi * d**3 / 6.0) / 0.063546
    assert charge_from_diameter(d, "Cu") == pytest.approx(by_hand, rel=1e-9)


@pytest.mark.parametrize("name", sorted(MATERIALS))
def test_round_trip_and_cube_scaling(name):
    diameters = np.geomspace(5e-9, 500e-9, 37)
    charges = charge_from_diameter(diameters, name)
    assert charges.shape == diameters.shape
    np.testing.assert_allclose(diameter_from_charge(charges, name), diameters, rtol=1e-12)
    # Q is proportional to d^3 (sphere volume): doubling the diameter multiplies the charge by 8.
    np.testing.assert_allclose(charge_from_diameter(2 * diameters, name) / charges, 8.0, rtol=1e-12)


def test_sign_convention_for_diameters():
    q = charge_from_diameter(60e-9, "Ag")
    d = diameter_from_charge([q, -q, 0.0, np.nan, np.inf], "Ag")
    assert d[0] == pytest.approx(60e-9, rel=1e-12)
    assert np.isnan(d[1:]).all()  # cathodic, zero and non-finite charges are not a dissolved particle
    d_neg = diameter_from_charge([q, -q, 0.0], "Ag", allow_negative=True)
    assert d_neg[0] == pytest.approx(60e-9) and d_neg[1] == pytest.approx(60e-9) and np.isnan(d_neg[2])
    assert np.isnan(charge_from_diameter(-1e-9, "Ag"))


def test_material_table_matches_references():
    # Molar masses: CIAAW standard atomic weights 2021 (Ag, Cu, Ni checked); electrons per atom:
    # Ag -> Ag+ (1), Cu -> Cu2+ (2), Ni -> Ni2+ (2), Au -> AuCl4- (3) (REFERENCES.md, Faraday's law).
    assert MATERIALS["Ag"].molar_mass_kg_per_mol == pytest.approx(0.1078682)
    assert MATERIALS["Cu"].molar_mass_kg_per_mol == pytest.approx(0.063546)
    assert MATERIALS["Ni"].molar_mass_kg_per_mol == pytest.approx(0.0586934)
    assert [MATERIALS[k].electrons for k in ("Ag", "Cu", "Ni", "Au")] == [1, 2, 2, 3]
    # CRC densities (g/cm^3): Ag 10.49-10.5, Au 19.3, Cu 8.96, Ni 8.90-8.908, Pt 21.45-21.5 (from memory).
    for name, low, high in [("Ag", 10490, 10500), ("Au", 19300, 19320), ("Cu", 8960, 8960), ("Ni", 8900, 8908),
                            ("Pt", 21450, 21500)]:
        assert low <= MATERIALS[name].density_kg_per_m3 <= high
    assert all(m.source and m.reaction for m in MATERIALS.values())


def test_get_material_by_name_and_values():
    assert get_material("cu") is MATERIALS["Cu"]
    assert get_material("Copper") is MATERIALS["Cu"]
    custom = get_material({"molar_mass": "63.546 g/mol", "density": "8.96 g/cm^3", "electrons": 2})
    assert custom.molar_mass_kg_per_mol == pytest.approx(0.063546)
    assert custom.density_kg_per_m3 == pytest.approx(8960.0)
    assert charge_from_diameter(50e-9, custom) == pytest.approx(charge_from_diameter(50e-9, "Cu"), rel=1e-12)
    si = get_material({"molar_mass_kg_per_mol": 0.063546, "density_kg_per_m3": 8960, "electrons": 1})
    assert charge_from_diameter(50e-9, si) == pytest.approx(charge_from_diameter(50e-9, "Cu") / 2, rel=1e-12)


def test_get_material_errors_help():
    with pytest.raises(MaterialError, match=r"valid names: Ag, Au, Cu, Ni, Pt.*nearest: 'Cu'"):
        get_material("Cuu")
    with pytest.raises(MaterialError, match="g/mol"):
        get_material({"molar_mass": 63.546, "density": 8960, "electrons": 2})  # g/mol given as SI number
    with pytest.raises(MaterialError, match="g/cm\\^3"):
        get_material({"molar_mass": 0.0635, "density": 8.96, "electrons": 2})
    with pytest.raises(MaterialError, match="electrons"):
        get_material({"molar_mass": 0.0635, "density": 8960})
    with pytest.raises(MaterialError, match="unknown material key"):
        get_material({"molar_mass": 0.0635, "density": 8960, "electrons": 2, "valence": 2})


# ------------------------------------------------------------------------------------------------ water
@pytest.mark.parametrize(("temperature_K", "expected_mPa_s"), [
    # IAPWS 2008 formulation, Huber et al. (2009), J. Phys. Chem. Ref. Data 38:101, liquid water at 0.1 MPa.
    (298.15, 0.89002),
    (293.15, 1.00160),
])
def test_water_viscosity_reference_values(temperature_K, expected_mPa_s):
    assert water_viscosity(temperature_K) * 1e3 == pytest.approx(expected_mPa_s, abs=0.5e-5)


@pytest.mark.parametrize(("temperature_K", "density", "expected_uPa_s"), [
    # Check values of the IAPWS 2008 release (R12-08, table of computer-program verification values;
    # from memory, reproduced here to all nine digits, which rules out a wrong coefficient).
    (298.15, 998.0, 889.735100),
    (298.15, 1200.0, 1437.649467),
    (373.15, 1000.0, 307.883622),
    (433.15, 1.0, 14.538324),
    (873.15, 1.0, 32.619287),
])
def test_iapws2008_check_values(temperature_K, density, expected_uPa_s):
    mu = physics._iapws2008_viscosity(np.array(temperature_K), np.array(density))
    assert float(mu) * 1e6 == pytest.approx(expected_uPa_s, abs=2e-6)


def test_water_density():
    # IAPWS-95 at 0.1 MPa, 25 C: 997.047 kg/m^3 (from memory); Kell (1975) is within a few ppm.
    assert water_density(298.15) == pytest.approx(997.047, rel=1e-5)
    # Maximum density of water near 3.98 C (CRC Handbook; common knowledge).
    T = np.linspace(273.15, 283.15, 10001)
    assert T[np.argmax(water_density(T))] - 273.15 == pytest.approx(3.98, abs=0.03)


def test_water_temperature_must_be_kelvin():
    with pytest.raises(ValueError, match="kelvin"):
        water_viscosity(25.0)
    with pytest.raises(ValueError, match="outside liquid water"):
        water_viscosity(np.array([300.0, 400.0]))


# ------------------------------------------------------------------------------------------------ transport
@pytest.mark.parametrize(("temperature_K", "expected"), [
    # Stokes-Einstein D = kT / (6 pi eta r), r = 50 nm, IAPWS water: REFERENCES.md "Mass transport".
    (298.15, 4.907e-12),
    (293.15, 4.288e-12),
])
def test_stokes_einstein(temperature_K, expected):
    assert stokes_einstein_diffusion(50e-9, temperature_K) == pytest.approx(expected, abs=0.5e-15)


def test_stokes_einstein_given_viscosity_and_arrays():
    # Same law by hand with Boltzmann's constant (exact in the 2019 SI).
    by_hand = 1.380649e-23 * 310.0 / (6 * math.pi * 1e-3 * 20e-9)
    assert stokes_einstein_diffusion(20e-9, 310.0, 1e-3) == pytest.approx(by_hand, rel=1e-12)
    D = stokes_einstein_diffusion(np.array([10e-9, 20e-9, -1.0]), 298.15)
    assert D[0] == pytest.approx(2 * D[1]) and np.isnan(D[2])


def test_disc_steady_state_current():
    # Saito (1968): i = 4 n F D C r; n = 1, D = 1e-5 cm^2/s, C = 1 mM, r = 5 um -> 1.930 nA (REFERENCES.md).
    current = disc_steady_state_current(1, 1e-9, 1.0, 5e-6)
    assert current * 1e9 == pytest.approx(1.930, abs=0.5e-3)


def test_collision_frequency():
    # f = 4 D C N_A r: 5 um disc, 10 pM particles of 50 nm radius at 25 C -> 0.591 /s (REFERENCES.md).
    D = stokes_einstein_diffusion(50e-9, 298.15)
    assert collision_frequency_disc(D, 1e-8, 5e-6) == pytest.approx(0.591, abs=0.5e-3)
    assert diffusion_limited_collision_rate(100e-9, 1e-8, 5e-6, 298.15) == pytest.approx(0.591, abs=0.5e-3)
    # The particle flux is the current of Saito's equation divided by n F / N_A per particle.
    i = disc_steady_state_current(1, D, 1e-8, 5e-6)
    assert collision_frequency_disc(D, 1e-8, 5e-6) == pytest.approx(i / FARADAY * 6.02214076e23, rel=1e-12)


# ------------------------------------------------------------------------------------------------ Poisson
@pytest.mark.parametrize(("count", "low", "high"), [
    # Exact 95 % limits for a Poisson mean (Garwood 1936, Biometrika 28:437; the classic table values,
    # from memory): 0 -> (0, 3.689), 1 -> (0.0253, 5.572), 10 -> (4.795, 18.39).
    (0, 0.0, 3.689),
    (1, 0.0253, 5.572),
    (10, 4.795, 18.39),
])
def test_poisson_interval_textbook(count, low, high):
    interval = poisson_rate_interval(count, 1.0)
    assert interval.low_per_s == pytest.approx(low, abs=1e-3)
    assert interval.high_per_s == pytest.approx(high, abs=1e-2)


@pytest.mark.parametrize("count", [1, 3, 10, 57, 400])
def test_poisson_interval_against_scipy_poisson(count):
    # Definition of the exact interval: P(X >= k | low) = P(X <= k | high) = alpha / 2 (scipy.stats.poisson).
    interval = poisson_rate_interval(count, 20.0, confidence=0.9)
    low, high = interval.low_per_s * 20.0, interval.high_per_s * 20.0
    assert stats.poisson.sf(count - 1, low) == pytest.approx(0.05, rel=1e-8)
    assert stats.poisson.cdf(count, high) == pytest.approx(0.05, rel=1e-8)
    assert interval.rate_per_s == pytest.approx(count / 20.0)


def test_poisson_interval_coverage_is_at_least_nominal():
    # The exact interval is conservative: coverage >= 95 % at every true mean (computed from the pmf).
    k = np.arange(0, 200)
    bounds = np.array([poisson_rate_interval(int(n), 1.0)[1:3] for n in k])
    for mean in np.linspace(0.2, 60.0, 120):
        covered = (bounds[:, 0] <= mean) & (mean <= bounds[:, 1])
        assert stats.poisson.pmf(k, mean)[covered].sum() >= 0.95 - 1e-9


def test_poisson_interval_input_errors():
    with pytest.raises(ValueError, match="whole number"):
        poisson_rate_interval(2.5, 1.0)
    with pytest.raises(ValueError, match="duration_s"):
        poisson_rate_interval(3, 0.0)
    with pytest.raises(ValueError, match="confidence"):
        poisson_rate_interval(3, 1.0, confidence=95)
