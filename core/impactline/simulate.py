"""Synthetic collision recordings with ground truth.

``simulate(spec, "batch.bin")`` writes a current recording, its ``batch.json`` sidecar and
``batch.truth.parquet`` (one row per true event). The recording is made block by block with every filter's
state carried from one block to the next, so a file of 10^8 samples never needs the whole array in memory,
and the same seed gives the same samples whatever the block size.

What is simulated
-----------------
Particles arrive as a Poisson process (rate given, or the diffusion-limited rate ``4 D C N_A r`` from a
concentration, with the Stokes-Einstein ``D`` of the median particle). Diameters are lognormal. Each
arrival makes one event of one of five shapes, anodic positive:

``spike``       complete oxidation: fast rise, exponential decay, charge = Faraday charge of the particle
``burst``       complete oxidation in 2-8 sub-spikes over tens to hundreds of microseconds
``step``        the particle sticks and stays active (adsorption / catalytic amplification): a current
                step that stays; the event is the step onset; height proportional to the diameter
``blip``        a rectangle a few microseconds long: a brief contact oxidising 0.2-2 % of the particle
``tail_spike``  a fast spike carrying 30-70 % of the charge, then a slow exponential tail with the rest

The electrode current (events + noise + hum + baseline) passes through the amplifier, a causal digital
Bessel low-pass filter. Noise terms (one-sided PSD, before the amplifier): white floor ``S_w``; ``1/f``
noise ``S_w f_c / f``; capacitive noise ``(2 pi f C_in e_n)^2``; a slow baseline wander (Lorentzian).
Each is made in the time domain from its own stream of white Gaussian noise (see :func:`noise_psd_model`).
"""

from __future__ import annotations

import argparse
import dataclasses
import functools
import json
import math
import os
import sys
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
from scipy import linalg, optimize, signal

from .errors import ImpactlineError
from .output import schema_for, write_json_atomic, write_table_atomic
from .physics import charge_from_diameter, diffusion_limited_collision_rate, get_material, water_viscosity
from .stages import Column
from .units import QuantityError, format_quantity, parse_quantity

__all__ = [
    "SHAPES",
    "TRUTH_COLUMNS",
    "SimulationSpec",
    "SimulationResult",
    "SpecError",
    "simulate",
    "iter_recording",
    "truth_table",
    "noise_psd_model",
    "noise_rms",
    "copper_ink_demo_specs",
    "register_cli",
]

#: Event shapes, in the order of the ``shape_weights`` keys.
SHAPES: tuple[str, ...] = ("spike", "burst", "step", "blip", "tail_spike")

#: Diameter at which ``spike_decay_s``, ``burst_duration_s`` and ``step_height_A`` apply; they scale
#: linearly with the diameter (dissolution of a shrinking sphere at a constant surface rate lasts in
#: proportion to its size; a diffusion-limited catalytic current to a sphere on a plane is proportional
#: to its radius, Bard et al. 2007).
REFERENCE_DIAMETER_M = 50e-9

#: Geometric standard deviation of the event-to-event scatter of every time constant.
TIME_JITTER_GSD = 1.3

#: Collision rate when neither a rate nor a concentration is given, 1/s.
DEFAULT_RATE_PER_S = 5.0

#: Gain of an int16 file: full scale is 32767 counts on each side of ``offset_A``.
INT16_FULL_SCALE = 32767

_DEXP, _RECT, _STEP = 0, 1, 2  # component kinds: rise-and-decay pulse, rectangle, persistent step
_BUSY_FRACTION = 1e-3  # an event occupies the record until less than this share of its charge remains
_EVAL_FRACTION = 1e-12  # pulses are evaluated until this share remains (no visible truncation)
_STEP_COMPLETE_TAUS = 40.0  # 1 - exp(-40) rounds to 1 in float64: the step is then a constant
_SETTLE_TOLERANCE = 1e-3  # amplifier settled: step response within 0.1 % of its final value
_DIFF_TAPS, _DIFF_EDGE = 25, 0.4  # FIR differentiator: power within 0.05 % of (2 pi f)^2 up to 0.4 fs
_PINK_PER_DECADE = 2  # pole-zero pairs per decade of the 1/f filter (ripple < 0.5 %)
_FIR_DENOMINATOR = [1.0, 0.0]
_SIGMA_RANGE = 7.0  # int16 range covers the noise to +-7 sigma (expected clips < 1e-11 per sample)


class SpecError(ImpactlineError, ValueError):
    """A simulation setting is missing, of the wrong type or out of range."""


# (unit, low, high, low inclusive) of each numeric setting; strings with SI prefixes are accepted.
_FIELDS: dict[str, tuple[str, float | None, float | None, bool]] = {
    "sample_rate_hz": ("Hz", 0.0, None, False),
    "duration_s": ("s", 0.0, None, False),
    "median_diameter_m": ("m", 0.0, 1e-5, False),
    "diameter_gsd": ("", 1.0, 5.0, True),
    "collision_rate_per_s": ("Hz", 0.0, None, True),
    "concentration_mol_per_m3": ("mol/m^3", 0.0, None, True),
    "electrode_radius_m": ("m", 0.0, None, False),
    "temperature_K": ("K", 0.0, None, False),
    "rise_time_s": ("s", 0.0, None, False),
    "spike_decay_s": ("s", 0.0, None, False),
    "burst_duration_s": ("s", 0.0, None, False),
    "burst_subspike_decay_s": ("s", 0.0, None, False),
    "step_height_A": ("A", None, None, True),
    "step_rise_s": ("s", 0.0, None, False),
    "blip_width_s": ("s", 0.0, None, False),
    "tail_decay_s": ("s", 0.0, None, False),
    "dead_time_s": ("s", 0.0, None, True),
    "bandwidth_hz": ("Hz", 0.0, None, False),
    "white_noise_A_per_rtHz": ("A/sqrt(Hz)", 0.0, None, True),
    "input_capacitance_F": ("F", 0.0, None, True),
    "voltage_noise_V_per_rtHz": ("V/sqrt(Hz)", 0.0, None, True),
    "flicker_corner_hz": ("Hz", 0.0, None, True),
    "hum_frequency_hz": ("Hz", 0.0, None, False),
    "hum_amplitude_A": ("A", 0.0, None, True),
    "baseline_offset_A": ("A", None, None, True),
    "drift_A_per_s": ("A/s", None, None, True),
    "wander_rms_A": ("A", 0.0, None, True),
    "wander_time_s": ("s", 0.0, None, False),
}
_DTYPES = {"float32": "<f4", "float64": "<f8", "int16": "<i2"}


def _default_weights() -> dict[str, float]:
    return {"spike": 0.55, "burst": 0.2, "step": 0.03, "blip": 0.07, "tail_spike": 0.15}


