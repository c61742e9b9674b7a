"""Physics of particle collisions: Faraday's law, materials, diffusion and collision rates.

Everything takes and returns SI units (m, s, C, A, K, Pa s, mol/m^3, kg/mol, kg/m^3). Concentrations are
in mol/m^3: 1 mM = 1 mol/m^3, 10 pM = 1e-8 mol/m^3. Anodic (oxidation) charge is positive.

Contents
--------
MATERIALS, Material, get_material
    Metals whose nanoparticles are sized by oxidative dissolution, with their sources.
charge_from_diameter, diameter_from_charge
    Faraday's law for a dense sphere, Q = n F rho (pi d^3 / 6) / M, in both directions.
water_viscosity, stokes_einstein_diffusion
    IAPWS 2008 viscosity of liquid water at 0.1 MPa; Stokes-Einstein diffusion coefficient of a sphere.
disc_steady_state_current, collision_frequency_disc, diffusion_limited_collision_rate
    Diffusion-limited flux to a microdisc: current of a redox species, arrival rate of particles.
poisson_rate_interval
    Exact (Garwood) confidence interval of a rate from an event count.
"""

from __future__ import annotations

import difflib
import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, NamedTuple

import numpy as np
from scipy import constants
from scipy.stats import chi2

from .errors import ImpactlineError
from .units import QuantityError, parse_quantity

__all__ = [
    "FARADAY",
    "MATERIALS",
    "Material",
    "MaterialError",
    "RateInterval",
    "get_material",
    "charge_from_diameter",
    "diameter_from_charge",
    "water_viscosity",
    "water_density",
    "stokes_einstein_diffusion",
    "disc_steady_state_current",
    "collision_frequency_disc",
    "diffusion_limited_collision_rate",
    "poisson_rate_interval",
]

#: Faraday constant, C/mol: e * N_A, exact in the 2019 SI.
FARADAY: float = constants.physical_constants["Faraday constant"][0]


class MaterialError(ImpactlineError, ValueError):
    """A material name is unknown, or user-given material values are missing or implausible."""


@dataclass(frozen=True)
class Material:
    """A metal whose nanoparticles are sized from the charge of their oxidation.

    Parameters
    ----------
    name : str
        Short name (element symbol for the built-in ones).
    molar_mass_kg_per_mol : float
        Molar mass, kg/mol.
    density_kg_per_m3 : float
        Bulk density, kg/m^3 (a nanoparticle is taken as a dense sphere of bulk density).
    electrons : float
        Electrons transferred per atom oxidised (n of Faraday's law).
    reaction : str
        The dissolution reaction that ``electrons`` refers to.
    source : str
        Where the values come from, with their confidence.
    """

    name: str
    molar_mass_kg_per_mol: float
    density_kg_per_m3: float
    electrons: float
    reaction: str = ""
    source: str = ""


_CIAAW = "molar mass: CIAAW standard atomic weights (2021)"
_CRC = "density: CRC Handbook of Chemistry and Physics (edition value from memory; sources agree within 0.5 %)"

#: Built-in materials. Molar masses of Ag, Cu, Ni are CIAAW 2021 values (checked); Au and Pt molar masses
#: and all densities are from memory (CRC Handbook), as is the Pt reaction.
MATERIALS: dict[str, Material] = {
    "Ag": Material("Ag", 0.1078682, 10500.0, 1, "Ag -> Ag+ + e-", f"{_CIAAW}; {_CRC}"),
    "Au": Material("Au", 0.19696657, 19300.0, 3, "Au + 4 Cl- -> AuCl4- + 3 e- (chloride media)",
                   f"molar mass from memory (CIAAW); {_CRC}"),
    "Cu": Material("Cu", 0.063546, 8960.0, 2, "Cu -> Cu2+ + 2 e- (n = 1 to Cu+ in some media)",
                   f"{_CIAAW}; {_CRC}"),
    "Ni": Material("Ni", 0.0586934, 8908.0, 2, "Ni -> Ni2+ + 2 e-", f"{_CIAAW}; {_CRC}"),
    "Pt": Material("Pt", 0.195084, 21450.0, 2,
                   "Pt + 4 Cl- -> PtCl4^2- + 2 e- (chloride media; from memory, PtCl6^2- gives n = 4)",
                   f"molar mass from memory (CIAAW); {_CRC}"),
}

