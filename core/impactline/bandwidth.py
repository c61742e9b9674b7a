"""Bandwidth, rise time and delay of filters and of filter chains, computed numerically.

A filter stage describes itself with :class:`impactline.FilterInfo` (``cutoff_hz``, ``rise_time_s``,
``delay_s``). For a chain of filters these do not simply add up; this module computes the chain's figures
from the stages themselves:

* the -3 dB point from the product of the stages' magnitude responses (a root find on a fine grid),
* the 10-90 % rise time from a unit step pushed through the real stages (``start``/``process``/``finish``),
* the delay as the sum of the stages' delays.

The same helpers serve single filters (a filter's ``info()`` uses them on itself), so every figure a stage
reports is measured from the digital filter applied at the actual sample rate, not taken from a formula.

Public API
----------
cascade_info            FilterInfo of a chain of filter stages
explain_cascade         the same plus notes on stages left out (non-linear, not a low-pass)
gaussian_cascade_cutoff 1/fc^2 = sum 1/fi^2 (exact for Gaussian filters; approximate for Bessel)
minus_3db_frequency     first frequency where a magnitude-squared response falls to half its DC value
rise_time_10_90         10-90 % rise time of a sampled step response
step_response           a unit step through a chain of stages
run_filters             push a signal through a chain of stages, optionally in chunks
pulse_shape_figures     half-height crossing, width and tail asymmetry of a band-limited pulse
leading_edge            first peak of an event and the sub-sample instant its edge crosses half of it
PulseTiming             half-height lead of a pulse's band-limited edge over its start, from a chain's step response
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import NamedTuple

import numpy as np
from scipy.optimize import brentq

from .stages import Filter, FilterInfo
from .testing import run_filter

__all__ = [
    "CascadeReport",
    "PulseTiming",
    "cascade_info",
    "explain_cascade",
    "gaussian_cascade_cutoff",
    "LeadingEdge",
    "leading_edge",
    "minus_3db_frequency",
    "pulse_shape_figures",
    "rise_time_10_90",
    "run_filters",
    "step_response",
]

#: Largest step simulation tried (samples on each side of the step) before giving up on settling.
_MAX_SETTLE_SAMPLES = 1 << 23


def gaussian_cascade_cutoff(*cutoffs_hz: float) -> float:
    """-3 dB frequency of cascaded Gaussian low-pass filters, Hz.

    ``1/fc^2 = sum(1/fi^2)``: exact for Gaussian filters, a good approximation for Bessel filters of
    order 4 and more (Colquhoun & Sigworth 1995, "Fitting and statistical analysis of single-channel
    records", in Single-Channel Recording, 2nd ed.).

    Parameters
    ----------
    *cutoffs_hz : float
        -3 dB frequencies of the filters, Hz (each > 0).

    Returns
    -------
    float
        -3 dB frequency of the cascade, Hz.
    """
    if not cutoffs_hz:
        raise ValueError("gaussian_cascade_cutoff() needs at least one cutoff frequency")
    values = np.asarray(cutoffs_hz, dtype=float)
    if not np.all(np.isfinite(values)) or np.any(values <= 0):
        raise ValueError(f"cutoff frequencies must be finite and > 0 Hz, got {list(cutoffs_hz)}")
    return float(1.0 / math.sqrt(np.sum(1.0 / values**2)))


def minus_3db_frequency(magnitude_squared: Callable[[np.ndarray], np.ndarray], sample_rate_hz: float,
                        *, points: int = 4096) -> float | None:
    """First frequency where a low-pass response falls to half (-3 dB) of its DC power gain.

    Parameters
    ----------
    magnitude_squared : callable
        ``f(freqs_hz) -> |H(f)|^2`` (array in, array out).
    sample_rate_hz : float
        Sampling rate, Hz; the search runs from 1e-7 fs to the Nyquist frequency fs/2.
    points : int
        Size of the logarithmic search grid before the root is refined with Brent's method.

    Returns
    -------
    float or None
        The -3 dB frequency in Hz (relative precision about 1e-12), or None when the response stays
        above -3 dB up to Nyquist (not a low-pass at this sample rate).
    """
    nyquist = 0.5 * sample_rate_hz
    reference = float(np.asarray(magnitude_squared(np.array([0.0])))[0])
    if not reference > 0:
        raise ValueError("the response has no gain at DC; a -3 dB point of a low-pass is not defined")
    half = 0.5 * reference
    grid = np.geomspace(1e-7 * sample_rate_hz, nyquist, points)
    values = np.asarray(magnitude_squared(grid), dtype=float)
    below = np.flatnonzero(values < half)
    if below.size == 0:
        return None
    i = int(below[0])
    lo = 0.0 if i == 0 else grid[i - 1]

    def excess(f: float) -> float:
        return float(np.asarray(magnitude_squared(np.array([f])))[0]) - half

    return float(brentq(excess, lo, grid[i], xtol=1e-13 * grid[i], rtol=1e-14, maxiter=200))


def rise_time_10_90(y: np.ndarray, sample_rate_hz: float) -> float | None:
    """10-90 % rise time of a sampled step response, s.

    The levels are taken between the first and the last sample (the response must start and end
    settled); each crossing time is the first upward crossing, interpolated linearly between samples.

    Parameters
    ----------
    y : ndarray
        Step response (a falling step is handled by symmetry).
    sample_rate_hz : float
        Sampling rate, Hz.

    Returns
    -------
    float or None
        Rise time in s, or None when the response has no step (first and last sample equal).
    """
    y = np.asarray(y, dtype=float)
    start, end = y[0], y[-1]
    if end == start:
        return None
    u = (y - start) / (end - start)
    t10 = _first_crossing(u, 0.1)
    t90 = _first_crossing(u, 0.9)
    return float((t90 - t10) / sample_rate_hz)


def _first_crossing(u: np.ndarray, level: float) -> float:
    i = int(np.flatnonzero(u >= level)[0])
    if i == 0:
        return 0.0
    return (i - 1) + (level - u[i - 1]) / (u[i] - u[i - 1])


def run_filters(filters: Sequence[Filter], x: np.ndarray, sample_rate_hz: float,
                chunk_samples: int | None = None) -> np.ndarray:
    """Push a signal through a chain of filter stages with their streaming methods.

    Parameters
    ----------
    filters : sequence of Filter
        Stages applied in order, each with a fresh state.
    x : ndarray
        Input signal, A.
    sample_rate_hz : float
        Sampling rate, Hz.
    chunk_samples : int, optional
        Feed the signal in chunks of this many samples (default: one chunk, the whole-file result).

    Returns
    -------
    ndarray
        Output of the last stage, aligned with ``x`` (same length).
    """
    y = np.asarray(x, dtype=np.float64)
    for stage in filters:
        y = run_filter(stage, y, sample_rate_hz, chunk_samples)
    return y


def step_response(filters: Sequence[Filter], sample_rate_hz: float,
                  settle_hz: float | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Response of a chain of stages to a unit step, long enough on both sides to settle.

    The input is 0 up to the step and 1 from it on; the simulation length is doubled until the output is
    settled (within 1e-9) at both ends, so zero-phase stages (which respond before the step) are covered.

    Parameters
    ----------
    filters : sequence of Filter
        The chain.
    sample_rate_hz : float
        Sampling rate, Hz.
    settle_hz : float, optional
        A frequency scale of the chain (e.g. its cutoff) to choose the first simulation length
        (16 periods on each side).

    Returns
    -------
    t : ndarray
        Time relative to the step (the first sample equal to 1 in the input), s.
    y : ndarray
        The chain's output.
    """
    half = 256 if settle_hz is None else max(256, math.ceil(16.0 * sample_rate_hz / settle_hz))
    while True:
        x = np.concatenate([np.zeros(half), np.ones(half)])
        y = run_filters(filters, x, sample_rate_hz)
        if (abs(y[0]) < 1e-9 and abs(y[-1] - 1.0) < 1e-9) or half >= _MAX_SETTLE_SAMPLES:
            break
        half *= 2
    t = (np.arange(2 * half) - half) / sample_rate_hz
    return t, y


@dataclass(frozen=True)
class CascadeReport:
    """Figures of a filter chain and how they were obtained.

    Parameters
    ----------
    info : FilterInfo
        Effective -3 dB frequency (Hz), 10-90 % rise time (s) and total delay (s) of the chain.
    bandwidth_stages : list of str
        Names of the stages whose responses set the -3 dB point and rise time.
    notes : list of str
        One line per stage left out of the bandwidth and rise time, with the reason.
    """

    info: FilterInfo
    bandwidth_stages: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)


