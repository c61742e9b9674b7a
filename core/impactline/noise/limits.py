"""Noise through a Bessel filter, detection limits, and the cutoff that best detects events of a given length.

For a Bessel low-pass of order ``n`` at cutoff ``fc`` and a threshold of ``k`` standard deviations:

* expected rms noise ``sigma(fc)``: the fitted model ``A/f + B + C f + D f^2`` integrated through
  ``|H(f)|^2`` from the lowest resolved frequency to the recording's Nyquist frequency (and, for
  comparison, the measured spectrum through the same response);
* smallest detectable peak current ``k sigma`` (an event long enough to keep its amplitude);
* shortest event that keeps its amplitude: about two 10-90 % rise times (common practice; for a Gaussian
  filter a rectangular pulse of two rise times keeps 99 % of its height, erf formula in
  Colquhoun & Sigworth 1995, Single-Channel Recording, 2nd ed.);
* smallest detectable charge ``k sigma w / p(w fc)`` for a rectangular event of duration ``w``, where
  ``p`` is the fraction of the pulse height the filter keeps, and its limit for very short events
  ``k sigma / h_max`` (all the charge arrives within the filter's impulse response);
* the equivalent spherical particle diameter of that charge by Faraday's law (:mod:`impactline.physics`);
* the cutoff that maximises ``p(w fc) / sigma(fc)`` for a target duration ``w``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import optimize

from ..physics import diameter_from_charge
from .filters import bessel_power_response, bessel_step_shape, power_law_noise_integral, pulse_peak_fraction
from .model import TERMS
from .spectrum import Spectrum

__all__ = [
    "DetectionLimits",
    "OptimalCutoff",
    "filtered_model_rms",
    "filtered_spectrum_rms",
    "detection_limits",
    "optimal_cutoff",
]


def filtered_model_rms(coefficients: np.ndarray, cutoff_hz: float, order: int, f_lo_hz: float,
                       f_hi_hz: float = math.inf) -> float:
    """rms current (A) of the model ``A/f + B + C f + D f^2`` after a Bessel low-pass.

    Parameters
    ----------
    coefficients : array_like, shape (4,)
        ``A`` (A^2), ``B`` (A^2/Hz), ``C`` (A^2/Hz^2), ``D`` (A^2/Hz^3).
    cutoff_hz : float
        -3 dB frequency, Hz.
    order : int
        Number of poles.
    f_lo_hz : float
        Lowest frequency counted, Hz (the 1/f term diverges at 0; a baseline tracker removes slower
        fluctuations; the default in the analysis is the spectrum's resolution).
    f_hi_hz : float
        Highest frequency counted, Hz (the recording's Nyquist frequency: nothing above it was sampled).

    Returns
    -------
    float
        rms, A.
    """
    variance = 0.0
    for coef, (_, power, _) in zip(coefficients, TERMS, strict=True):
        if coef > 0:
            variance += coef * power_law_noise_integral(power, cutoff_hz, order, f_lo_hz, f_hi_hz)
    return math.sqrt(variance)


def filtered_spectrum_rms(spec: Spectrum, cutoff_hz: float, order: int, *, f_lo_hz: float | None = None,
                          masked: bool = True) -> float:
    """rms current (A) of a measured spectrum after a Bessel low-pass (analog response, up to Nyquist).

    ``f_lo_hz`` defaults to the spectrum's resolution (bins below it hold the per-segment detrending).
    """
    f_lo = spec.resolution_hz if f_lo_hz is None else float(f_lo_hz)
    psd = spec.masked_psd if masked else spec.psd
    keep = spec.freqs_hz >= f_lo
    gain = bessel_power_response(spec.freqs_hz[keep], cutoff_hz, order)
    return float(math.sqrt(np.sum(psd[keep] * gain) * spec.resolution_hz))


@dataclass
class OptimalCutoff:
    """The cutoff that maximises the filtered peak over the filtered noise for one event duration.

    Attributes
    ----------
    cutoff_hz : float
        Best -3 dB frequency, Hz.
    peak_fraction : float
        Fraction of the event's height kept at that cutoff.
    noise_rms_A : float
        Noise rms at that cutoff, A.
    min_peak_A : float
        Smallest detectable event height at that cutoff, ``k sigma / p``, A.
    at_bound : bool
        True when the best cutoff is the highest allowed (the Nyquist frequency): more bandwidth would help.
    """

    cutoff_hz: float
    peak_fraction: float
    noise_rms_A: float
    min_peak_A: float
    at_bound: bool


def optimal_cutoff(coefficients: np.ndarray, duration_s: float, order: int, *, f_lo_hz: float,
                   f_hi_hz: float, k_sigma: float = 5.0) -> OptimalCutoff:
    """Cutoff maximising ``p(w fc) / sigma(fc)`` for a rectangular event of duration ``w``.

    Searched on a logarithmic grid of 241 cutoffs from ``0.01 / w`` to ``f_hi_hz`` (at most ``100 / w``),
    then refined with a bounded scalar search between the best grid point's neighbours.

    Parameters
    ----------
    coefficients : array_like, shape (4,)
        Noise model, as :func:`filtered_model_rms`.
    duration_s : float
        Target event duration ``w``, s.
    order : int
        Bessel order.
    f_lo_hz, f_hi_hz : float
        Frequency limits of the noise integral, Hz; ``f_hi_hz`` also bounds the cutoff.
    k_sigma : float
        Threshold in noise standard deviations (for :attr:`OptimalCutoff.min_peak_A`).
    """
    if not duration_s > 0:
        raise ValueError(f"target event duration must be > 0 s, got {duration_s!r}")
    upper = min(float(f_hi_hz), 100.0 / duration_s)
    lower = min(0.01 / duration_s, upper / 10.0)
    lower = max(lower, 2.0 * f_lo_hz)

    def neg_log_ratio(log_fc: float) -> float:
        fc = math.exp(log_fc)
        p = float(pulse_peak_fraction(duration_s, fc, order))
        sigma = filtered_model_rms(coefficients, fc, order, f_lo_hz, f_hi_hz)
        return -math.log(p / sigma) if p > 0 and sigma > 0 else math.inf

    grid = np.linspace(math.log(lower), math.log(upper), 241)
    values = np.array([neg_log_ratio(g) for g in grid])
    best = int(np.argmin(values))
    lo, hi = grid[max(best - 1, 0)], grid[min(best + 1, len(grid) - 1)]
    log_fc = grid[best]
    if hi > lo:
        res = optimize.minimize_scalar(neg_log_ratio, bounds=(lo, hi), method="bounded",
                                       options={"xatol": 1e-6})
        if res.fun <= values[best]:
            log_fc = float(res.x)
    fc = math.exp(log_fc)
    p = float(pulse_peak_fraction(duration_s, fc, order))
    sigma = filtered_model_rms(coefficients, fc, order, f_lo_hz, f_hi_hz)
    return OptimalCutoff(cutoff_hz=fc, peak_fraction=p, noise_rms_A=sigma, min_peak_A=k_sigma * sigma / p,
                         at_bound=bool(best == len(grid) - 1 and upper == float(f_hi_hz)))


@dataclass
class DetectionLimits:
    """Detection limits at one Bessel cutoff and threshold (all SI).

    Attributes
    ----------
    cutoff_hz, order, k_sigma
        Filter and threshold.
    noise_rms_A : float
        Expected rms noise from the fitted model, A.
    noise_rms_measured_A : float
        rms of the measured spectrum through the same filter (mains lines masked), A.
    rise_time_s : float
        10-90 % rise time of the filter, s.
    min_full_amplitude_duration_s : float
        Shortest event that keeps its amplitude, two rise times, s.
    peak_kept_at_min_duration : float
        Fraction of a rectangular pulse's height kept at that duration (computed).
    min_peak_A : float
        ``k sigma``, A.
    event_duration_s : float
        Duration used for the charge limit: the target duration if given, else the shortest
        full-amplitude duration, s.
    min_charge_C : float
        Smallest detectable charge of a rectangular event of :attr:`event_duration_s`, C.
    min_charge_impulse_C : float
        Smallest detectable charge of an event much shorter than the rise time, C.
    min_diameter_m, min_diameter_impulse_m : float
        Equivalent spherical diameters of those charges (NaN without a material), m.
    optimal : OptimalCutoff or None
        Best cutoff for the target duration (None without one).
    """

    cutoff_hz: float
    order: int
    k_sigma: float
    noise_rms_A: float
    noise_rms_measured_A: float
    rise_time_s: float
    min_full_amplitude_duration_s: float
    peak_kept_at_min_duration: float
    min_peak_A: float
    event_duration_s: float
    min_charge_C: float
    min_charge_impulse_C: float
    min_diameter_m: float = math.nan
    min_diameter_impulse_m: float = math.nan
    material: str = ""
    optimal: OptimalCutoff | None = None


def detection_limits(coefficients: np.ndarray, *, cutoff_hz: float, order: int = 4, k_sigma: float = 5.0,
                     f_lo_hz: float, f_hi_hz: float, spectrum: Spectrum | None = None,
                     target_duration_s: float | None = None, material: str | None = None) -> DetectionLimits:
    """Detection limits of a recording with this noise model, filtered at ``cutoff_hz``.

    Parameters
    ----------
    coefficients : array_like, shape (4,)
        Fitted noise model.
    cutoff_hz : float
        Bessel -3 dB frequency, Hz (at most ``f_hi_hz``).
    order : int
        Bessel order.
    k_sigma : float
        Detection threshold in noise standard deviations.
    f_lo_hz, f_hi_hz : float
        Frequency limits of the noise integral, Hz.
    spectrum : Spectrum, optional
        Measured spectrum, for :attr:`DetectionLimits.noise_rms_measured_A`.
    target_duration_s : float, optional
        Event duration of interest, s: used for the charge limit and the optimal cutoff.
    material : str, optional
        Material name for :func:`impactline.physics.get_material` (equivalent diameters).

    Returns
    -------
    DetectionLimits
    """
    if not 0 < cutoff_hz <= f_hi_hz:
        raise ValueError(f"cutoff {cutoff_hz:g} Hz must be > 0 and at most the Nyquist frequency {f_hi_hz:g} Hz")
    if not k_sigma > 0:
        raise ValueError(f"threshold must be > 0 standard deviations, got {k_sigma!r}")
    shape = bessel_step_shape(order)
    sigma = filtered_model_rms(coefficients, cutoff_hz, order, f_lo_hz, f_hi_hz)
    measured = (filtered_spectrum_rms(spectrum, cutoff_hz, order, f_lo_hz=f_lo_hz) if spectrum is not None
                else math.nan)
    rise = shape.rise_time / cutoff_hz
    t_full = 2.0 * rise
    min_peak = k_sigma * sigma
    duration = float(target_duration_s) if target_duration_s else t_full
    kept = float(pulse_peak_fraction(duration, cutoff_hz, order))
    min_charge = min_peak * duration / kept
    min_charge_impulse = min_peak / (shape.impulse_peak * cutoff_hz)
    limits = DetectionLimits(
        cutoff_hz=float(cutoff_hz), order=int(order), k_sigma=float(k_sigma), noise_rms_A=sigma,
        noise_rms_measured_A=measured, rise_time_s=rise, min_full_amplitude_duration_s=t_full,
        peak_kept_at_min_duration=float(pulse_peak_fraction(t_full, cutoff_hz, order)), min_peak_A=min_peak,
        event_duration_s=duration, min_charge_C=min_charge, min_charge_impulse_C=min_charge_impulse,
        material=material or "",
    )
    if material:
        limits.min_diameter_m = float(diameter_from_charge(min_charge, material))
        limits.min_diameter_impulse_m = float(diameter_from_charge(min_charge_impulse, material))
    if target_duration_s:
        limits.optimal = optimal_cutoff(coefficients, float(target_duration_s), order, f_lo_hz=f_lo_hz,
                                        f_hi_hz=f_hi_hz, k_sigma=k_sigma)
    return limits