_ALIASES = {"silver": "Ag", "gold": "Au", "copper": "Cu", "nickel": "Ni", "platinum": "Pt"}

# Plausible ranges, wide enough for any metal, narrow enough to catch g/mol or g/cm^3 given as SI numbers.
_MOLAR_MASS_RANGE = (0.001, 0.5)  # kg/mol
_DENSITY_RANGE = (500.0, 25000.0)  # kg/m^3


def get_material(material: str | Mapping[str, Any] | Material) -> Material:
    """Return a :class:`Material` from a name or from user values.

    Parameters
    ----------
    material : str, mapping or Material
        A built-in name, case-insensitive (``"Cu"``, ``"copper"``), or a mapping with ``molar_mass``
        (kg/mol, or text such as ``"63.546 g/mol"``), ``density`` (kg/m^3, or ``"8.96 g/cm^3"``) and
        ``electrons``; optional ``name`` and ``reaction``. The long keys ``molar_mass_kg_per_mol`` and
        ``density_kg_per_m3`` are accepted too. A :class:`Material` is returned as is.

    Returns
    -------
    Material

    Raises
    ------
    MaterialError
        For an unknown name (the message lists the valid names and the nearest one), a missing key, or a
        value outside the plausible range (e.g. a molar mass in g/mol given as a bare number).
    """
    if isinstance(material, Material):
        return material
    if isinstance(material, str):
        return _material_by_name(material)
    if isinstance(material, Mapping):
        return _material_from_values(material)
    raise MaterialError(f"material must be a name such as 'Cu' or a mapping of values, got "
                        f"{type(material).__name__} {material!r}")


def _material_by_name(name: str) -> Material:
    wanted = name.strip().lower()
    for key, value in MATERIALS.items():
        if key.lower() == wanted:
            return value
    if wanted in _ALIASES:
        return MATERIALS[_ALIASES[wanted]]
    known = [*MATERIALS, *_ALIASES]
    nearest = difflib.get_close_matches(name.strip(), known, n=1, cutoff=0.0)
    hint = f"; nearest: {nearest[0]!r}" if nearest else ""
    raise MaterialError(
        f"unknown material {name!r}; valid names: {', '.join(MATERIALS)} (or {', '.join(_ALIASES)}){hint}. "
        "For another metal give its values: {'molar_mass': 'M g/mol', 'density': 'rho g/cm^3', "
        "'electrons': n}")


def _material_from_values(values: Mapping[str, Any]) -> Material:
    allowed = {"name", "reaction", "source", "molar_mass", "molar_mass_kg_per_mol", "density",
               "density_kg_per_m3", "electrons"}
    unknown = sorted(set(values) - allowed)
    if unknown:
        raise MaterialError(f"unknown material key(s) {unknown}; allowed: {sorted(allowed)}")
    molar_mass = _first(values, "molar_mass", "molar_mass_kg_per_mol")
    density = _first(values, "density", "density_kg_per_m3")
    electrons = values.get("electrons")
    missing = [key for key, value in (("molar_mass", molar_mass), ("density", density),
                                      ("electrons", electrons)) if value is None]
    if missing:
        raise MaterialError(f"material values miss {missing}; give molar_mass (kg/mol or 'M g/mol'), "
                            "density (kg/m^3 or 'rho g/cm^3') and electrons (n per atom)")
    molar_mass_si = _read_value(molar_mass, "molar_mass", [("g/mol", 1e-3)], _MOLAR_MASS_RANGE,
                                "a bare number is kg/mol: 63.546 g/mol is 0.063546 or '63.546 g/mol'")
    density_si = _read_value(density, "density", [("kg/m^3", 1.0), ("g/cm^3", 1e3)], _DENSITY_RANGE,
                             "a bare number is kg/m^3: 8.96 g/cm^3 is 8960 or '8.96 g/cm^3'")
    if isinstance(electrons, bool) or not isinstance(electrons, (int, float)) or not electrons > 0 \
            or not math.isfinite(electrons):
        raise MaterialError(f"electrons must be a positive number (n per atom oxidised), got {electrons!r}")
    return Material(str(values.get("name", "custom")), molar_mass_si, density_si, float(electrons),
                    str(values.get("reaction", "")), str(values.get("source", "user values")))