def explain_cascade(filters: Sequence[Filter], sample_rate_hz: float) -> CascadeReport:
    """Effective bandwidth, rise time and delay of a chain of filters, with notes.

    Stages whose ``frequency_response`` is None (non-linear, e.g. wavelet denoising or a running-median
    baseline) and linear stages that are not low-pass filters (``info().cutoff_hz`` is None, e.g. a mains
    notch, whose notches would otherwise be mistaken for the -3 dB point) are left out of the -3 dB
    point and the rise time, each with a note. Delays of all stages are summed.

    Parameters
    ----------
    filters : sequence of Filter
        The chain, in order.
    sample_rate_hz : float
        Sampling rate, Hz.

    Returns
    -------
    CascadeReport
        ``info.cutoff_hz`` is the first frequency where the product of the low-pass stages' |H(f)|^2
        falls to half its DC value; ``info.rise_time_s`` is measured on a step pushed through those
        stages; ``info.delay_s`` is the sum of every stage's delay.
    """
    notes: list[str] = []
    lowpass: list[Filter] = []
    delay = 0.0
    probe = np.array([0.0])
    for stage in filters:
        stage_info = stage.info(sample_rate_hz)
        delay += stage_info.delay_s
        label = stage.name or type(stage).__name__
        if stage.frequency_response(probe, sample_rate_hz) is None:
            notes.append(f"{label}: no frequency response (not a linear filter); "
                         "left out of the bandwidth and rise time")
        elif stage_info.cutoff_hz is None:
            notes.append(f"{label}: not a low-pass filter; left out of the bandwidth and rise time")
        else:
            lowpass.append(stage)
    if not lowpass:
        return CascadeReport(FilterInfo(None, None, delay), [], notes)

    def magnitude_squared(freqs: np.ndarray) -> np.ndarray:
        total = np.ones(len(freqs))
        for stage in lowpass:
            total *= np.abs(stage.frequency_response(freqs, sample_rate_hz)) ** 2
        return total

    cutoff = minus_3db_frequency(magnitude_squared, sample_rate_hz)
    _, y = step_response(lowpass, sample_rate_hz, settle_hz=cutoff)
    rise = rise_time_10_90(y, sample_rate_hz)
    names = [s.name or type(s).__name__ for s in lowpass]
    return CascadeReport(FilterInfo(cutoff, rise, delay), names, notes)