@dataclass(frozen=True)
class SimulationSpec:
    """Everything that defines a synthetic recording. Numbers are SI; text such as ``"250 kHz"`` is read
    with :func:`impactline.units.parse_quantity`.

    Parameters
    ----------
    name : str
        Stem of the file name when :func:`simulate` is given a folder.
    sample_rate_hz : float, default 250 kHz
    duration_s : float, default 10 s
    material : str or mapping, default "Cu"
        See :func:`impactline.physics.get_material`.
    median_diameter_m : float, default 50 nm
        Median of the lognormal diameter distribution of the colliding particles.
    diameter_gsd : float, default 1.25
        Geometric standard deviation of the diameters (``sigma = ln(gsd)``); 1 is monodisperse.
    collision_rate_per_s : float, optional
        Mean collision rate, 1/s. Give this or ``concentration_mol_per_m3``; with neither, 5 /s.
    concentration_mol_per_m3 : float, optional
        Particle concentration, mol/m^3 ("100 pM" is 1e-7); the rate is then the diffusion-limited
        collision frequency at a disc of ``electrode_radius_m`` for particles of the median diameter in
        water at ``temperature_K`` (:func:`impactline.physics.diffusion_limited_collision_rate`).
    electrode_radius_m : float, default 5 um
    temperature_K : float, default 298.15 K
    shape_weights : mapping, default spike 0.55, burst 0.2, step 0.03, blip 0.07, tail_spike 0.15
        Relative frequency of each shape (normalised; missing shapes get 0).
    rise_time_s : float, default 3 us
        Rise time constant of the electrode current of a spike (before the amplifier).
    spike_decay_s : float, default 500 us
        Decay time constant of a spike of a 50 nm particle (proportional to the diameter).
    burst_duration_s : float, default 400 us
        Span of the sub-spike onsets of a burst of a 50 nm particle (proportional to the diameter).
    burst_subspike_decay_s : float, default 50 us
    step_height_A : float, default 50 pA
        Step of a 50 nm particle (proportional to the diameter; negative for a cathodic catalytic step).
    step_rise_s : float, default 10 us
    blip_width_s : float, default 4 us
        Median width of a blip (uniform between 0.5 and 1.5 times it).
    tail_decay_s : float, default 3 ms
        Time constant of the slow tail of a ``tail_spike``.
    dead_time_s : float, default 100 us
        Least gap between the end of one event (its current below 0.1 % of its charge, plus the
        amplifier's settling) and the onset of the next; an arrival inside it is dropped.
    bessel_order : int, default 4
    bandwidth_hz : float, default 50 kHz
        -3 dB frequency of the amplifier's Bessel low-pass filter (below fs/2).
    white_noise_A_per_rtHz : float, default 5 fA/sqrt(Hz)
        White current-noise floor (one-sided, amplitude spectral density).
    input_capacitance_F : float, default 10 pF
    voltage_noise_V_per_rtHz : float, default 5 nV/sqrt(Hz)
        Input voltage noise; with ``input_capacitance_F`` it gives the ``(2 pi f C_in e_n)^2`` term.
    flicker_corner_hz : float, default 100 Hz
        Frequency where the 1/f noise equals the white floor (0: none).
    hum_frequency_hz : float, default 50 Hz
    hum_amplitude_A : float, default 0
        Peak amplitude of the mains fundamental.
    hum_harmonics : tuple of float, default (1.0, 0.3, 0.5)
        Amplitudes of the fundamental and its harmonics relative to ``hum_amplitude_A``.
    baseline_offset_A : float, default 0
    drift_A_per_s : float, default 0
        Linear baseline drift.
    wander_rms_A : float, default 0
        Rms of a slow random baseline wander (Ornstein-Uhlenbeck process).
    wander_time_s : float, default 2 s
        Correlation time of the wander.
    dtype : {"float32", "float64", "int16"}, default "float32"
        Sample type of the written file; int16 gets a gain and offset chosen so the signal fits.
    seed : int, default 0
    """

    name: str = "simulated"
    sample_rate_hz: float = 250e3
    duration_s: float = 10.0
    material: Any = "Cu"
    median_diameter_m: float = 50e-9
    diameter_gsd: float = 1.25
    collision_rate_per_s: float | None = None
    concentration_mol_per_m3: float | None = None
    electrode_radius_m: float = 5e-6
    temperature_K: float = 298.15
    shape_weights: Mapping[str, float] = field(default_factory=_default_weights)
    rise_time_s: float = 3e-6
    spike_decay_s: float = 500e-6
    burst_duration_s: float = 400e-6
    burst_subspike_decay_s: float = 50e-6
    step_height_A: float = 50e-12
    step_rise_s: float = 10e-6
    blip_width_s: float = 4e-6
    tail_decay_s: float = 3e-3
    dead_time_s: float = 100e-6
    bessel_order: int = 4
    bandwidth_hz: float = 50e3
    white_noise_A_per_rtHz: float = 5e-15
    input_capacitance_F: float = 10e-12
    voltage_noise_V_per_rtHz: float = 5e-9
    flicker_corner_hz: float = 100.0
    hum_frequency_hz: float = 50.0
    hum_amplitude_A: float = 0.0
    hum_harmonics: tuple[float, ...] = (1.0, 0.3, 0.5)
    baseline_offset_A: float = 0.0
    drift_A_per_s: float = 0.0
    wander_rms_A: float = 0.0
    wander_time_s: float = 2.0
    dtype: str = "float32"
    seed: int = 0

    def __post_init__(self) -> None:
        for key, (unit, low, high, low_inclusive) in _FIELDS.items():
            value = getattr(self, key)
            if value is None and key in ("collision_rate_per_s", "concentration_mol_per_m3"):
                continue
            object.__setattr__(self, key, _check_number(key, value, unit, low, high, low_inclusive))
        if self.collision_rate_per_s is not None and self.concentration_mol_per_m3 is not None:
            raise SpecError("SimulationSpec: give collision_rate_per_s or concentration_mol_per_m3, not both")
        try:
            if self.concentration_mol_per_m3 is not None:
                water_viscosity(self.temperature_K)  # raises with the valid range when not liquid water
        except ValueError as exc:
            raise SpecError(f"SimulationSpec.temperature_K: {exc}") from None
        try:
            get_material(self.material)
        except ValueError as exc:
            raise SpecError(f"SimulationSpec.material: {exc}") from None
        nyquist = self.sample_rate_hz / 2.0
        if self.bandwidth_hz >= nyquist:
            raise SpecError(f"SimulationSpec.bandwidth_hz: must be below the Nyquist frequency "
                            f"{format_quantity(nyquist, 'Hz')} (sample rate / 2), got "
                            f"{format_quantity(self.bandwidth_hz, 'Hz')}")
        if self.hum_frequency_hz >= nyquist:
            raise SpecError(f"SimulationSpec.hum_frequency_hz: must be below {format_quantity(nyquist, 'Hz')}, "
                            f"got {format_quantity(self.hum_frequency_hz, 'Hz')}")
        if isinstance(self.bessel_order, bool) or not isinstance(self.bessel_order, (int, np.integer)) \
                or not 1 <= self.bessel_order <= 12:
            raise SpecError(f"SimulationSpec.bessel_order: expected a whole number 1-12, got {self.bessel_order!r}")
        if isinstance(self.seed, bool) or not isinstance(self.seed, (int, np.integer)) or self.seed < 0:
            raise SpecError(f"SimulationSpec.seed: expected a whole number >= 0, got {self.seed!r}")
        if self.dtype not in _DTYPES:
            raise SpecError(f"SimulationSpec.dtype: expected one of {sorted(_DTYPES)}, got {self.dtype!r}")
        harmonics = tuple(_check_number("hum_harmonics", h, "", 0.0, None, True) for h in self.hum_harmonics)
        object.__setattr__(self, "hum_harmonics", harmonics)
        object.__setattr__(self, "shape_weights", _check_weights(self.shape_weights))
        if self.n_samples < 1:
            raise SpecError(f"SimulationSpec.duration_s: {self.duration_s:g} s is less than one sample at "
                            f"{format_quantity(self.sample_rate_hz, 'Hz')}")
        expected = self.collision_rate() * self.duration_s
        if expected > 5e6:
            raise SpecError(f"SimulationSpec: {expected:.3g} expected collisions is more than the 5e6 the "
                            "simulator keeps in memory; lower the rate or the duration")

    @property
    def n_samples(self) -> int:
        """Samples in the recording, ``round(duration_s * sample_rate_hz)``."""
        return int(round(self.duration_s * self.sample_rate_hz))

    def collision_rate(self) -> float:
        """Mean collision rate, 1/s (given, from the concentration, or the default)."""
        if self.collision_rate_per_s is not None:
            return float(self.collision_rate_per_s)
        if self.concentration_mol_per_m3 is not None:
            return float(diffusion_limited_collision_rate(self.median_diameter_m, self.concentration_mol_per_m3,
                                                          self.electrode_radius_m, self.temperature_K))
        return DEFAULT_RATE_PER_S

    def with_noise_scale(self, factor: float) -> SimulationSpec:
        """Copy with every random noise source (white, capacitive, 1/f, wander) scaled by ``factor`` in rms."""
        factor = _check_number("noise scale", factor, "", 0.0, None, True)
        return dataclasses.replace(self, white_noise_A_per_rtHz=self.white_noise_A_per_rtHz * factor,
                                   voltage_noise_V_per_rtHz=self.voltage_noise_V_per_rtHz * factor,
                                   wander_rms_A=self.wander_rms_A * factor)

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able settings (SI numbers)."""
        data = dataclasses.asdict(self)
        data["shape_weights"] = dict(self.shape_weights)
        data["hum_harmonics"] = list(self.hum_harmonics)
        if not isinstance(self.material, str):
            data["material"] = dataclasses.asdict(get_material(self.material))
        return data

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> SimulationSpec:
        """Build from :meth:`to_dict` output or hand-written settings; unknown keys are refused."""
        names = [f.name for f in dataclasses.fields(cls)]
        unknown = sorted(set(data) - set(names))
        if unknown:
            raise SpecError(f"SimulationSpec: unknown setting(s) {unknown}; valid: {names}")
        values = dict(data)
        if "hum_harmonics" in values:
            values["hum_harmonics"] = tuple(values["hum_harmonics"])
        return cls(**values)


def _check_number(key: str, value: Any, unit: str, low: float | None, high: float | None,
                  low_inclusive: bool) -> float:
    try:
        number = parse_quantity(value, unit or None)
    except QuantityError as exc:
        raise SpecError(f"SimulationSpec.{key}: {exc}") from None
    ok = math.isfinite(number)
    if ok and low is not None:
        ok = number >= low if low_inclusive else number > low
    if ok and high is not None:
        ok = number <= high
    if not ok:
        bounds = []
        if low is not None:
            bounds.append(f"{'>=' if low_inclusive else '>'} {low:g}")
        if high is not None:
            bounds.append(f"<= {high:g}")
        allowed = "a finite number" + (" " + " and ".join(bounds) if bounds else "")
        raise SpecError(f"SimulationSpec.{key}: expected {allowed}{' ' + unit if unit else ''}, got {value!r}")
    return number


def _check_weights(weights: Mapping[str, float] | str) -> dict[str, float]:
    if isinstance(weights, str):
        weights = _parse_weights(weights)
    if not isinstance(weights, Mapping):
        raise SpecError(f"SimulationSpec.shape_weights: expected a mapping shape -> weight, got {weights!r}")
    unknown = sorted(set(weights) - set(SHAPES))
    if unknown:
        raise SpecError(f"SimulationSpec.shape_weights: unknown shape(s) {unknown}; shapes: {list(SHAPES)}")
    clean = {shape: _check_number(f"shape_weights[{shape!r}]", weights.get(shape, 0.0), "", 0.0, None, True)
             for shape in SHAPES}
    total = sum(clean.values())
    if total <= 0:
        raise SpecError("SimulationSpec.shape_weights: at least one weight must be > 0")
    return {shape: value / total for shape, value in clean.items()}


def _parse_weights(text: str) -> dict[str, float]:
    weights = {}
    for item in filter(None, (part.strip() for part in text.split(","))):
        key, sep, value = item.partition("=")
        if not sep:
            raise SpecError(f"shape weights: expected shape=weight pairs such as 'spike=0.7,burst=0.3', "
                            f"got {item!r}")
        weights[key.strip()] = value.strip()
    return weights


# ------------------------------------------------------------------------------------------------ the design
class _NoiseDesign:
    """Filters and scales of every noise source of a spec, and the PSDs they give (intended and exact)."""

    def __init__(self, spec: SimulationSpec):
        fs = spec.sample_rate_hz
        self.fs = fs
        self.amp_sos = _amplifier_sos(spec.bessel_order, spec.bandwidth_hz, fs)
        self.white = spec.white_noise_A_per_rtHz ** 2  # one-sided PSD, A^2/Hz
        self.white_sigma = math.sqrt(self.white * fs / 2.0)
        self.cap_scale = spec.input_capacitance_F * spec.voltage_noise_V_per_rtHz  # A s / sqrt(Hz)
        self.diff_fir = _differentiator(fs)
        self.flicker = self.white * spec.flicker_corner_hz  # S_w f_c, A^2
        self.pink_low_hz = 1.0 / spec.duration_s
        self.pink_sos, self.pink_gain = (_pink_filter(self.pink_low_hz, fs) if self.flicker > 0
                                         else (np.zeros((0, 6)), 0.0))
        self.wander_sigma = spec.wander_rms_A
        self.wander_time = spec.wander_time_s
        self.wander_pole = math.exp(-1.0 / (fs * spec.wander_time_s))

    def psd_terms(self, f_hz: np.ndarray, realised: bool) -> dict[str, np.ndarray]:
        f = np.asarray(f_hz, dtype=float)
        omega = 2.0 * math.pi * f / self.fs
        z = np.exp(-1j * omega)
        terms: dict[str, np.ndarray] = {"white": np.full(f.shape, self.white)}
        with np.errstate(divide="ignore"):
            if not realised:
                terms["flicker"] = self.flicker / f if self.flicker > 0 else np.zeros(f.shape)
            elif self.flicker > 0:
                terms["flicker"] = self.flicker * self.pink_gain**2 * _sos_power(self.pink_sos, z) * 2.0 / self.fs
            else:
                terms["flicker"] = np.zeros(f.shape)
        if realised:
            diff = np.polyval(self.diff_fir[::-1], z)  # sum h_k z^k with z = exp(-j omega)
            terms["capacitive"] = self.cap_scale**2 * np.abs(diff) ** 2
        else:
            terms["capacitive"] = (2.0 * math.pi * f * self.cap_scale) ** 2
        s2, tau, a = self.wander_sigma**2, self.wander_time, self.wander_pole
        if realised:
            terms["wander"] = (1.0 - a * a) * s2 * 2.0 / self.fs / np.abs(1.0 - a * z) ** 2
        else:
            terms["wander"] = 4.0 * s2 * tau / (1.0 + (2.0 * math.pi * f * tau) ** 2)
        terms["amplifier_gain2"] = _sos_power(self.amp_sos, z)
        return terms


# The filter designs are cached (designing a Bessel filter finds polynomial roots); the arrays are shared,
# and nothing modifies them.
@functools.lru_cache(maxsize=32)
def _amplifier_sos(order: int, cutoff_hz: float, fs: float) -> np.ndarray:
    """The amplifier: digital Bessel low-pass, -3 dB at ``cutoff_hz`` (bilinear transform of the analog one)."""
    return signal.bessel(order, cutoff_hz, btype="low", norm="mag", output="sos", fs=fs)


@functools.lru_cache(maxsize=32)
def _differentiator(fs: float) -> np.ndarray:
    """Equiripple (Parks-McClellan) FIR differentiator scaled to ``j 2 pi f`` (McClellan & Parks 1973).

    Fed a white voltage of one-sided PSD ``e_n^2`` and multiplied by ``C_in`` it gives the current
    ``C_in de/dt`` of PSD ``(2 pi f C_in e_n)^2``.
    """
    return signal.remez(_DIFF_TAPS, [0.0, _DIFF_EDGE], [1.0], type="differentiator", fs=1.0) * (2.0 * math.pi * fs)


def _sos_power(sos: np.ndarray, z: np.ndarray) -> np.ndarray:
    """|H|^2 of a cascade of biquads at ``z = exp(-j omega)``."""
    power = np.ones(z.shape)
    for b0, b1, b2, a0, a1, a2 in sos:
        power = power * np.abs((b0 + b1 * z + b2 * z * z) / (a0 + a1 * z + a2 * z * z)) ** 2
    return power


@functools.lru_cache(maxsize=32)
def _pink_filter(f_low_hz: float, fs: float) -> tuple[np.ndarray, float]:
    """Cascade of first-order pole-zero sections whose power response follows 1/f above ``f_low_hz``.

    Poles log-spaced ``_PINK_PER_DECADE`` per decade from ``f_low_hz`` to fs/2, each zero half a spacing
    above its pole: each pair adds a -10 dB/decade segment, and the interlaced pairs approximate the
    half-order slope with a ripple that shrinks fast with the density (Kasdin 1995, Proc. IEEE 83:802,
    section on pole-zero approximations of 1/f^alpha filters; Keshner 1982, Proc. IEEE 70:212). Poles and
    zeros map as ``exp(-2 pi f / fs)``. Returns the biquads and the gain that puts the unit-variance-input
    PSD on ``1 / f`` (A^2/Hz per A^2) in the least-squares log sense over the band.
    """
    n = int(math.ceil(math.log10(fs / 2.0 / f_low_hz) * _PINK_PER_DECADE)) + 1
    f_pole = f_low_hz * 10.0 ** (np.arange(n) / _PINK_PER_DECADE)
    f_zero = f_pole * 10.0 ** (0.5 / _PINK_PER_DECADE)
    poles, zeros = np.exp(-2.0 * math.pi * f_pole / fs), np.exp(-2.0 * math.pi * f_zero / fs)
    if n % 2:
        poles, zeros = np.append(poles, 0.0), np.append(zeros, 0.0)
    sos = np.array([np.r_[np.convolve([1.0, -zeros[k]], [1.0, -zeros[k + 1]]),
                          np.convolve([1.0, -poles[k]], [1.0, -poles[k + 1]])] for k in range(0, len(poles), 2)])
    f = np.geomspace(10.0 * f_low_hz, max(0.05 * fs, 20.0 * f_low_hz), 400)
    shape = _sos_power(sos, np.exp(-2j * math.pi * f / fs)) * 2.0 / fs
    gain2 = math.exp(float(np.mean(np.log(1.0 / f) - np.log(shape))))
    return sos, math.sqrt(gain2)


def _sos_state_space(sos: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(A, B) of the state of ``scipy.signal.sosfilt`` (transposed direct form II per section) for a cascade."""
    n = 2 * len(sos)
    A, B = np.zeros((n, n)), np.zeros(n)
    c_in, d_in = np.zeros(n), 1.0  # input of the current section as a function of state and input
    for k, (b0, b1, b2, _, a1, a2) in enumerate(sos):
        i = 2 * k
        bk = np.array([b1 - a1 * b0, b2 - a2 * b0])
        A[i:i + 2, :] += np.outer(bk, c_in)
        A[i:i + 2, i:i + 2] += np.array([[-a1, 1.0], [-a2, 0.0]])
        B[i:i + 2] = bk * d_in
        c_out = b0 * c_in
        c_out[i] += 1.0
        c_in, d_in = c_out, b0 * d_in
    return A, B