def _first(values: Mapping[str, Any], *keys: str) -> Any:
    for key in keys:
        if values.get(key) is not None:
            return values[key]
    return None


def _read_value(value: Any, key: str, units: list[tuple[str, float]], bounds: tuple[float, float],
                hint: str) -> float:
    if isinstance(value, str) and not _is_bare_number(value):
        number = None
        for unit, scale in units:
            try:
                number = parse_quantity(value, unit) * scale
                break
            except QuantityError:
                continue
        if number is None:
            raise MaterialError(f"material {key} {value!r} has no recognised unit; use one of "
                                f"{[unit for unit, _ in units]}")
    else:
        try:
            number = parse_quantity(value, None)
        except QuantityError as exc:
            raise MaterialError(f"material {key}: {exc}") from None
    low, high = bounds
    if not (math.isfinite(number) and low <= number <= high):
        raise MaterialError(f"material {key} = {number:g} in SI units is outside the plausible range "
                            f"[{low:g}, {high:g}]; {hint}")
    return number


def _is_bare_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def _as_array(x: Any) -> tuple[np.ndarray, bool]:
    array = np.asarray(x, dtype=float)
    return array, array.ndim == 0


def _finish(array: np.ndarray, scalar: bool) -> float | np.ndarray:
    return float(array) if scalar else array


def charge_from_diameter(diameter_m: Any, material: str | Mapping[str, Any] | Material) -> float | np.ndarray:
    """Charge of the complete oxidation of a dense spherical particle (Faraday's law).

    ``Q = n F rho (pi d^3 / 6) / M``.

    Parameters
    ----------
    diameter_m : float or array_like
        Particle diameter, m.
    material : str, mapping or Material
        See :func:`get_material`.

    Returns
    -------
    float or ndarray
        Charge, C (positive: anodic). NaN where the diameter is negative or not finite.
    """
    mat = get_material(material)
    d, scalar = _as_array(diameter_m)
    with np.errstate(invalid="ignore"):
        charge = mat.electrons * FARADAY * mat.density_kg_per_m3 * (math.pi / 6.0) * d**3 \
            / mat.molar_mass_kg_per_mol
        charge = np.where(np.isfinite(d) & (d >= 0), charge, np.nan)
    return _finish(charge, scalar)


def diameter_from_charge(charge_C: Any, material: str | Mapping[str, Any] | Material, *,
                         allow_negative: bool = False) -> float | np.ndarray:
    """Equivalent spherical diameter of the particle whose complete oxidation gives ``charge_C``.

    Inverse of :func:`charge_from_diameter`: ``d = (6 M Q / (pi n F rho))^(1/3)``.

    Parameters
    ----------
    charge_C : float or array_like
        Event charge, C. Anodic (oxidation) charge is positive.
    material : str, mapping or Material
        See :func:`get_material`.
    allow_negative : bool, default False
        Size cathodic (negative) events from ``|Q|`` too, e.g. when the particles are reduced rather
        than oxidised. By default a negative charge is not the dissolution of a particle and gives NaN.

    Returns
    -------
    float or ndarray
        Diameter, m. NaN where the charge is zero, not finite, or negative (unless ``allow_negative``).
    """
    mat = get_material(material)
    q, scalar = _as_array(charge_C)
    if allow_negative:
        q = np.abs(q)
    with np.errstate(invalid="ignore"):
        volume = q * mat.molar_mass_kg_per_mol / (mat.electrons * FARADAY * mat.density_kg_per_m3)
        d = np.cbrt(6.0 * volume / math.pi)
        d = np.where(np.isfinite(q) & (q > 0), d, np.nan)
    return _finish(d, scalar)