def cascade_info(filters: Sequence[Filter], sample_rate_hz: float) -> FilterInfo:
    """Effective -3 dB frequency, 10-90 % rise time and total delay of a chain of filters.

    See :func:`explain_cascade` (which also says which stages were left out and why).

    Parameters
    ----------
    filters : sequence of Filter
        The chain, in order.
    sample_rate_hz : float
        Sampling rate, Hz.

    Returns
    -------
    FilterInfo
        ``cutoff_hz`` (Hz), ``rise_time_s`` (s), ``delay_s`` (s) of the chain.
    """
    return explain_cascade(filters, sample_rate_hz).info


# Time constants, in units of the chain's 10-90 % rise time, of the exponential decays tabulated by PulseTiming.
# Beyond the last one the lead is scaled as 1 / width. That is approximate: through a Gaussian filter of
# standard deviation sigma (rise time 2.56 sigma) an exponential decay crosses half its peak 0.17 sigma early at
# tau = 10 sigma and 0.028 sigma early at tau = 100 sigma (exponentially modified Gaussian, computed numerically
# here), falling a little slower than 1 / tau. Measured: a 2 ms decay at 1 MHz through a 15 kHz Bessel (86 rise
# times) comes out 0.02 samples late.
_DECAY_RISES = np.geomspace(0.05, 40.0, 80)


def _crossing_up(y: np.ndarray, level: float, i: int) -> float:
    """Fractional index of the upward crossing of ``level`` between samples i - 1 and i (y[i - 1] < level <= y[i])."""
    return i - 1 + float((level - y[i - 1]) / (y[i] - y[i - 1]))


