"""Pulse arithmetic shared by the bundled feature extractors.

Everything here works on a :class:`Pulse`: the excursion of one event from its baseline, multiplied by the
event's polarity so the pulse always points up, over the event plus some context on each side. Times are
measured in samples inside and converted to seconds at the end; level crossings are interpolated linearly
between samples. Every function returns NaN (never raises) when its quantity is undefined: a pulse that
never returns below a level inside the available context, too few samples to fit, a degenerate fit.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np
from impactline import EventWindow, FilterInfo, Param
from scipy.optimize import brentq, leastsq
from scipy.signal import find_peaks
from scipy.special import erf

__all__ = [
    "GAUSSIAN_RISE_TIME_FC",
    "EDGE_CONTEXT",
    "symmetric_context",
    "Pulse",
    "make_pulse",
    "crossing_before",
    "crossing_after",
    "peak_time_s",
    "rise_time_s",
    "fwhm_s",
    "extrapolated_duration_s",
    "decay_time_constant_s",
    "subpeak_times_s",
    "baseline_span",
    "gaussian_sigma_s",
    "gaussian_peak_fraction",
    "rectangle_width_s",
    "effective_bandwidth",
]

#: 10-90 % step-response rise time times the -3 dB frequency of a Gaussian low-pass filter:
#: 2 sqrt(2) erfinv(0.8) sqrt(ln 2) / (2 pi) = 0.33962 (computed from the erf step response; the
#: project's reference table lists 0.3396).
GAUSSIAN_RISE_TIME_FC = 0.3396

#: Context an extractor follows edges and tails into, shared by the pulse-based extractors.
EDGE_CONTEXT = Param(1e-3, unit="s", low=0,
                     doc="how far outside the event the pulse's edges and tail are followed")

#: Most points handed to the iterative exponential fit; more are thinned evenly (the closed-form fit
#: before it uses them all).
MAX_FIT_POINTS = 48


def symmetric_context(seconds: float, sample_rate_hz: float) -> tuple[int, int]:
    """``(n, n)``: the samples covering ``seconds`` (rounded up) on each side of an event."""
    n = math.ceil(seconds * sample_rate_hz)
    return (n, n)


@dataclass(frozen=True)
class Pulse:
    """One event as an upward pulse over its context.

    Parameters
    ----------
    a : ndarray
        ``polarity * (signal - baseline)``, A, over the event and the context kept.
    start, end : int
        Event bounds as indices into ``a`` (``end`` exclusive).
    peak : int
        Index into ``a`` of the largest sample inside the event.
    amplitude : float
        Reference level the fractions (10 %, 50 %, 90 %...) are taken of, A (always > 0): the peak
        sample ``a[peak]``, or the plateau level (see :func:`make_pulse`).
    sample_rate_hz : float
        Sampling rate, Hz.
    """

    a: np.ndarray
    start: int
    end: int
    peak: int
    amplitude: float
    sample_rate_hz: float


def make_pulse(window: EventWindow, pre: int, post: int, reference: str = "peak") -> Pulse | None:
    """Cut ``pre``/``post`` samples of context around the event and turn it into an upward pulse.

    Only the extractor's own context is kept (the runner may hand over more for other extractors), so a
    feature never depends on what else is in the pipeline.

    ``reference`` chooses the level that fractions are taken of: ``"peak"``, the largest event sample
    (natural for spikes), or ``"plateau"``, the median of the event samples above half the peak (for
    step-like pulses: insensitive to a filter's overshoot and to the upward bias of the largest of many
    noisy samples). A 4-pole Bessel step overshoots by 0.84 % (REFERENCES.md), which lengthens a
    peak-referenced 10-90 % rise time by about 2 %.

    Returns
    -------
    Pulse or None
        None when the event is empty, holds no finite sample, or never leaves the baseline in the
        direction of its polarity.
    """
    signal = np.asarray(window.signal, dtype=np.float64)
    start, end = int(window.start), int(window.end)
    if not 0 <= start < end <= signal.size:
        return None
    lo = max(0, start - max(int(pre), 0))
    hi = min(signal.size, end + max(int(post), 0))
    sign = -1.0 if window.event.polarity < 0 else 1.0
    a = sign * (signal[lo:hi] - window.event.baseline_A)
    inside = a[start - lo:end - lo]
    if not np.isfinite(inside).any():
        return None
    peak = int(np.argmax(inside))
    if math.isnan(inside[peak]):  # argmax stops at the first NaN; only then pay for nanargmax
        peak = int(np.nanargmax(inside))
    amplitude = float(inside[peak])
    if reference == "plateau" and amplitude > 0:
        amplitude = float(np.median(inside[inside >= 0.5 * amplitude]))
    if not (amplitude > 0 and math.isfinite(amplitude)):
        return None
    return Pulse(a, start - lo, end - lo, peak + start - lo, amplitude, float(window.sample_rate_hz))


def crossing_before(p: Pulse, fraction: float) -> float:
    """Fractional index where the pulse last rises through ``fraction * amplitude`` before its peak.

    Walks back from the peak to the first sample below the level and interpolates linearly between it
    and the next sample. NaN when the pulse does not drop below the level inside the context.
    """
    level = fraction * p.amplitude
    below = np.flatnonzero(p.a[:p.peak] < level)
    if below.size == 0:
        return math.nan
    j = int(below[-1])
    y0, y1 = p.a[j], p.a[j + 1]
    return j + (level - y0) / (y1 - y0)


def crossing_after(p: Pulse, fraction: float) -> float:
    """Fractional index where the pulse first falls through ``fraction * amplitude`` after its peak.

    NaN when the pulse does not drop below the level inside the context.
    """
    level = fraction * p.amplitude
    below = np.flatnonzero(p.a[p.peak + 1:] < level)
    if below.size == 0:
        return math.nan
    k = int(below[0]) + p.peak + 1
    y0, y1 = p.a[k - 1], p.a[k]
    return (k - 1) + (y0 - level) / (y0 - y1)


def peak_time_s(p: Pulse) -> float:
    """Time of the peak after the event start, s, refined by the vertex of a parabola through 3 samples.

    The refinement moves the time by at most half a sample, so a peak on the first event sample can come
    out up to half a sample before the start.
    """
    i = p.peak
    offset = 0.0
    if 0 < i < p.a.size - 1:
        y0, y1, y2 = p.a[i - 1], p.a[i], p.a[i + 1]
        curvature = y0 - 2.0 * y1 + y2
        if curvature < 0:
            offset = 0.5 * (y0 - y2) / curvature
    return (i + offset - p.start) / p.sample_rate_hz


def rise_time_s(p: Pulse, low: float = 0.1, high: float = 0.9) -> float:
    """Rise time between ``low`` and ``high`` fractions of the peak (default 10-90 %), s.

    The reference level is the peak sample, so a step response with overshoot is timed to 90 % of its
    overshoot, not of its settled value.
    """
    return (crossing_before(p, high) - crossing_before(p, low)) / p.sample_rate_hz


def fwhm_s(p: Pulse) -> float:
    """Full width at half maximum, s (interpolated crossings of 50 % of the peak on both sides)."""
    return (crossing_after(p, 0.5) - crossing_before(p, 0.5)) / p.sample_rate_hz


def _zero_of_edge(p: Pulse, lo_index: float, hi_index: float, low: float, high: float, rising: bool) -> float:
    """Index where a straight line through one edge reaches the baseline.

    The line is the least-squares fit to the samples between the two level crossings ``lo_index <
    hi_index`` when there are at least three of them, else the line through the two interpolated
    crossings (levels ``low`` and ``high`` fractions of the peak). NaN when the slope has the wrong sign.
    """
    if not (math.isfinite(lo_index) and math.isfinite(hi_index) and lo_index < hi_index):
        return math.nan
    first, last = math.floor(lo_index) + 1, math.floor(hi_index)
    if last - first + 1 >= 3:
        t = np.arange(first, last + 1, dtype=np.float64)
        y = p.a[first:last + 1]
        tm, ym = t.mean(), y.mean()
        dt = t - tm
        slope = float(dt @ (y - ym)) / float(dt @ dt)
    else:
        tm, ym = lo_index, low * p.amplitude
        slope = (high - low) * p.amplitude / (hi_index - lo_index)
    if not (math.isfinite(slope) and (slope > 0 if rising else slope < 0)):
        return math.nan
    return tm - ym / slope


def extrapolated_duration_s(p: Pulse, low: float = 0.2, high: float = 0.8) -> float:
    """Duration between the baseline crossings of straight lines fitted to the rising and falling edges, s.

    Each edge is fitted between ``low`` and ``high`` fractions of the peak and extended to zero
    excursion; this removes the rounding of the corners by the filter. NaN when an edge is missing, an
    edge slope has the wrong sign, or the two zeros are not in order.
    """
    rise_zero = _zero_of_edge(p, crossing_before(p, low), crossing_before(p, high), low, high, rising=True)
    fall_zero = _zero_of_edge(p, crossing_after(p, high), crossing_after(p, low), high, low, rising=False)
    duration = (fall_zero - rise_zero) / p.sample_rate_hz
    return duration if duration > 0 else math.nan


def _exp_residual(params: np.ndarray, t: np.ndarray, y: np.ndarray) -> np.ndarray:
    return params[0] * np.exp(-t / params[1]) - y


def _exp_jacobian_rows(params: np.ndarray, t: np.ndarray, y: np.ndarray) -> np.ndarray:
    # One row per parameter (leastsq col_deriv=True): no transposed copy per iteration.
    amplitude, tau = params
    e = np.exp(-t / tau)
    return np.array((e, (amplitude / (tau * tau)) * t * e))


def decay_time_constant_s(p: Pulse, floor_A: float, upper: float = 0.9, refine: bool = True) -> float:
    """Time constant of an exponential fitted to the falling part of the pulse, s.

    The falling part runs from where the pulse first drops below ``upper * amplitude`` after the peak
    (skipping the rounded top) to where it first drops below ``floor_A``. A straight line is fitted to
    ``log(a)`` there by least squares weighted by ``a**2`` (the weight that turns the constant noise of
    ``a`` into the noise of ``log a``), giving ``tau0``. With ``refine``, ``A exp(-t/tau)`` is then fitted
    to ``a`` itself by Levenberg-Marquardt (:func:`scipy.optimize.leastsq`, the MINPACK routine behind
    :func:`scipy.optimize.curve_fit`, called directly with the analytic Jacobian: four times less
    overhead per event), from the start of the falling part to as far
    again beyond the floor crossing (so the tail below the floor also counts), thinned to at most
    ``MAX_FIT_POINTS`` points; the log-linear ``tau0`` is kept when that fit fails or wanders off.

    Returns NaN when fewer than three samples lie in the falling part or the log-linear slope is not
    negative.
    """
    a, amp = p.a, p.amplitude
    if not (math.isfinite(floor_A) and 0 < floor_A < upper * amp):
        return math.nan
    tail = a[p.peak:]
    started = np.flatnonzero(tail <= upper * amp)
    if started.size == 0:
        return math.nan
    i0 = p.peak + int(started[0])
    ended = np.flatnonzero(a[i0:] < floor_A)
    i1 = i0 + int(ended[0]) if ended.size else a.size
    y = a[i0:i1]
    if y.size < 3:
        return math.nan
    t = np.arange(y.size, dtype=np.float64)
    w = y * y
    sw = w.sum()
    tm = (w @ t) / sw
    ly = np.log(y)
    lm = (w @ ly) / sw
    dt = t - tm
    slope = float((w * dt) @ (ly - lm)) / float((w * dt) @ dt)
    if not (math.isfinite(slope) and slope < 0):
        return math.nan
    tau0 = -1.0 / slope
    if not refine:
        return tau0 / p.sample_rate_hz
    i2 = min(a.size, i1 + (i1 - i0))
    idx = np.arange(i0, i2)
    if idx.size > MAX_FIT_POINTS:
        idx = np.unique(np.linspace(i0, i2 - 1, MAX_FIT_POINTS).round().astype(np.int64))
    tf = (idx - i0).astype(np.float64)
    # Fitting y / A0 keeps both parameters of order one (A0 in amperes is ~1e-10): fewer iterations.
    scale = math.exp(lm - slope * tm)
    yf = a[idx] / scale
    # Tolerances of 1e-6: a fitted time constant is noise-limited far above that; stopping early saves
    # iterations. A fit that is not done after 40 evaluations is not an exponential.
    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        popt, status = leastsq(_exp_residual, (1.0, tau0), args=(tf, yf), Dfun=_exp_jacobian_rows,
                               col_deriv=True, maxfev=40, ftol=1e-6, xtol=1e-6)
    tau = float(popt[1]) if status in (1, 2, 3, 4) else math.nan
    # The iterative fit may run away on a tail that is not exponential; the closed form is then better.
    if not (math.isfinite(tau) and 0 < tau < 10.0 * max(tau0, i2 - i0)):
        tau = tau0
    return tau / p.sample_rate_hz


def subpeak_times_s(p: Pulse, prominence_A: float, min_distance: int, height_A: float = 0.0) -> np.ndarray:
    """Times after the event start of the resolved maxima inside the event, s (ascending).

    Uses :func:`scipy.signal.find_peaks` with ``prominence_A``, ``height_A`` (above the baseline) and
    ``min_distance`` (samples) on the event
    plus one neighbouring sample each side (the baseline, 0, where the recording ends), so a maximum on
    the first or last event sample can count. The highest maximum is included.
    """
    lo = p.start - 1
    hi = p.end + 1
    seg = p.a[max(lo, 0):min(hi, p.a.size)]
    if lo < 0:
        seg = np.concatenate(([0.0], seg))
    if hi > p.a.size:
        seg = np.concatenate((seg, [0.0]))
    seg = np.nan_to_num(seg, nan=0.0)
    peaks, _ = find_peaks(seg, height=height_A, prominence=prominence_A, distance=max(int(min_distance), 1))
    return (peaks - 1) / p.sample_rate_hz


def baseline_span(p: Pulse) -> tuple[int, int]:
    """Indices ``[i, j)`` of the pulse out to where it first touches the baseline on each side.

    Starts from the event bounds and walks outward to the first sample at or below zero excursion (that
    sample excluded), or to the edge of the context.
    """
    left = np.flatnonzero(p.a[:p.start] <= 0)
    right = np.flatnonzero(p.a[p.end:] <= 0)
    i = int(left[-1]) + 1 if left.size else 0
    j = p.end + int(right[0]) if right.size else p.a.size
    return i, j


def gaussian_sigma_s(cutoff_hz: float) -> float:
    """Standard deviation of the impulse response of a Gaussian filter with -3 dB frequency ``cutoff_hz``, s.

    ``sigma = sqrt(ln 2) / (2 pi fc)`` (the Gaussian transfer function exp(-(f/fc)^2 ln2 / 2)).
    """
    return math.sqrt(math.log(2.0)) / (2.0 * math.pi * cutoff_hz)


def gaussian_peak_fraction(width_s: float | np.ndarray, cutoff_hz: float) -> float | np.ndarray:
    """Fraction of a rectangular pulse's amplitude a Gaussian filter keeps at the pulse centre.

    ``erf(w / (2 sqrt(2) sigma))`` with ``sigma`` from :func:`gaussian_sigma_s`: the filtered pulse at its
    centre is the filter's step response at ``w/2`` minus that at ``-w/2``.

    Parameters
    ----------
    width_s : float or ndarray
        Duration ``w`` of the rectangular pulse, s.
    cutoff_hz : float
        -3 dB frequency of the filter, Hz.
    """
    return erf(np.asarray(width_s) / (2.0 * math.sqrt(2.0) * gaussian_sigma_s(cutoff_hz)))[()]


def rectangle_width_s(area_over_peak_s: float, cutoff_hz: float) -> float:
    """Width of the rectangular pulse that, through a Gaussian filter, gives this area-to-peak ratio, s.

    A filter with unit DC gain keeps a pulse's area ``A w`` and leaves ``A erf(w / (2 sqrt 2 sigma))`` at
    its peak, so the ratio ``R = w / erf(w / (2 sqrt 2 sigma))`` grows monotonically from ``sqrt(2 pi)
    sigma`` (an impulse: the filter's own response) with ``w``; this inverts it. NaN when ``R`` is not
    above that limit (the pulse is no wider than the filter's impulse response, so its width is lost).
    """
    scale = 2.0 * math.sqrt(2.0) * gaussian_sigma_s(cutoff_hz)
    r = area_over_peak_s / scale
    limit = math.sqrt(math.pi) / 2.0  # lim x->0 of x / erf(x)
    if not (math.isfinite(r) and r > limit):
        return math.nan
    # x / erf(x) = r has its root in (0, r]: x / erf(x) >= x for x > 0.
    x = brentq(lambda x: x - r * math.erf(x), 1e-12, r + 1.0, xtol=1e-12)
    return x * scale


def effective_bandwidth(info: FilterInfo) -> tuple[float, float]:
    """Return ``(cutoff_hz, rise_time_s)`` of the filter chain, filling one from the other.

    A missing value is derived with the Gaussian relation ``rise_time * fc = 0.3396`` (a chain of
    low-pass filters tends to a Gaussian response). NaN for both when neither is known.
    """
    fc = info.cutoff_hz if info.cutoff_hz and info.cutoff_hz > 0 else math.nan
    tr = info.rise_time_s if info.rise_time_s and info.rise_time_s > 0 else math.nan
    if math.isnan(fc) and not math.isnan(tr):
        fc = GAUSSIAN_RISE_TIME_FC / tr
    if math.isnan(tr) and not math.isnan(fc):
        tr = GAUSSIAN_RISE_TIME_FC / fc
    return fc, tr