# IAPWS 2008 viscosity of ordinary water, Huber et al. (2009), J. Phys. Chem. Ref. Data 38:101-125
# (IAPWS R12-08). Reducing constants and the coefficients H_i (dilute gas) and H_ij (residual term).
_T_STAR = 647.096  # K
_RHO_STAR = 322.0  # kg/m^3
_MU_STAR = 1.0e-6  # Pa s
_H0 = np.array([1.67752, 2.20462, 0.6366564, -0.241605])
_H1 = np.zeros((6, 7))
_H1[0, :5] = [5.20094e-1, 2.22531e-1, -2.81378e-1, 1.61913e-1, -3.25372e-2]
_H1[1, :4] = [8.50895e-2, 9.99115e-1, -9.06851e-1, 2.57399e-1]
_H1[2, :3] = [-1.08374, 1.88797, -7.72479e-1]
_H1[3, :] = [-2.89555e-1, 1.26613, -4.89837e-1, 0.0, 6.98452e-2, 0.0, -4.35673e-3]
_H1[4, 2], _H1[4, 5] = -2.57040e-1, 8.72102e-3
_H1[5, 1], _H1[5, 6] = 1.20573e-1, -5.93264e-4

#: Temperatures (K) over which water is liquid at 0.1 MPa and the density correlation holds.
WATER_LIQUID_RANGE_K = (273.15, 372.75)


def _iapws2008_viscosity(temperature_K: np.ndarray, density_kg_per_m3: np.ndarray) -> np.ndarray:
    """IAPWS 2008 viscosity mu0 * mu1 (Pa s); the critical enhancement mu2 is 1 outside the critical region."""
    t = np.asarray(temperature_K, dtype=float) / _T_STAR
    rho = np.asarray(density_kg_per_m3, dtype=float) / _RHO_STAR
    mu0 = 100.0 * np.sqrt(t) / sum(h / t**i for i, h in enumerate(_H0))
    x = 1.0 / t - 1.0
    y = rho - 1.0
    inner = sum(_H1[i, j] * x**i * y**j for i in range(6) for j in range(7) if _H1[i, j] != 0.0)
    return _MU_STAR * mu0 * np.exp(rho * inner)


def water_density(temperature_K: Any) -> float | np.ndarray:
    """Density of air-free liquid water at 1 atm, kg/m^3.

    Kell (1975), J. Chem. Eng. Data 20:97-105, eq. for 0-150 C; agrees with IAPWS-95 at 0.1 MPa within
    a few parts per million, far below what the viscosity formula is sensitive to.

    Parameters
    ----------
    temperature_K : float or array_like
        Temperature, K, inside ``WATER_LIQUID_RANGE_K``.

    Returns
    -------
    float or ndarray
        Density, kg/m^3.
    """
    T, scalar = _check_water_temperature(temperature_K)
    t = T - 273.15
    rho = (999.83952 + 16.945176 * t - 7.9870401e-3 * t**2 - 46.170461e-6 * t**3 + 105.56302e-9 * t**4
           - 280.54253e-12 * t**5) / (1.0 + 16.879850e-3 * t)
    return _finish(rho, scalar)