def _crossing_down(y: np.ndarray, level: float, j: int) -> float:
    """Fractional index of the downward crossing of ``level`` between samples j - 1 and j (y[j - 1] >= level > y[j])."""
    return j - 1 + float((y[j - 1] - level) / (y[j - 1] - y[j]))


def _first_below(y: np.ndarray, level: float, start: int) -> int:
    """Index of the first sample of ``y`` from ``start`` on that is below ``level``; -1 when there is none.

    Searched in windows growing fourfold from 64 samples, so finding a crossing near ``start`` costs the
    same in a long event (a step of many milliseconds) as in a short one.
    """
    lo, width = start, 64
    while lo < y.size:
        hi = min(lo + width, y.size)
        below = y[lo:hi] < level
        k = int(np.argmax(below))   # the first True, when there is one
        if below[k]:
            return lo + k
        lo, width = hi, 4 * width
    return -1


def pulse_shape_figures(y: np.ndarray, peak_at: int) -> tuple[float, float, float] | None:
    """Leading half-height crossing, width at half height and tail asymmetry of the pulse peaking at ``peak_at``.

    ``y`` is the band-limited pulse (polarity applied, baseline 0). The crossings of half the peak are the first
    sample that reaches it and the first downward one after the peak; the asymmetry is (fall time from 50 % to
    25 % after the peak - rise time from 25 % to 50 % before it) / width at half height: 0 for a symmetric
    response (a rectangle through a zero-phase filter), about 1 for a long exponential decay.

    Parameters
    ----------
    y : ndarray
        The pulse, A (any unit), from before its rise on.
    peak_at : int
        Index of the peak to measure (the first peak of a burst, say).

    Returns
    -------
    tuple of float or None
        (rising half-height crossing, samples; width at half height, samples, inf when ``y`` does not fall back
        below half; asymmetry, nan when a 25 % crossing is missing), or None when the peak is not positive.
    """
    top = float(y[peak_at])
    if not top > 0:
        return None
    half, quarter = 0.5 * top, 0.25 * top
    # argmax of a boolean array is its first True (or 0 when there is none, checked where it can happen):
    # it runs once per event, where index arrays from flatnonzero cost more than the search.
    first = int(np.argmax(y[:peak_at + 1] >= half))
    low_before = y[:first] < quarter
    last_low = first - 1 - int(np.argmax(low_before[::-1])) if first else -1
    if last_low >= 0 and not low_before[last_low]:
        last_low = -1
    rise = _crossing_up(y, half, first) if first > 0 else 0.0
    j = _first_below(y, half, peak_at)
    if j < 0:
        return rise, math.inf, math.nan
    fall = _crossing_down(y, half, j)
    k = _first_below(y, quarter, j)
    if last_low < 0 or k < 0:
        return rise, fall - rise, math.nan
    rise_quarter = _crossing_up(y, quarter, last_low + 1)
    fall_quarter = _crossing_down(y, quarter, k)
    return rise, fall - rise, ((fall_quarter - fall) - (rise - rise_quarter)) / (fall - rise)


#: A peak of the leading edge is the running maximum once the signal has fallen this many noise sigmas below it.
EDGE_PEAK_DROP_SIGMAS = 4.0
#: Samples before the start searched for the half-height crossing by :func:`leading_edge`.
EDGE_LOOKBACK_SAMPLES = 4


class LeadingEdge(NamedTuple):
    """The first peak of an event and its leading edge (:func:`leading_edge`); positions in samples of ``y``."""

    peak_index: int
    """Index of the first peak."""
    crossing: float
    """Fractional index where the edge reaches half of the first peak."""
    width: float
    """Width at half height of the first peak, samples (inf when ``y`` stays above half after it)."""
    asymmetry: float
    """Tail asymmetry of the first peak (see :func:`pulse_shape_figures`); nan when undefined."""


#: Samples after an event's start that :func:`leading_edge` first looks at as a Python list: its searches
#: (first peak, half and quarter crossings) usually end within them, and a short loop over a list costs
#: less than the dozen numpy calls on small slices it replaces (events are timed one by one).
_EDGE_LIST_SAMPLES = 160