def _stationary_sos_state(sos: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """A draw of the filter state from its stationary distribution under unit white input.

    The state covariance solves the discrete Lyapunov equation ``P = A P A^T + B B^T``; starting there makes
    the slow sections of the 1/f filter stationary from the first sample instead of after ~1/f_low.
    """
    A, B = _sos_state_space(sos)
    P = linalg.solve_discrete_lyapunov(A, np.outer(B, B))
    w, V = np.linalg.eigh((P + P.T) / 2.0)
    state = V @ (np.sqrt(np.clip(w, 0.0, None)) * rng.standard_normal(len(w)))
    return state.reshape(len(sos), 2)


def _amplifier_timing(sos: np.ndarray, fs: float, cutoff_hz: float) -> tuple[float, float]:
    """(group delay at DC, settling time to 0.1 %) of the amplifier filter, s."""
    n = int(math.ceil(60.0 * fs / cutoff_hz)) + 16
    impulse = np.zeros(n)
    impulse[0] = 1.0
    h = signal.sosfilt(sos, impulse)
    delay = float(np.sum(np.arange(n) * h) / np.sum(h)) / fs
    step = np.cumsum(h)
    outside = np.nonzero(np.abs(step - 1.0) > _SETTLE_TOLERANCE)[0]
    settle = (int(outside[-1]) + 1) / fs if outside.size else 0.0
    return delay, settle


# ------------------------------------------------------------------------------------------------ events
@dataclass
class _Components:
    """Every current component of every kept event, as flat arrays (events in time order)."""

    kind: np.ndarray
    event: np.ndarray
    t0: np.ndarray  # onset, s
    q: np.ndarray  # charge (C) of a pulse or rectangle, height (A) of a step
    a: np.ndarray  # rise time constant / width / step rise time constant, s
    b: np.ndarray  # decay time constant of a pulse, s
    first: np.ndarray  # first sample evaluated
    stop: np.ndarray  # one past the last sample evaluated (a step is constant from there on)
    offset: np.ndarray  # t0 - first / fs, s


def _pulse_remaining(s: np.ndarray, q: float, tau_r: float, tau_d: float) -> np.ndarray:
    """Charge still to come at time ``s`` after the onset of ``q (e^-s/td - e^-s/tr) / (td - tr)``."""
    s = np.maximum(s, 0.0)
    return q * (tau_d * np.exp(-s / tau_d) - tau_r * np.exp(-s / tau_r)) / (tau_d - tau_r)


def _component_values(kind: int, q: float, a_: float, b_: float, offset: float, k_lo: int, k_hi: int,
                      fs: float) -> np.ndarray:
    """Mean current of one component over samples ``first + k_lo`` to ``first + k_hi`` (exclusive).

    Sample ``n`` is the average of the electrode current over ``[(n - 1/2)/fs, (n + 1/2)/fs)`` (an
    integrating converter centred on its time stamp ``n/fs``), so the samples of a pulse add up to exactly
    its charge times fs and a sub-sample onset is resolved. Every value depends only on the absolute sample
    index, never on the block it is computed in.
    """
    # Sample edges, each a function of its absolute index only; a sample is the difference of its edges.
    edges = (np.arange(k_lo, k_hi + 1, dtype=float) - 0.5) / fs - offset
    if kind == _DEXP:
        remaining = _pulse_remaining(edges, q, a_, b_)
        return (remaining[:-1] - remaining[1:]) * fs
    if kind == _RECT:
        overlap = np.clip(np.minimum(edges[1:], a_) - np.maximum(edges[:-1], 0.0), 0.0, None)
        return (q / a_) * overlap * fs
    elapsed = np.maximum(edges, 0.0)
    decay = np.exp(-elapsed / a_)
    return q * ((elapsed[1:] - elapsed[:-1]) - a_ * (decay[:-1] - decay[1:])) * fs


def _component_span(kind: int, a_: float, b_: float, fraction: float) -> float:
    """Time after its onset by which a component has delivered all but ``fraction`` of its charge."""
    if kind == _DEXP:
        return b_ * math.log(b_ / ((b_ - a_) * fraction))
    if kind == _RECT:
        return a_
    return a_ * math.log(1.0 / fraction)


def _draw_components(rng: np.random.Generator, shape: str, diameter: float, charge: float,
                     spec: SimulationSpec) -> tuple[list[tuple[int, float, float, float, float]], int, float]:
    """Components ``(kind, onset, q, a, b)`` of one event, its sub-peak count and oxidised fraction."""
    size = diameter / REFERENCE_DIAMETER_M

    def jitter() -> float:
        return TIME_JITTER_GSD ** rng.standard_normal()

    def pulse(onset: float, q: float, decay: float) -> tuple[int, float, float, float, float]:
        return (_DEXP, onset, q, min(spec.rise_time_s * jitter(), 0.2 * decay), decay)

    if shape == "spike":
        return [pulse(0.0, charge, spec.spike_decay_s * size * jitter())], 1, 1.0
    if shape == "burst":
        count = int(min(2 + rng.poisson(2.0), 8))
        span = spec.burst_duration_s * size * jitter()
        onsets = np.sort(np.r_[0.0, rng.uniform(0.0, span, count - 1)])
        shares = rng.dirichlet(np.full(count, 2.0))
        return [pulse(float(t), charge * float(w), spec.burst_subspike_decay_s * jitter())
                for t, w in zip(onsets, shares, strict=True)], count, 1.0
    if shape == "step":
        return [(_STEP, 0.0, spec.step_height_A * size, spec.step_rise_s * jitter(), 0.0)], 0, 0.0
    if shape == "blip":
        width = spec.blip_width_s * rng.uniform(0.5, 1.5)
        fraction = math.exp(rng.uniform(math.log(0.002), math.log(0.02)))
        return [(_RECT, 0.0, charge * fraction, width, 0.0)], 1, fraction
    fast = rng.uniform(0.3, 0.7)
    spike = pulse(0.0, charge * fast, spec.spike_decay_s * size * jitter())
    tail_tau = max(spec.tail_decay_s * jitter(), 3.0 * spike[4])
    return [spike, (_DEXP, 0.0, charge * (1.0 - fast), spike[4], tail_tau)], 1, 1.0


def _delivered(components: list[tuple[int, float, float, float, float]], s: float) -> float:
    total = 0.0
    for kind, onset, q, a_, b_ in components:
        t = s - onset
        if kind == _DEXP:
            total += q - float(_pulse_remaining(np.array(t), q, a_, b_))
        else:
            total += q * min(max(t / a_, 0.0), 1.0)
    return total


class _Catalogue:
    """The true events of a spec: arrivals, sizes, shapes, components and their truth rows."""

    def __init__(self, spec: SimulationSpec, design: _NoiseDesign, rng: np.random.Generator):
        fs = spec.sample_rate_hz
        self.rate = spec.collision_rate()
        self.delay_s, self.settle_s = _amplifier_timing(design.amp_sos, fs, spec.bandwidth_hz)
        arrivals = _poisson_arrivals(rng, self.rate, spec.duration_s)
        self.n_arrivals = len(arrivals)
        sigma = math.log(spec.diameter_gsd)
        diameters = spec.median_diameter_m * np.exp(sigma * rng.standard_normal(len(arrivals)))
        shapes = rng.choice(len(SHAPES), size=len(arrivals), p=[spec.shape_weights[s] for s in SHAPES])
        charges = charge_from_diameter(diameters, spec.material)
        rows: list[dict[str, Any]] = []
        comps: list[tuple] = []
        next_free = 0.0
        self.n_lost, self.n_beyond_end = 0, 0
        for t, d, shape_index, q in zip(arrivals, diameters, shapes, np.atleast_1d(charges), strict=True):
            shape = SHAPES[int(shape_index)]
            parts, n_sub, fraction = _draw_components(rng, shape, float(d), float(q), spec)
            busy = max(onset + _component_span(kind, a_, b_, _BUSY_FRACTION)
                       for kind, onset, _, a_, b_ in parts) + self.settle_s
            if t < next_free:
                self.n_lost += 1
                continue
            if t + busy > spec.duration_s:
                self.n_beyond_end += 1
                continue
            next_free = t + busy + spec.dead_time_s
            event_id = len(rows)
            if shape == "step":
                end = parts[0][3] * math.log(100.0)
                signal_charge = math.nan
            else:
                signal_charge = sum(p[2] for p in parts)
                end = optimize.brentq(lambda s, p=parts, q99=0.99 * signal_charge: _delivered(p, s) - q99,
                                      0.0, busy)
            for kind, onset, qc, a_, b_ in parts:
                span = _STEP_COMPLETE_TAUS * a_ if kind == _STEP else _component_span(kind, a_, b_, _EVAL_FRACTION)
                comps.append((kind, event_id, t + onset, qc, a_, b_, span))
            rows.append({
                "event_id": event_id, "shape": shape, "start_s": float(t), "end_s": float(t + end),
                "start_index": int(math.floor(t * fs + 0.5)), "end_index": int(math.ceil((t + end) * fs + 0.5)),
                "charge_C": float(q), "signal_charge_C": signal_charge, "oxidised_fraction": fraction,
                "diameter_m": float(d), "n_subpeaks": n_sub,
                "step_height_A": parts[0][2] if shape == "step" else 0.0,
                "dead_until_s": float(next_free), "_busy_s": busy,
            })
        self.rows = rows
        self.components = _pack_components(comps, fs)
        step = self.components.kind == _STEP
        order = np.argsort(self.components.stop[step], kind="stable")
        self.step_complete = self.components.stop[step][order]
        self.step_levels = np.r_[0.0, np.cumsum(self.components.q[step][order])]
        self._measure_peaks(design.amp_sos, fs)

    def _measure_peaks(self, sos: np.ndarray, fs: float) -> None:
        """Noise-free peak of each event after the amplifier, from the event alone (events never overlap)."""
        c = self.components
        self.template_max, self.template_min = 0.0, 0.0
        for row in self.rows:
            first = row["start_index"]
            length = int(math.ceil(row["_busy_s"] * fs)) + 2
            template = np.zeros(length)
            for i in np.nonzero(c.event == row["event_id"])[0]:
                k_lo, k_hi = 0, min(int(c.stop[i] - c.first[i]), length - int(c.first[i] - first))
                values = _component_values(int(c.kind[i]), c.q[i], c.a[i], c.b[i], c.offset[i], k_lo, k_hi, fs)
                start = int(c.first[i] - first)
                template[start:start + len(values)] += values
                if c.kind[i] == _STEP:
                    template[start + len(values):] += c.q[i]
            filtered = signal.sosfilt(sos, template)
            peak = int(np.argmax(np.abs(filtered)))
            row["peak_A"] = float(filtered[peak])
            row["peak_s"] = (first + peak) / fs
            self.template_max = max(self.template_max, float(filtered.max()))
            self.template_min = min(self.template_min, float(filtered.min()))

    def level_at(self, index: np.ndarray) -> np.ndarray:
        """Sum of the completed steps at each absolute sample index."""
        return self.step_levels[np.searchsorted(self.step_complete, index, side="right")]


def _poisson_arrivals(rng: np.random.Generator, rate: float, duration: float) -> np.ndarray:
    if rate <= 0:
        return np.zeros(0)
    times: list[np.ndarray] = []
    last, batch = 0.0, max(64, int(rate * duration * 1.1) + 64)
    while last < duration:
        t = last + np.cumsum(rng.exponential(1.0 / rate, batch))
        times.append(t)
        last = float(t[-1])
    t = np.concatenate(times)
    return t[t < duration]


def _pack_components(comps: list[tuple], fs: float) -> _Components:
    if not comps:
        empty_f, empty_i = np.zeros(0), np.zeros(0, dtype=np.int64)
        return _Components(empty_i, empty_i, empty_f, empty_f, empty_f, empty_f, empty_i, empty_i, empty_f)
    kind, event, t0, q, a_, b_, span = (np.array(col) for col in zip(*comps, strict=True))
    first = np.floor(t0 * fs + 0.5).astype(np.int64)
    stop = np.ceil((t0 + span) * fs + 0.5).astype(np.int64) + 1
    return _Components(kind.astype(np.int64), event.astype(np.int64), t0, q, a_, b_, first, stop, t0 - first / fs)


# ------------------------------------------------------------------------------------------------ the signal
class _SignalStream:
    """The amplifier output, sample block after sample block, with every state carried across blocks."""

    def __init__(self, spec: SimulationSpec, design: _NoiseDesign, catalogue: _Catalogue,
                 seeds: list[np.random.SeedSequence]):
        self.spec, self.design, self.catalogue = spec, design, catalogue
        self.fs = spec.sample_rate_hz
        self.rng_white, self.rng_cap, self.rng_pink, self.rng_wander, rng_hum = (
            np.random.default_rng(s) for s in seeds)
        # Each filter starts in its stationary state: the differentiator from earlier voltage samples, the
        # 1/f filter from its Lyapunov covariance, the wander from its stationary variance.
        history = self.rng_cap.standard_normal(_DIFF_TAPS - 1) * self._voltage_sigma
        # A denominator of [1, 0] keeps lfilter on its sample-by-sample recursion: its shortcut for pure FIR
        # filters (a convolution plus the carried state) rounds differently with the block size.
        self.cap_state = signal.lfiltic(design.diff_fir, _FIR_DENOMINATOR, [], history[::-1])
        self.pink_state = (_stationary_sos_state(design.pink_sos, self.rng_pink) if design.flicker > 0
                           else None)
        a = design.wander_pole
        self.wander_state = np.array([a * spec.wander_rms_A * self.rng_wander.standard_normal()])
        self.hum_phases = rng_hum.uniform(0.0, 2.0 * math.pi, len(spec.hum_harmonics))
        self.amp_state = signal.sosfilt_zi(design.amp_sos) * spec.baseline_offset_A
        self.position = 0

    @property
    def _voltage_sigma(self) -> float:
        return self.spec.voltage_noise_V_per_rtHz * math.sqrt(self.fs / 2.0)

    def read(self, n: int) -> np.ndarray:
        spec, design, fs = self.spec, self.design, self.fs
        n0, n1 = self.position, self.position + n
        index = np.arange(n0, n1) if (spec.drift_A_per_s or spec.hum_amplitude_A
                                      or self.catalogue.step_complete.size) else None
        if spec.drift_A_per_s:
            x = spec.baseline_offset_A + spec.drift_A_per_s * (index / fs)
        else:
            x = np.full(n, spec.baseline_offset_A)
        if spec.wander_rms_A > 0:
            a = design.wander_pole
            w = self.rng_wander.standard_normal(n) * (spec.wander_rms_A * math.sqrt(1.0 - a * a))
            wander, self.wander_state = signal.lfilter([1.0], [1.0, -a], w, zi=self.wander_state)
            x += wander
        if spec.hum_amplitude_A > 0:
            x += self._hum(index)
        if self.catalogue.step_complete.size:
            x += self.catalogue.level_at(index)
        self._add_events(x, n0, n1)
        if design.white > 0:
            x += self.rng_white.standard_normal(n) * design.white_sigma
        if self._voltage_sigma > 0 and spec.input_capacitance_F > 0:
            v = self.rng_cap.standard_normal(n) * self._voltage_sigma
            cap, self.cap_state = signal.lfilter(design.diff_fir, _FIR_DENOMINATOR, v, zi=self.cap_state)
            x += spec.input_capacitance_F * cap
        if self.pink_state is not None:
            pink, self.pink_state = signal.sosfilt(design.pink_sos, self.rng_pink.standard_normal(n),
                                                   zi=self.pink_state)
            x += math.sqrt(design.flicker) * design.pink_gain * pink
        y, self.amp_state = signal.sosfilt(design.amp_sos, x, zi=self.amp_state)
        self.position = n1
        return y

    def _hum(self, index: np.ndarray) -> np.ndarray:
        """Mains hum at absolute sample ``index``: harmonic k is A_k sin(k theta + phi_k), theta from the
        absolute index (so it never depends on the block), the harmonics by the angle-addition recurrence."""
        spec = self.spec
        theta = 2.0 * math.pi * np.mod((spec.hum_frequency_hz / self.fs) * index, 1.0)
        s1, c1 = np.sin(theta), np.cos(theta)
        sk, ck = s1, c1
        hum = np.zeros(len(index))
        for k, (rel, phase) in enumerate(zip(spec.hum_harmonics, self.hum_phases, strict=True), start=1):
            if k > 1:
                sk, ck = sk * c1 + ck * s1, ck * c1 - sk * s1
            if rel > 0 and k * spec.hum_frequency_hz < self.fs / 2.0:
                hum += (spec.hum_amplitude_A * rel) * (sk * math.cos(phase) + ck * math.sin(phase))
        return hum

    def _add_events(self, x: np.ndarray, n0: int, n1: int) -> None:
        c = self.catalogue.components
        for i in np.nonzero((c.first < n1) & (c.stop > n0))[0]:
            lo, hi = max(n0, int(c.first[i])), min(n1, int(c.stop[i]))
            values = _component_values(int(c.kind[i]), c.q[i], c.a[i], c.b[i], c.offset[i],
                                       lo - int(c.first[i]), hi - int(c.first[i]), self.fs)
            x[lo - n0:hi - n0] += values


def _seeds(spec: SimulationSpec) -> list[np.random.SeedSequence]:
    """Independent streams: events, white, capacitive, 1/f, wander, hum (a noise setting never moves events)."""
    return np.random.SeedSequence(spec.seed).spawn(6)


def _prepare(spec: SimulationSpec) -> tuple[_NoiseDesign, _Catalogue, list[np.random.SeedSequence]]:
    design = _NoiseDesign(spec)
    seeds = _seeds(spec)
    catalogue = _Catalogue(spec, design, np.random.default_rng(seeds[0]))
    return design, catalogue, seeds


def iter_recording(spec: SimulationSpec, block_size: int = 1 << 18) -> Iterator[np.ndarray]:
    """Yield the simulated amplifier output (A, float64) in consecutive blocks.

    Parameters
    ----------
    spec : SimulationSpec
    block_size : int, default 262144
        Samples per block (the last block may be shorter). The samples do not depend on it.

    Yields
    ------
    ndarray
        The next ``block_size`` samples, A, before conversion to the file's dtype.
    """
    if block_size < 1:
        raise ValueError(f"block_size must be >= 1 sample, got {block_size}")
    design, catalogue, seeds = _prepare(spec)
    stream = _SignalStream(spec, design, catalogue, seeds[1:])
    total = spec.n_samples
    while stream.position < total:
        yield stream.read(min(block_size, total - stream.position))


# ------------------------------------------------------------------------------------------------ noise model
def noise_psd_model(f_hz: Any, spec: SimulationSpec, *, realised: bool = False,
                    components: bool = False) -> np.ndarray | dict[str, np.ndarray]:
    """One-sided PSD of the simulated noise at the amplifier output, A^2/Hz.

    ``S(f) = [S_w + S_w f_c / f + (2 pi f C_in e_n)^2 + 4 s^2 tau / (1 + (2 pi f tau)^2)] |H(f)|^2`` with
    ``H`` the amplifier's digital Bessel filter (the filter the simulator applies). Hum lines, the offset
    and the linear drift are deterministic and not part of the density.

    Parameters
    ----------
    f_hz : array_like
        Frequencies, Hz (0 to fs/2).
    spec : SimulationSpec
    realised : bool, default False
        False: the intended (analog) laws above. True: the exact PSD of the discrete-time process the
        simulator runs (1/f pole-zero filter, FIR differentiator, AR(1) wander), what Welch's method
        converges to. They agree within 0.5 % for the 1/f term between 10/duration and 0.05 fs (+2 % at
        0.1 fs, +7 % at 0.2 fs), within 0.05 % for the capacitive term up to 0.4 fs (the FIR differentiator
        then falls to 0 at fs/2), and within 1 % for the wander below fs/100.
    components : bool, default False
        Return a dict of the terms before the amplifier (``white``, ``flicker``, ``capacitive``,
        ``wander``), the amplifier's power gain ``amplifier_gain2`` and the ``total``.

    Returns
    -------
    ndarray or dict
    """
    terms = _NoiseDesign(spec).psd_terms(np.asarray(f_hz, dtype=float), realised)
    gain2 = terms["amplifier_gain2"]
    total = (terms["white"] + terms["flicker"] + terms["capacitive"] + terms["wander"]) * gain2
    if components:
        return {**terms, "total": total}
    return total


def noise_rms(spec: SimulationSpec, *, include_wander: bool = False, f_low_hz: float | None = None) -> float:
    """Rms of the simulated noise at the amplifier output, A: the intended PSD integrated from
    ``f_low_hz`` (default 1 / duration) to fs/2. The baseline wander is left out unless asked for,
    since a detector's baseline follows it.
    """
    low = 1.0 / spec.duration_s if f_low_hz is None else f_low_hz
    f = np.geomspace(low, spec.sample_rate_hz / 2.0, 20001)
    terms = noise_psd_model(f, spec, components=True)
    psd = terms["total"] if include_wander else terms["total"] - terms["wander"] * terms["amplifier_gain2"]
    return math.sqrt(float(np.trapezoid(psd, f)))


# ------------------------------------------------------------------------------------------------ truth
#: Columns of ``NAME.truth.parquet`` (units in the Arrow field metadata, key ``unit``).
TRUTH_COLUMNS: dict[str, Column] = {
    "event_id": Column("int64", "", "true event number, from 0 in time order"),
    "shape": Column("string", "", "spike, burst, step, blip or tail_spike"),
    "start_s": Column("float64", "s", "onset of the electrode current (the recording lags by the amplifier delay)"),
    "end_s": Column("float64", "s", "time by which 99 % of the event charge is delivered (step: 99 % of the step)"),
    "start_index": Column("int64", "", "sample whose interval holds the onset, floor(start_s * fs + 1/2)"),
    "end_index": Column("int64", "", "one past the last sample of the event, ceil(end_s * fs + 1/2)"),
    "peak_A": Column("float64", "A", "signed noise-free peak of the event after the amplifier filter"),
    "peak_s": Column("float64", "s", "time stamp (index / fs) of the sample holding that peak"),
    "charge_C": Column("float64", "C", "Faraday charge of the complete oxidation of the particle"),
    "signal_charge_C": Column("float64", "C", "charge the event's current carries (NaN for a step)"),
    "oxidised_fraction": Column("float64", "", "signal_charge_C / charge_C (blip: partial, step: 0)"),
    "diameter_m": Column("float64", "m", "particle diameter"),
    "n_subpeaks": Column("int64", "", "sub-spikes of a burst; 1 for spike, blip, tail_spike; 0 for a step"),
    "step_height_A": Column("float64", "A", "height of a step event (0 for other shapes)"),
    "snr": Column("float64", "", "|peak_A| / rms noise in the recorded bandwidth"),
    "dead_until_s": Column("float64", "s", "no other event starts before this time (event end + settling + dead time)"),
}


def _truth_from(spec: SimulationSpec, catalogue: _Catalogue, rms: float,
                extra: Mapping[str, str] | None = None) -> pa.Table:
    rows = [{**row, "snr": abs(row["peak_A"]) / rms if rms > 0 else math.inf} for row in catalogue.rows]
    metadata = {
        "generator": "impactline.simulate", "spec": json.dumps(spec.to_dict(), sort_keys=True),
        "collision_rate_per_s": repr(catalogue.rate), "n_arrivals": str(catalogue.n_arrivals),
        "n_lost_dead_time": str(catalogue.n_lost), "n_beyond_end": str(catalogue.n_beyond_end),
        "noise_rms_A": repr(rms),
        "amplifier_delay_s": repr(catalogue.delay_s), "amplifier_settle_s": repr(catalogue.settle_s),
        **(extra or {}),
    }
    schema = schema_for(TRUTH_COLUMNS, metadata)
    arrays = [pa.array([row[f.name] for row in rows], type=f.type) for f in schema]
    return pa.Table.from_arrays(arrays, schema=schema)


def truth_table(spec: SimulationSpec) -> pa.Table:
    """The ground-truth table of ``spec`` (what :func:`simulate` writes), without making the samples."""
    _, catalogue, _ = _prepare(spec)
    return _truth_from(spec, catalogue, noise_rms(spec))


# ------------------------------------------------------------------------------------------------ files
@dataclass
class SimulationResult:
    """What :func:`simulate` wrote and the numbers behind it (SI units).

    Attributes
    ----------
    data_path, sidecar_path, truth_path : Path
        The recording, its ``NAME.json`` sidecar and ``NAME.truth.parquet``.
    spec : SimulationSpec
    n_samples, n_events : int
        Samples written; true events in the truth table.
    n_arrivals : int
        Poisson arrivals in the recording time; ``n_events + n_lost_dead_time + n_beyond_end``.
    n_lost_dead_time, n_beyond_end : int
        Arrivals dropped inside an earlier event's dead period, and because their event would not end
        before the recording does.
    events_by_shape : dict
        Shape -> number of true events.
    collision_rate_per_s : float
        Rate of the arrival process, 1/s.
    noise_rms_A : float
        Rms noise in the recorded bandwidth (:func:`noise_rms`), A.
    gain_A_per_count, offset_A : float
        ``current = stored value * gain_A_per_count + offset_A`` (1 and 0 for float files).
    clipped_samples : int
        int16 samples that did not fit (0 when the range estimate held).
    amplifier_delay_s : float
        Group delay of the amplifier filter at DC, s.
    """

    data_path: Path
    sidecar_path: Path
    truth_path: Path
    spec: SimulationSpec
    n_samples: int
    n_events: int
    n_arrivals: int
    n_lost_dead_time: int
    n_beyond_end: int
    events_by_shape: dict[str, int]
    collision_rate_per_s: float
    noise_rms_A: float
    gain_A_per_count: float
    offset_A: float
    clipped_samples: int
    amplifier_delay_s: float

    @property
    def duration_s(self) -> float:
        """Length of the recording, s."""
        return self.n_samples / self.spec.sample_rate_hz

    def summary(self) -> str:
        """Two lines for a terminal."""
        shapes = ", ".join(f"{k} {v}" for k, v in self.events_by_shape.items() if v)
        text = (f"{self.data_path} (+ {self.sidecar_path.name}, {self.truth_path.name}): "
                f"{format_quantity(self.duration_s, 's')} at {format_quantity(self.spec.sample_rate_hz, 'Hz')}, "
                f"{self.spec.dtype}\n  {self.n_events} events ({shapes or 'none'}) at "
                f"{self.collision_rate_per_s:.3g} /s, {self.n_lost_dead_time} arrival(s) lost to dead time; "
                f"noise {format_quantity(self.noise_rms_A, 'A')} rms")
        if self.clipped_samples:
            text += f"; {self.clipped_samples} samples clipped"
        return text


def _output_paths(spec: SimulationSpec, out_path: str | Path) -> tuple[Path, Path, Path]:
    path = Path(out_path)
    if not _is_data_file(path):
        path = path / f"{spec.name}.bin"
    return path, path.with_suffix(".json"), path.with_name(path.stem + ".truth.parquet")


def _is_data_file(path: Path) -> bool:
    """True for ``NAME.bin`` / ``NAME.npy``, False for a folder; anything else is refused."""
    if path.is_dir() or not path.suffix:
        return False
    if path.suffix.lower() in (".bin", ".npy"):
        return True
    raise SpecError(f"{path}: the recording must be NAME.bin (raw) or NAME.npy; give one of these or a folder")


def _written_by_simulator(sidecar: Path) -> bool:
    try:
        return json.loads(sidecar.read_text(encoding="utf-8")).get("generator") == "impactline.simulate"
    except (OSError, ValueError, AttributeError):
        return False


def _int16_scaling(spec: SimulationSpec, design: _NoiseDesign, catalogue: _Catalogue) -> tuple[float, float]:
    """(gain A/count, offset A) so that the whole signal fits in int16 with room for +-7 sigma of noise."""
    ends = (spec.baseline_offset_A, spec.baseline_offset_A + spec.drift_A_per_s * spec.duration_s)
    heights = catalogue.step_levels[1:] - catalogue.step_levels[:-1]
    f = np.geomspace(design.pink_low_hz / 10.0, spec.sample_rate_hz / 2.0, 20001)
    sigma = math.sqrt(float(np.trapezoid(noise_psd_model(f, spec, realised=True), f)))
    hum = spec.hum_amplitude_A * sum(spec.hum_harmonics)
    spread = hum + _SIGMA_RANGE * sigma
    high = max(ends) + heights[heights > 0].sum() + catalogue.template_max + spread
    low = min(ends) + heights[heights < 0].sum() + catalogue.template_min - spread
    half = 0.5 * (high - low) * 1.02
    if not half > 0:
        half = 1e-12
    return half / INT16_FULL_SCALE, 0.5 * (high + low)


def simulate(spec: SimulationSpec, out_path: str | Path, *, block_size: int = 1 << 18,
             overwrite: bool | None = None,
             progress: Callable[[int, int], None] | None = None) -> SimulationResult:
    """Write a synthetic recording, its sidecar and its ground truth.

    Parameters
    ----------
    spec : SimulationSpec
    out_path : path-like
        ``NAME.bin`` (raw little-endian samples), ``NAME.npy``, or a folder (``<spec.name>.bin`` in it).
        Beside it: ``NAME.json`` (``sample_rate_hz``, ``dtype``, ``gain_A_per_count``, ``offset_A``, with
        ``current = count * gain_A_per_count + offset_A``) and ``NAME.truth.parquet``.
    block_size : int, default 262144
        Samples made and written at a time (bounds the memory; does not change the samples).
    overwrite : bool, optional
        True: replace existing files. False: refuse. Default: replace only files an earlier simulation
        wrote (their sidecar says so), refuse anything else.
    progress : callable, optional
        Called as ``progress(samples_done, samples_total)`` after each block.

    Returns
    -------
    SimulationResult

    Raises
    ------
    FileExistsError
        When an output exists and may not be replaced.
    """
    data_path, sidecar, truth_path = _output_paths(spec, out_path)
    for path in (data_path, sidecar, truth_path):
        if path.exists() and not (overwrite or (overwrite is None and _written_by_simulator(sidecar))):
            raise FileExistsError(f"{path} exists and was not written by the simulator; choose another output "
                                  "or allow overwriting (--overwrite, overwrite=True)")
    data_path.parent.mkdir(parents=True, exist_ok=True)
    design, catalogue, seeds = _prepare(spec)
    rms = noise_rms(spec)
    file_dtype = np.dtype(_DTYPES[spec.dtype])
    if spec.dtype == "int16":
        gain, offset = _int16_scaling(spec, design, catalogue)
    else:
        gain, offset = 1.0, 0.0
    total = spec.n_samples
    stream = _SignalStream(spec, design, catalogue, seeds[1:])
    temporary = data_path.parent / f".{data_path.name}.{os.getpid()}.tmp"
    clipped = 0
    try:
        with open(temporary, "wb") as handle:
            if data_path.suffix.lower() == ".npy":
                np.lib.format.write_array_header_1_0(
                    handle, {"descr": file_dtype.str, "fortran_order": False, "shape": (total,)})
            while stream.position < total:
                block = stream.read(min(block_size, total - stream.position))
                if spec.dtype == "int16":
                    counts = np.rint((block - offset) / gain)
                    clipped += int(np.count_nonzero(np.abs(counts) > INT16_FULL_SCALE))
                    block = np.clip(counts, -INT16_FULL_SCALE, INT16_FULL_SCALE)
                handle.write(block.astype(file_dtype).tobytes())
                if progress is not None:
                    progress(stream.position, total)
        os.replace(temporary, data_path)
    finally:
        if temporary.exists():
            temporary.unlink()
    settings = {"sample_rate_hz": spec.sample_rate_hz, "gain_A_per_count": gain, "offset_A": offset,
                "n_samples": total, "units": "A", "generator": "impactline.simulate", "seed": spec.seed,
                "truth": truth_path.name, "amplifier_delay_s": catalogue.delay_s, "spec": spec.to_dict()}
    if data_path.suffix.lower() == ".bin":
        settings.update(dtype=file_dtype.str, byte_order="little")
    write_json_atomic(settings, sidecar)
    write_table_atomic(_truth_from(spec, catalogue, rms, {"data_file": data_path.name}), truth_path)
    counts = {shape: sum(1 for row in catalogue.rows if row["shape"] == shape) for shape in SHAPES}
    return SimulationResult(data_path, sidecar, truth_path, spec, total, len(catalogue.rows), catalogue.n_arrivals,
                            catalogue.n_lost, catalogue.n_beyond_end, counts, catalogue.rate, rms, gain, offset,
                            clipped, catalogue.delay_s)


# ------------------------------------------------------------------------------------------------ demo
def copper_ink_demo_specs(seed: int = 0) -> dict[str, SimulationSpec]:
    """Recordings of a printed-electronics ink supplier checking copper nanoparticle ink batches.

    Diluted ink in a supporting electrolyte at 25 C, a carbon microdisc of 5 um radius held at an
    oxidising potential (Cu -> Cu2+, n = 2), 250 kHz sampling through a 4-pole 50 kHz Bessel filter. Each
    batch is diluted to 150 pM of particles, which sets the diffusion-limited collision rate (13-22 /s).

    * ``batch_A_nominal``: 50 nm median, tight (gsd 1.2): the reference batch.
    * ``batch_B_coarse``: 70 nm median, broad (gsd 1.35), more bursts (agglomerates oxidising piecewise);
      mains hum and a drifting baseline, as on a noisier bench.
    * ``batch_C_fine``: 40 nm median, higher noise (a longer cable), and a few particles that stick.

    Parameters
    ----------
    seed : int, default 0
        Base seed; batch ``i`` uses ``seed + i``.

    Returns
    -------
    dict
        Batch name -> :class:`SimulationSpec` (12 s each; about 9 million samples in all).
    """
    common = dict(sample_rate_hz=250e3, duration_s=12.0, material="Cu", electrode_radius_m=5e-6,
                  temperature_K=298.15, bessel_order=4, bandwidth_hz=50e3, tail_decay_s=1.5e-3, dtype="float32")
    mostly_spikes = {"spike": 0.72, "burst": 0.12, "tail_spike": 0.1, "blip": 0.06}
    return {
        "batch_A_nominal": SimulationSpec(
            name="batch_A_nominal", median_diameter_m=50e-9, diameter_gsd=1.2, concentration_mol_per_m3=1.5e-7,
            shape_weights=mostly_spikes, white_noise_A_per_rtHz=20e-15, seed=seed, **common),
        "batch_B_coarse": SimulationSpec(
            name="batch_B_coarse", median_diameter_m=70e-9, diameter_gsd=1.35, concentration_mol_per_m3=1.5e-7,
            shape_weights={"spike": 0.6, "burst": 0.25, "tail_spike": 0.1, "blip": 0.05},
            white_noise_A_per_rtHz=20e-15, hum_amplitude_A=5e-12, drift_A_per_s=2e-12, wander_rms_A=2e-12,
            seed=seed + 1, **common),
        "batch_C_fine": SimulationSpec(
            name="batch_C_fine", median_diameter_m=40e-9, diameter_gsd=1.2, concentration_mol_per_m3=1.5e-7,
            shape_weights={**mostly_spikes, "step": 0.04}, white_noise_A_per_rtHz=40e-15,
            input_capacitance_F=20e-12, step_height_A=30e-12, seed=seed + 2, **common),
    }


# ------------------------------------------------------------------------------------------------ CLI
def register_cli(subparsers: Any) -> argparse.ArgumentParser:
    """Add the ``simulate`` sub-command to an argparse ``subparsers`` object; returns its parser."""
    p = subparsers.add_parser(
        "simulate", help="write synthetic recordings with known ground truth",
        description="Write synthetic collision recordings (NAME.bin or .npy + NAME.json sidecar) and their "
                    "ground truth (NAME.truth.parquet). Quantities accept SI prefixes: '250 kHz', '50 nm'.")
    p.add_argument("--out", default="simulated", help="folder, or a file NAME.bin / NAME.npy (default ./simulated)")
    p.add_argument("--demo", action="store_true", help="write the copper-ink batch recordings instead")
    p.add_argument("--duration", default="10 s", help="recording length (default 10 s)")
    p.add_argument("--rate", default=None, help="mean collision rate, per second (default 5)")
    p.add_argument("--concentration", default=None,
                   help="particle concentration (e.g. '20 pM'); the rate is then diffusion-limited")
    p.add_argument("--electrode-radius", default="5 um", help="disc radius (default 5 um)")
    p.add_argument("--sample-rate", default="250 kHz", help="sampling rate (default 250 kHz)")
    p.add_argument("--bandwidth", default="50 kHz", help="amplifier -3 dB bandwidth, 4-pole Bessel (default 50 kHz)")
    p.add_argument("--material", default="Cu", help="Ag, Au, Cu, Ni or Pt (default Cu)")
    p.add_argument("--diameter", default="50 nm", help="median particle diameter (default 50 nm)")
    p.add_argument("--gsd", default="1.25", help="geometric standard deviation of the diameters (default 1.25)")
    p.add_argument("--shapes", default=None, help="shape weights, e.g. 'spike=0.7,burst=0.2,tail_spike=0.1'")
    p.add_argument("--noise-scale", default="1", help="multiply every noise source: 2 halves the SNR (default 1)")
    p.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    p.add_argument("--format", choices=("bin", "npy"), default="bin", help="file format (default bin)")
    p.add_argument("--dtype", choices=tuple(_DTYPES), default="float32", help="sample type (default float32)")
    p.add_argument("--overwrite", action="store_true", help="replace existing files of any origin")
    p.set_defaults(func=_run_cli)
    return p


def _cli_specs(args: argparse.Namespace) -> dict[str, SimulationSpec]:
    if args.demo:
        specs = copper_ink_demo_specs(args.seed)
        return {name: dataclasses.replace(spec, dtype=args.dtype) for name, spec in specs.items()}
    values: dict[str, Any] = dict(
        sample_rate_hz=args.sample_rate, duration_s=args.duration, material=args.material,
        median_diameter_m=args.diameter, diameter_gsd=args.gsd, electrode_radius_m=args.electrode_radius,
        bandwidth_hz=args.bandwidth, dtype=args.dtype, seed=args.seed)
    if args.rate is not None:
        values["collision_rate_per_s"] = args.rate
    if args.concentration is not None:
        values["concentration_mol_per_m3"] = args.concentration
    if args.shapes is not None:
        values["shape_weights"] = args.shapes
    out = Path(args.out)
    values["name"] = out.stem if _is_data_file(out) else f"simulated_seed{args.seed}"
    spec = SimulationSpec(**values)
    return {spec.name: spec.with_noise_scale(parse_quantity(args.noise_scale, None))}


def _run_cli(args: argparse.Namespace) -> int:
    try:
        specs = _cli_specs(args)
        out = Path(args.out)
        single = _is_data_file(out)
        if single and len(specs) > 1:
            raise SpecError(f"--out {out}: --demo writes several recordings; give a folder")
        written = []
        for name, spec in specs.items():
            target = out if single else out / f"{name}.{args.format}"
            result = simulate(spec, target, overwrite=True if args.overwrite else None,
                              progress=_progress_printer(name))
            print(result.summary())
            written.append(result)
    except (ImpactlineError, QuantityError, ValueError, FileExistsError, OSError) as exc:
        print(f"impactline simulate: error: {exc}", file=sys.stderr)
        return 2
    events = sum(r.n_events for r in written)
    seconds = sum(r.duration_s for r in written)
    print(f"{len(written)} recording(s), {events} true events, {format_quantity(seconds, 's')} of signal")
    return 0


def _progress_printer(name: str) -> Callable[[int, int], None] | None:
    if not sys.stderr.isatty():
        return None

    def show(done: int, total: int) -> None:
        end = "\n" if done >= total else ""
        sys.stderr.write(f"\r  {name}: {100 * done // total:3d} %{end}")
        sys.stderr.flush()

    return show