def _check_water_temperature(temperature_K: Any) -> tuple[np.ndarray, bool]:
    T, scalar = _as_array(temperature_K)
    low, high = WATER_LIQUID_RANGE_K
    bad = ~((T >= low) & (T <= high))
    if np.any(bad):
        value = T[bad].flat[0] if T.ndim else float(T)
        raise ValueError(f"temperature {value:g} K is outside liquid water at 0.1 MPa "
                         f"[{low:g} K, {high:g} K]; give the temperature in kelvin (25 C = 298.15 K)")
    return T, scalar


def water_viscosity(temperature_K: Any) -> float | np.ndarray:
    """Dynamic viscosity of liquid water at 0.1 MPa, Pa s.

    The IAPWS 2008 formulation (Huber et al. 2009, J. Phys. Chem. Ref. Data 38:101) evaluated at the
    density of :func:`water_density`; the critical enhancement is 1 at these conditions. 0.89002 mPa s at
    25 C, 1.00160 mPa s at 20 C.

    Parameters
    ----------
    temperature_K : float or array_like
        Temperature, K, 273.15-372.75 K.

    Returns
    -------
    float or ndarray
        Viscosity, Pa s.

    Raises
    ------
    ValueError
        Outside the liquid range at 0.1 MPa.
    """
    T, scalar = _check_water_temperature(temperature_K)
    return _finish(_iapws2008_viscosity(T, water_density(T)), scalar)