def _leading_edge_list(y: np.ndarray, start: int, drop: float, lookback: int) -> LeadingEdge | None | bool:
    """:func:`leading_edge` on the first samples of ``y`` as a list; False when a search needs more samples.

    The same steps as the numpy path, on the same float64 values, so the same result whenever it finishes.
    """
    base = max(0, start - lookback - 1)
    w = y[base:start + _EDGE_LIST_SAMPLES].tolist()
    complete = base + len(w) == y.size        # the list reaches the end of y: a failed search is final
    off = start - base
    top, top_at, peak = -math.inf, -1, -1
    for i in range(off, len(w)):
        value = w[i]
        if value > top:
            top, top_at = value, i
        elif top - value >= drop:
            peak = top_at
            break
        elif value != value:                   # NaN: numpy's running maximum propagates it
            return False
    if peak < 0:
        if not complete or top_at < 0:
            return False
        peak = top_at                          # no fall at all: the largest value (its first occurrence)
    half = 0.5 * w[peak]
    lo, floor = start, max(0, start - lookback)
    while lo > floor and w[lo - 1 - base] >= half:
        lo -= 1
    lo = start if lo > 0 and w[lo - 1 - base] >= half else max(lo - 1, 0)
    # pulse_shape_figures(y[lo:], peak - (lo - base)) on the list, indices relative to s = lo - base.
    s = lo - base
    top = w[peak]
    if not top > 0:
        return None
    quarter = 0.25 * top
    first = next(i for i in range(s, peak + 1) if w[i] >= half)
    last_low = next((i for i in range(first - 1, s - 1, -1) if w[i] < quarter), -1)
    rise = (first - 1 - s + (half - w[first - 1]) / (w[first] - w[first - 1])) if first > s else 0.0
    j = next((i for i in range(peak, len(w)) if w[i] < half), -1)
    if j < 0:
        return (LeadingEdge(peak - off + start, lo + rise, math.inf, math.nan) if complete else False)
    fall = j - 1 - s + (w[j - 1] - half) / (w[j - 1] - w[j])
    k = next((i for i in range(j, len(w)) if w[i] < quarter), -1)
    if k < 0 and not complete:
        return False
    if last_low < 0 or k < 0:
        return LeadingEdge(peak - off + start, lo + rise, fall - rise, math.nan)
    rise_quarter = last_low - s + (quarter - w[last_low]) / (w[last_low + 1] - w[last_low])
    fall_quarter = k - 1 - s + (w[k - 1] - quarter) / (w[k - 1] - w[k])
    return LeadingEdge(peak - off + start, lo + rise, fall - rise,
                       ((fall_quarter - fall) - (rise - rise_quarter)) / (fall - rise))


