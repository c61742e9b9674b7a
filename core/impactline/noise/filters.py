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
from scipy import signal

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


@functools.cache
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
    return _squared_numerator(tuple(b)) / np.polyval(_squared_denominator(tuple(a)), np.square(x))


@functools.cache
def _squared_denominator(a: tuple[float, ...]) -> np.ndarray:
    """Coefficients (in x^2) of |a(jx)|^2, a real polynomial: evaluating it is ~4x cheaper than complex."""
    poly = np.asarray(a, float)
    n = len(poly) - 1
    # a(jx) = sum_k a_k (jx)^(n-k); |a(jx)|^2 = a(jx) a(-jx) = sum over even powers of x.
    coeffs_s = np.polymul(poly, poly * np.array([(-1.0) ** (n - k) for k in range(n + 1)]))
    # coeffs_s is in s^m with s = jx (only even m survive); s^(2m) = (-1)^m x^(2m).
    degree = len(coeffs_s) - 1
    out = []
    for k, c in enumerate(coeffs_s):
        power = degree - k
        if power % 2 == 0:
            out.append(c * (-1.0) ** (power // 2))
    return np.array(out)


@functools.cache
def _squared_numerator(b: tuple[float, ...]) -> float:
    """|b|^2 of the constant numerator of a Bessel low-pass."""
    return float(np.abs(np.polyval(np.asarray(b, float), 0.0)) ** 2)


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


@functools.cache
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
    # Partial fractions (the poles of a Bessel filter are simple): h(t) = sum r_i exp(p_i t), and the step
    # response from H(s)/s, which adds the residue at s = 0 (the final value 1).
    r_imp, p_imp, _ = signal.residue(b_hz, a_hz)
    r_step, p_step, _ = signal.residue(b_hz, np.polymul(a_hz, [1.0, 0.0]))
    impulse = np.real(np.exp(np.outer(tau, p_imp)) @ r_imp)
    step = np.real(np.exp(np.outer(tau, p_step)) @ r_step)
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


# Composite Gauss-Legendre rule in u = ln x: the integrand x^(p+1) |H(x)|^2 is smooth (analytic) in u, so
# 16 panels per decade of 10 nodes each reach ~1e-12 relative accuracy (checked against scipy.integrate.quad
# in the tests) at a fraction of quad's cost, which matters in the cutoff search.
_GL_NODES, _GL_WEIGHTS = np.polynomial.legendre.leggauss(10)
_PANELS_PER_DECADE = 16
# Above this x the response is within 1e-9 of its asymptote b0^2 / x^(2n) and the tail is integrated exactly.
_TAIL_X = 1e4


def _normalised_integral(order: int, power: int, x_lo: float, x_hi: float) -> float:
    """Integral of x^power |H(x)|^2 dx for the prototype with cutoff 1, from x_lo to x_hi."""
    b, a = _prototype(order)
    if power < 0 and x_lo <= 0:
        raise ValueError("a 1/f term needs a positive lower frequency limit")
    if power + 1 - 2 * order >= 0 and not math.isfinite(x_hi):
        raise ValueError(
            f"f^{power} noise through a {order}-pole filter does not converge without an upper frequency limit"
        )
    if x_hi <= x_lo:
        return 0.0
    total = 0.0
    if x_lo <= 0:
        # From 0 to a tiny x the response is 1: the integral of x^p is x^(p+1) / (p+1) (p >= 0 here).
        x_lo = 1e-9
        total += x_lo ** (power + 1) / (power + 1)
    upper = min(x_hi, _TAIL_X)
    if upper > x_lo:
        u_lo, u_hi = math.log(x_lo), math.log(upper)
        panels = max(1, int(math.ceil((u_hi - u_lo) / math.log(10.0) * _PANELS_PER_DECADE)))
        edges = np.linspace(u_lo, u_hi, panels + 1)
        half = 0.5 * np.diff(edges)
        mid = 0.5 * (edges[1:] + edges[:-1])
        u = (mid[:, None] + half[:, None] * _GL_NODES[None, :]).ravel()
        x = np.exp(u)
        values = x ** (power + 1) * _power_response_normalised(x, b, a)
        total += float(np.sum(values.reshape(panels, -1) * _GL_WEIGHTS[None, :] * half[:, None]))
    if x_hi > _TAIL_X:
        lead = (b[-1] / a[0]) ** 2  # |H|^2 -> (b0 / a_n)^2 x^(-2n) for large x
        exponent = power - 2 * order + 1
        top = 0.0 if not math.isfinite(x_hi) else x_hi ** exponent
        total += lead * (top - _TAIL_X ** exponent) / exponent
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