def stokes_einstein_diffusion(radius_m: Any, temperature_K: Any = 298.15,
                              viscosity_Pa_s: Any = None) -> float | np.ndarray:
    """Diffusion coefficient of a sphere in a viscous liquid, ``D = k T / (6 pi eta r)`` (Stokes-Einstein).

    Parameters
    ----------
    radius_m : float or array_like
        Hydrodynamic radius, m (half the particle diameter for a bare sphere).
    temperature_K : float or array_like, default 298.15
        Temperature, K.
    viscosity_Pa_s : float or array_like, optional
        Viscosity of the liquid, Pa s. Default: water at ``temperature_K`` (:func:`water_viscosity`).

    Returns
    -------
    float or ndarray
        Diffusion coefficient, m^2/s. NaN where the radius is not positive.
    """
    r, scalar = _as_array(radius_m)
    T = np.asarray(temperature_K, dtype=float)
    eta = water_viscosity(T) if viscosity_Pa_s is None else np.asarray(viscosity_Pa_s, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        D = constants.k * T / (6.0 * math.pi * eta * r)
        D = np.where(r > 0, D, np.nan)
    return _finish(D, scalar and np.ndim(D) == 0)


def disc_steady_state_current(electrons: float, diffusion_m2_per_s: Any, concentration_mol_per_m3: Any,
                              radius_m: Any) -> float | np.ndarray:
    """Diffusion-limited steady-state current to an inlaid disc microelectrode, ``i = 4 n F D C r``.

    Saito (1968), Rev. Polarogr. (Kyoto) 15:177.

    Parameters
    ----------
    electrons : float
        Electrons per molecule, n.
    diffusion_m2_per_s : float or array_like
        Diffusion coefficient, m^2/s (1e-5 cm^2/s = 1e-9 m^2/s).
    concentration_mol_per_m3 : float or array_like
        Bulk concentration, mol/m^3 (1 mM = 1 mol/m^3).
    radius_m : float or array_like
        Disc radius, m.

    Returns
    -------
    float or ndarray
        Current, A.
    """
    current = 4.0 * electrons * FARADAY * np.asarray(diffusion_m2_per_s, dtype=float) \
        * np.asarray(concentration_mol_per_m3, dtype=float) * np.asarray(radius_m, dtype=float)
    return _finish(current, current.ndim == 0)


def collision_frequency_disc(diffusion_m2_per_s: Any, concentration_mol_per_m3: Any,
                             electrode_radius_m: Any) -> float | np.ndarray:
    """Diffusion-limited rate of particle arrivals at a disc microelectrode, ``f = 4 D C N_A r``, 1/s.

    The steady-state flux of :func:`disc_steady_state_current` counted in particles instead of charge;
    every particle that reaches the disc is taken to collide once.

    Parameters
    ----------
    diffusion_m2_per_s : float or array_like
        Particle diffusion coefficient, m^2/s.
    concentration_mol_per_m3 : float or array_like
        Particle concentration, mol/m^3 (10 pM = 1e-8 mol/m^3).
    electrode_radius_m : float or array_like
        Disc radius, m.

    Returns
    -------
    float or ndarray
        Collision frequency, 1/s.
    """
    rate = 4.0 * np.asarray(diffusion_m2_per_s, dtype=float) * np.asarray(concentration_mol_per_m3, dtype=float) \
        * constants.N_A * np.asarray(electrode_radius_m, dtype=float)
    return _finish(rate, rate.ndim == 0)


def diffusion_limited_collision_rate(particle_diameter_m: Any, concentration_mol_per_m3: Any,
                                     electrode_radius_m: Any, temperature_K: Any = 298.15,
                                     viscosity_Pa_s: Any = None) -> float | np.ndarray:
    """Predicted collision rate of particles of one size at a disc, 1/s.

    :func:`collision_frequency_disc` with the Stokes-Einstein diffusion coefficient of a sphere of
    diameter ``particle_diameter_m`` (in water by default). For a polydisperse population give the
    median diameter; for a lognormal size distribution of geometric sd ``g`` the mean of ``1/d`` is
    larger by ``exp(ln(g)^2 / 2)`` (2.5 % at g = 1.25).

    Returns
    -------
    float or ndarray
        Collision frequency, 1/s.
    """
    D = stokes_einstein_diffusion(np.asarray(particle_diameter_m, dtype=float) / 2.0, temperature_K,
                                  viscosity_Pa_s)
    return collision_frequency_disc(D, concentration_mol_per_m3, electrode_radius_m)


class RateInterval(NamedTuple):
    """An event rate with its exact confidence interval (all in 1/s)."""

    rate_per_s: float
    low_per_s: float
    high_per_s: float
    count: int
    duration_s: float
    confidence: float


def poisson_rate_interval(count: int, duration_s: float, confidence: float = 0.95) -> RateInterval:
    """Exact two-sided confidence interval of a Poisson rate from ``count`` events in ``duration_s``.

    Garwood (1936), Biometrika 28:437-442: ``low = chi2.ppf(a/2, 2k) / 2``, ``high = chi2.ppf(1 - a/2,
    2k + 2) / 2`` expected counts, ``a = 1 - confidence``; ``low = 0`` when ``k = 0``. Conservative: the
    coverage is at least ``confidence`` for every true rate.

    Parameters
    ----------
    count : int
        Number of events observed, >= 0.
    duration_s : float
        Observation time, s, > 0.
    confidence : float, default 0.95
        Two-sided confidence level, in (0, 1).

    Returns
    -------
    RateInterval
        ``(rate_per_s, low_per_s, high_per_s, count, duration_s, confidence)``.
    """
    if isinstance(count, bool) or not float(count).is_integer() or count < 0:
        raise ValueError(f"count must be a whole number >= 0, got {count!r}")
    if not (duration_s > 0 and math.isfinite(duration_s)):
        raise ValueError(f"duration_s must be a finite time > 0 s, got {duration_s!r}")
    if not 0.0 < confidence < 1.0:
        raise ValueError(f"confidence must be in (0, 1) (0.95 for 95 %), got {confidence!r}")
    k = int(count)
    alpha = 1.0 - confidence
    low = 0.0 if k == 0 else float(chi2.ppf(alpha / 2.0, 2 * k)) / 2.0
    high = float(chi2.ppf(1.0 - alpha / 2.0, 2 * k + 2)) / 2.0
    return RateInterval(k / duration_s, low / duration_s, high / duration_s, k, float(duration_s), confidence)