def leading_edge(y: np.ndarray, noise_rms: float, start: int = 0, drop_sigmas: float = EDGE_PEAK_DROP_SIGMAS,
                 lookback: int = EDGE_LOOKBACK_SAMPLES) -> LeadingEdge | None:
    """First peak of an event and the sub-sample instant its leading edge crosses half of that peak.

    The first peak, not the largest, is the reference, so a burst whose later sub-spikes are higher is
    placed at its first one: it is the running maximum of ``y[start:]`` at the first point where the signal
    has fallen ``drop_sigmas`` noise sigmas below it (the largest value of ``y[start:]`` when it never does).
    The crossing is the first sample from ``start`` on that reaches half of the peak, interpolated linearly
    with the sample before it (the 50 % reference level instant of a transition, IEEE Std 181-2011; from
    memory). When ``y[start]`` is already above half (a detector threshold above half of a small peak) the
    crossing is searched backward, through the samples before ``start`` that are still above half, to the
    last upward crossing, at most ``lookback`` samples back; with ``start = 0`` the crossing is then 0. The
    result therefore does not depend on which sample of the edge a threshold crossed first, only on the
    waveform. When the signal is still above half ``lookback`` samples before the start, what lies before
    is not the baseline (an offset the baseline missed, the tail of an earlier event) and the edge is taken
    from ``start`` on, as with ``start = 0``.

    Parameters
    ----------
    y : ndarray, shape (n,)
        The event's excursion from its baseline with polarity applied (rising edge positive), A (any unit),
        optionally with context before the event.
    noise_rms : float
        Noise standard deviation, same unit as ``y``; 0 or less takes the largest value as the peak.
    start : int, optional
        Index of the event start in ``y`` (the detector's threshold crossing), default 0.
    drop_sigmas : float, optional
        Fall below the running maximum, in noise sigmas, that ends the first peak (default
        :data:`EDGE_PEAK_DROP_SIGMAS`).
    lookback : int, optional
        Most samples before ``start`` searched for the crossing (default :data:`EDGE_LOOKBACK_SAMPLES`).

    Returns
    -------
    LeadingEdge or None
        Peak index, half-height crossing (fractional index), width at half height (samples) and tail
        asymmetry, all in samples of ``y``; None when ``y[start:]`` is empty or the first peak is not positive.
    """
    y = np.asarray(y, dtype=np.float64)
    rising = y[start:]
    if not rising.size:
        return None
    peak_at = -1
    drop = drop_sigmas * noise_rms
    if noise_rms > 0 and drop > 0:
        quick = _leading_edge_list(y, start, drop, lookback)
        if quick is not False:
            return quick
    if noise_rms > 0:
        # The running maximum of a prefix is the prefix of the running maximum, so the first fall is looked
        # for in prefixes growing fourfold: a first peak near the start costs little in a long event.
        width = 64
        while peak_at < 0:
            head = rising[:width]
            fallen = np.maximum.accumulate(head) - head >= drop
            first_fall = int(np.argmax(fallen))   # the first True, when there is one
            if fallen[first_fall]:
                peak_at = int(np.argmax(head[:first_fall]))
            elif width >= rising.size:
                break
            width *= 4
    if peak_at < 0:
        peak_at = int(np.argmax(rising))
    half = 0.5 * float(rising[peak_at])
    # Walk back over context samples still above half, keeping one below it for the interpolation.
    lo, floor = start, max(0, start - lookback)
    while lo > floor and y[lo - 1] >= half:
        lo -= 1
    lo = start if lo > 0 and y[lo - 1] >= half else max(lo - 1, 0)
    figures = pulse_shape_figures(y[lo:], start + peak_at - lo)
    if figures is None:
        return None
    crossing, width, asymmetry = figures
    return LeadingEdge(start + peak_at, lo + crossing, width, asymmetry)


@dataclass(frozen=True)
class _PulseFamily:
    """One family of pulse shapes through a chain: width at half height (increasing), asymmetry and lead, s."""

    fwhm_s: np.ndarray
    asymmetry: np.ndarray
    lead_s: np.ndarray

    @classmethod
    def tabulate(cls, responses, origin: float, delay: float, fs: float) -> _PulseFamily:
        fwhm, asym, lead = [], [], []
        for y in responses:
            rise, width, a = pulse_shape_figures(y, int(np.argmax(y)))
            fwhm.append(width)
            asym.append(a)
            lead.append(rise - origin - delay)
        fwhm_arr = np.maximum.accumulate(np.asarray(fwhm))  # a slight ripple must not break the interpolation
        keep = np.concatenate(([True], np.diff(fwhm_arr) > 0))
        return cls(fwhm_arr[keep] / fs, np.asarray(asym)[keep], np.asarray(lead)[keep] / fs)

    def at(self, fwhm_s: float) -> tuple[float, float]:
        """(asymmetry, lead in s) at ``fwhm_s``, clamped to the table's ends."""
        return (float(np.interp(fwhm_s, self.fwhm_s, self.asymmetry)),
                float(np.interp(fwhm_s, self.fwhm_s, self.lead_s)))


