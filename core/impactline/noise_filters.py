"""Analog Bessel low-pass filters as seen by the noise analysis: response, rise time, pulse peak, noise.

Everything is computed from the analog prototype (``scipy.signal.bessel(..., analog=True, norm='mag')``,
-3 dB at the cutoff ``fc``) and expressed in normalised units: frequency ``x = f / fc`` and time
``tau = t * fc``. The prototype describes the amplifier's or the analysis' Bessel filter independently
of the sampling rate; the noise integrals stop at the recording's Nyquist frequency when one is given.

Public functions
----------------
bessel_power_response   |H(f)|^2 at given frequencies
bessel_step_shape       rise time, overshoot, impulse peak and delay of the prototype
pulse_peak_fraction     peak kept for a rectangular pulse of duration w
power_law_noise_integral  integral of f^p |H(f)|^2 between two frequencies (noise through the filter)
noise_bandwidth_factors   white and f^2 noise bandwidths relative to the brick-wall values
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import numpy as np
from scipy import integrate, signal

__all__ = [
    "BesselShape",
    "bessel_power_response",
    "bessel_step_shape",
    "pulse_peak_fraction",
    "power_law_noise_integral",
    "noise_bandwidth_factors",
]

MAX_ORDER = 10
# Normalised time grid for the step response (tau = t * fc). Every order up to 10 settles well within 8/fc
# and the grid step (1/2000 of 1/fc) keeps the 10-90 % rise time exact to better than 1e-4 relative.
_TAU_END = 12.0
_TAU_STEPS = 24001


def _check_order(order: int) -> int:
    if not isinstance(order, (int, np.integer)) or not 1 <= int(order) <= MAX_ORDER:
        raise ValueError(f"Bessel filter order must be an integer from 1 to {MAX_ORDER}, got {order!r}")
    return int(order)


@functools.lru_cache(maxsize=None)
def _prototype(order: int) -> tuple[np.ndarray, np.ndarray]:
    """Numerator and denominator (s in rad/s) of the prototype with its -3 dB point at 1 rad/s."""
    b, a = signal.bessel(order, 1.0, btype="low", analog=True, norm="mag")
    return np.asarray(b, float), np.asarray(a, float)


def bessel_power_response(freqs_hz: np.ndarray, cutoff_hz: float, order: int) -> np.ndarray:
    """Squared magnitude response of an analog Bessel low-pass.

    Parameters
    ----------
    freqs_hz : array_like
        Frequencies, Hz.
    cutoff_hz : float
        -3 dB frequency, Hz.
    order : int
        Number of poles (1-10).

    Returns
    -------
    ndarray
        ``|H(f)|^2`` (dimensionless, 1 at DC, 0.5 at the cutoff).
    """
    b, a = _prototype(_check_order(order))
    x = np.asarray(freqs_hz, float) / float(cutoff_hz)
    return _power_response_normalised(x, b, a)


def _power_response_normalised(x: np.ndarray, b: np.ndarray, a: np.ndarray) -> np.ndarray:
    s = 1j * x
    return np.abs(np.polyval(b, s)) ** 2 / np.abs(np.polyval(a, s)) ** 2


@dataclass(frozen=True)
class BesselShape:
    """Time-domain figures of an analog Bessel low-pass, in units of ``1/fc``.

    Attributes
    ----------
    order : int
        Number of poles.
    rise_time : float
        10-90 % step-response rise time times ``fc``.
    overshoot : float
        Step overshoot as a fraction of the step (0.0084 = 0.84 %).
    impulse_peak : float
        Largest value of the impulse response divided by ``fc`` (so ``h_max = impulse_peak * fc``, 1/s).
    delay : float
        Group delay at DC times ``fc``.
    tau : ndarray
        Normalised time grid of :attr:`step`.
    step : ndarray
        Step response on :attr:`tau`.
    """

    order: int
    rise_time: float
    overshoot: float
    impulse_peak: float
    delay: float
    tau: np.ndarray
    step: np.ndarray


@functools.lru_cache(maxsize=None)
def bessel_step_shape(order: int) -> BesselShape:
    """Step response figures of the ``order``-pole Bessel prototype (cached).

    Parameters
    ----------
    order : int
        Number of poles (1-10).

    Returns
    -------
    BesselShape
    """
    order = _check_order(order)
    # Prototype with fc = 1 Hz, so the time axis is directly tau = t * fc.
    b_hz, a_hz = signal.bessel(order, 2.0 * math.pi, btype="low", analog=True, norm="mag")
    tau = np.linspace(0.0, _TAU_END, _TAU_STEPS)
    system = signal.lti(b_hz, a_hz)
    _, step = signal.step(system, T=tau)
    _, impulse = signal.impulse(system, T=tau)
    peak_index = int(np.argmax(step))
    rising = step[: peak_index + 1]
    t10 = float(np.interp(0.1, rising, tau[: peak_index + 1]))
    t90 = float(np.interp(0.9, rising, tau[: peak_index + 1]))
    # Group delay at DC = a1/a0 - b1/b0 of the transfer function, here with b constant.
    delay = float(a_hz[-2] / a_hz[-1]) - (float(b_hz[-2] / b_hz[-1]) if len(b_hz) > 1 else 0.0)
    step.setflags(write=False)
    tau.setflags(write=False)
    return BesselShape(order=order, rise_time=t90 - t10, overshoot=float(step.max() - 1.0),
                       impulse_peak=float(impulse.max()), delay=delay, tau=tau, step=step)


def pulse_peak_fraction(duration_s: float | np.ndarray, cutoff_hz: float, order: int) -> np.ndarray:
    """Fraction of a rectangular pulse's amplitude that survives an analog Bessel low-pass.

    The filtered pulse is ``s(t) - s(t - w)`` (``s`` the step response); its maximum over ``t`` divided by
    the pulse height. Long pulses give ``1 + overshoot``; pulses much shorter than the rise time give
    about ``w * h_max`` (charge-limited regime).

    Parameters
    ----------
    duration_s : float or array_like
        Pulse duration(s) ``w``, s.
    cutoff_hz : float
        -3 dB frequency, Hz.
    order : int
        Number of poles.

    Returns
    -------
    ndarray
        Peak fraction for each duration (same shape as ``duration_s``).
    """
    shape = bessel_step_shape(order)
    widths = np.asarray(duration_s, float) * float(cutoff_hz)
    out = np.empty(widths.shape)
    tau, step = shape.tau, shape.step
    peak_time = float(tau[np.argmax(step)])
    for index, x in np.ndenumerate(widths):
        if x <= 0:
            out[index] = 0.0
        elif x >= peak_time:
            # s >= 0 everywhere, so s(t) - s(t - w) cannot exceed max(s), reached at t = peak_time < w.
            out[index] = 1.0 + shape.overshoot
        else:
            out[index] = float(np.max(step - np.interp(tau - x, tau, step, left=0.0)))
    return out


def _normalised_integral(order: int, power: int, x_lo: float, x_hi: float) -> float:
    """Integral of x^power |H(x)|^2 dx for the prototype with cutoff 1, from x_lo to x_hi."""
    b, a = _prototype(order)

    def integrand(x: float) -> float:
        return x ** power * float(_power_response_normalised(np.asarray(x), b, a))

    if power < 0 and x_lo <= 0:
        raise ValueError("a 1/f term needs a positive lower frequency limit")
    if power + 1 - 2 * order >= 0 and not math.isfinite(x_hi):
        raise ValueError(
            f"f^{power} noise through a {order}-pole filter does not converge without an upper frequency limit"
        )
    # Split at the cutoff and at decades so quad sees the corner and both tails.
    points = [x_lo]
    for edge in (1e-6, 1e-4, 1e-2, 1.0, 10.0, 100.0):
        if x_lo < edge < x_hi:
            points.append(edge)
    points.append(x_hi)
    total = 0.0
    for lo, hi in zip(points[:-1], points[1:], strict=True):
        value, _ = integrate.quad(integrand, lo, hi, limit=200, epsabs=0.0, epsrel=1e-10)
        total += value
    return total


def power_law_noise_integral(power: int, cutoff_hz: float, order: int, f_lo_hz: float = 0.0,
                             f_hi_hz: float = math.inf) -> float:
    """Integral of ``f^power * |H(f)|^2 df`` from ``f_lo_hz`` to ``f_hi_hz`` for a Bessel low-pass.

    Multiplying by a PSD coefficient (e.g. the ``D`` of ``D f^2``) gives that term's variance after the
    filter.

    Parameters
    ----------
    power : int
        Exponent: -1 (1/f), 0 (white), 1 (dielectric), 2 (capacitive).
    cutoff_hz : float
        -3 dB frequency, Hz.
    order : int
        Number of poles.
    f_lo_hz, f_hi_hz : float
        Integration limits, Hz (``f_lo_hz > 0`` needed for ``power = -1``).

    Returns
    -------
    float
        The integral, in Hz^(power + 1).
    """
    order = _check_order(order)
    fc = float(cutoff_hz)
    return fc ** (power + 1) * _cached_integral(order, int(power), f_lo_hz / fc, f_hi_hz / fc)


@functools.lru_cache(maxsize=4096)
def _cached_integral(order: int, power: int, x_lo: float, x_hi: float) -> float:
    return _normalised_integral(order, power, x_lo, x_hi)


def noise_bandwidth_factors(order: int) -> tuple[float, float]:
    """Noise bandwidths of a Bessel low-pass relative to a brick wall at its cutoff.

    Returns
    -------
    white : float
        ``integral |H|^2 df / fc``: the filter passes white noise like a brick wall at ``white * fc``.
    f2 : float
        ``integral f^2 |H|^2 df / (fc^3 / 3)``: f^2 noise relative to a brick wall at ``fc``.
    """
    return (power_law_noise_integral(0, 1.0, order), 3.0 * power_law_noise_integral(2, 1.0, order))