@dataclass(frozen=True)
class PulseTiming:
    """Where the leading half-height crossing of a fast-rising pulse falls after a chain of filters.

    An event whose current jumps up at t0 reaches half of its first peak at t0 (the 50 % reference level
    instant of IEEE Std 181-2011; from memory). After the chain it does not: a pulse shorter than the chain's
    rise time becomes the chain's impulse response, whose half-height crossing comes before t0, and a current
    that decays while the chain rises peaks lower, so half of that lower peak is also crossed early. Two
    families bracket the shapes of collision events (sudden rise, then fall): rectangles of width w (blips) and
    exponential decays of time constant tau (spikes, sub-spikes of bursts). :meth:`from_filters` passes both
    through the chain's low-pass stages (a rectangle from their step response g as g(t) - g(t - w), a decay
    directly) and tabulates, against the width at half
    height of the response, its tail asymmetry (see :func:`pulse_shape_figures`) and the time from t0 to the
    leading half-height crossing minus the chain's total delay (the runner removes that delay from every time).
    :meth:`lead` places an observed pulse between the families by its asymmetry at its observed width.

    Parameters
    ----------
    rectangle : _PulseFamily
        Rectangles, widths 1 sample to about 6 rise times.
    decay : _PulseFamily
        Exponential decays, tau 0.05 to 40 rise times.
    step_lead_s : float
        The lead of a step, s: the step response's half-height delay minus the chain's DC delay (0 for
        zero-phase filters; a causal Bessel's step crosses half height slightly before its DC group delay).
    """

    rectangle: _PulseFamily
    decay: _PulseFamily
    step_lead_s: float

    @classmethod
    def from_filters(cls, filters: Sequence[Filter], sample_rate_hz: float) -> PulseTiming | None:
        """Tabulate the chain ``filters`` at ``sample_rate_hz`` (Hz); None when it holds no low-pass stage."""
        report = explain_cascade(filters, sample_rate_hz)
        if not report.bandwidth_stages or not report.info.rise_time_s:
            return None
        fs = sample_rate_hz
        rise = report.info.rise_time_s * fs
        lowpass = [stage for stage in filters if (stage.name or type(stage).__name__) in report.bandwidth_stages]
        _, g = step_response(lowpass, fs, settle_hz=report.info.cutoff_hz)
        n0 = len(g) // 2   # the input step is 1 from sample n0 on
        longest = int(math.ceil(2.0 * _DECAY_RISES[-1] * rise)) + n0 + 8
        if longest > len(g):   # a long decay must fall to a quarter inside the simulated span
            g = np.concatenate([g, np.full(longest - len(g), g[-1])])
        delay = report.info.delay_s * fs
        # A sample averages the current over its own interval, so the input's step at sample n0 is a current step
        # half a sample earlier: times are counted from n0 - 0.5.
        origin = n0 - 0.5
        widths = np.arange(1, int(math.ceil(6.0 * rise)) + 2)
        rectangles = (g - np.concatenate([np.zeros(w), g[:-w]]) for w in widths)
        k = np.arange(len(g) - n0, dtype=float)

        def decay(tau: float) -> np.ndarray:
            # Sample averages of exp(-(t - t0) / tau) from t0 = n0 - 0.5 on, through the chain itself.
            x = np.concatenate([np.zeros(n0), tau * (np.exp(-k / tau) - np.exp(-(k + 1.0) / tau))])
            return run_filters(lowpass, x, fs)

        i = int(np.flatnonzero(g >= 0.5)[0])
        step = _crossing_up(g, 0.5, i) - origin - delay
        return cls(_PulseFamily.tabulate(rectangles, origin, delay, fs),
                   _PulseFamily.tabulate((decay(r * rise) for r in _DECAY_RISES), origin, delay, fs), step / fs)

    def lead(self, fwhm_s: float, asymmetry: float = math.nan) -> float:
        """Lead of the half-height crossing over the pulse start, s.

        Parameters
        ----------
        fwhm_s : float
            Observed width at half height, s (inf: the event does not fall back, a step).
        asymmetry : float
            Observed tail asymmetry (:func:`pulse_shape_figures`); nan when unknown, then the rectangle is taken.

        Returns
        -------
        float
            Half-height crossing minus pulse start minus the chain's delay, s (negative: the crossing is early).
        """
        if not math.isfinite(fwhm_s):
            return self.step_lead_s
        if fwhm_s > self.rectangle.fwhm_s[-1]:
            lead_rect = self.step_lead_s   # a rectangle this long is two separate steps
            asym_rect = 0.0
        else:
            asym_rect, lead_rect = self.rectangle.at(fwhm_s)
        asym_decay, lead_decay = self.decay.at(fwhm_s)
        if fwhm_s > self.decay.fwhm_s[-1]:
            lead_decay = self.step_lead_s + (lead_decay - self.step_lead_s) * self.decay.fwhm_s[-1] / fwhm_s
        span = asym_decay - asym_rect
        if not math.isfinite(asymmetry) or span <= 1e-6:   # unknown, or the families coincide (pulses << rise)
            return lead_rect
        share = min(max((asymmetry - asym_rect) / span, 0.0), 1.0)
        return lead_rect + share * (lead_decay - lead_rect)
