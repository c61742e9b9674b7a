"""Bessel low-pass filter, causal or zero-phase, streaming with carried state.

The ``cutoff`` is the -3 dB frequency of the response actually applied to the data, in both modes:

* ``causal``: one pass of a digital Bessel filter (``scipy.signal.bessel(norm="mag")``, bilinear transform
  with the cutoff pre-warped, so the digital filter is -3 dB exactly at ``cutoff``). Events are delayed by
  the group delay; ``info().delay_s`` reports the group delay at DC so event times can be corrected.
* ``zero-phase``: a forward and a backward pass. Two passes square the magnitude, so each pass is designed
  at a higher cutoff, found numerically so that the squared response is -3 dB at ``cutoff``. Switching
  modes thus keeps the bandwidth, and ``info().cutoff_hz`` equals ``cutoff`` in both.
  :meth:`Bessel.pass_cutoff_hz` gives the per-pass design frequency.
"""

from __future__ import annotations

import functools
from typing import ClassVar

import numpy as np
from impactline import FilterInfo, Param, ParameterError
from impactline.bandwidth import minus_3db_frequency, rise_time_10_90, step_response
from impactline.units import format_quantity
from scipy import signal
from scipy.optimize import brentq

from ._sos import SosDesign, SosFilter, group_delay_samples

__all__ = ["Bessel"]

#: |H|^2 of each pass at the requested cutoff in zero-phase mode, so that (|H|^2)^2 = 1/2 there.
_PASS_POWER_AT_CUTOFF = 2.0**-0.5
#: Highest per-pass design frequency tried, as a fraction of the sample rate (just below Nyquist).
_HIGHEST_PASS_FRACTION = 0.4999


def _bessel_sos(order: int, cutoff_hz: float, sample_rate_hz: float) -> np.ndarray:
    return signal.bessel(order, cutoff_hz, btype="low", norm="mag", output="sos", fs=sample_rate_hz)


def _pass_power(order: int, design_hz: float, at_hz: float, sample_rate_hz: float) -> float:
    _, h = signal.sosfreqz(_bessel_sos(order, design_hz, sample_rate_hz), worN=[at_hz], fs=sample_rate_hz)
    return float(np.abs(h[0]) ** 2)


@functools.lru_cache(maxsize=64)
def _design(order: int, cutoff_hz: float, zero_phase: bool, sample_rate_hz: float) -> tuple[SosDesign, float]:
    stage = "filter 'bessel'"
    nyquist = 0.5 * sample_rate_hz

    def hz(value: float) -> str:
        return format_quantity(value, "Hz", digits=6)

    rate = hz(sample_rate_hz)
    if not sample_rate_hz > 0:
        raise ParameterError(stage, None, f"the sample rate must be > 0 Hz, got {sample_rate_hz!r}")
    if cutoff_hz >= nyquist:
        raise ParameterError(
            stage, "cutoff",
            f"{hz(cutoff_hz)} is not below the Nyquist limit {hz(nyquist)} "
            f"(half the sample rate {rate}); choose a cutoff below {hz(nyquist)}",
        )
    if not zero_phase:
        return SosDesign.build(_bessel_sos(order, cutoff_hz, sample_rate_hz), False), cutoff_hz
    highest = _HIGHEST_PASS_FRACTION * sample_rate_hz

    def excess(design_hz: float) -> float:
        return _pass_power(order, design_hz, cutoff_hz, sample_rate_hz) - _PASS_POWER_AT_CUTOFF

    if excess(highest) < 0:
        sos = _bessel_sos(order, highest, sample_rate_hz)
        reachable = minus_3db_frequency(
            lambda f: np.abs(signal.sosfreqz(sos, worN=f, fs=sample_rate_hz)[1]) ** 4, sample_rate_hz)
        limit = "" if reachable is None else f"; the highest zero-phase cutoff at {rate} is about " \
            f"{hz(reachable)}"
        raise ParameterError(
            stage, "cutoff",
            f"{hz(cutoff_hz)} cannot be reached in zero-phase mode: each of the two passes "
            f"would need a cutoff above the Nyquist limit {hz(nyquist)} (half the sample "
            f"rate {rate}){limit}; lower the cutoff or use mode = \"causal\"",
        )
    pass_hz = brentq(excess, cutoff_hz, highest, xtol=1e-13 * cutoff_hz, rtol=1e-14, maxiter=200)
    return SosDesign.build(_bessel_sos(order, pass_hz, sample_rate_hz), True), float(pass_hz)


class Bessel(SosFilter):
    """Bessel low-pass (maximally flat group delay, little overshoot), causal or zero-phase.

    Parameters
    ----------
    order : int
        Number of poles, 1-10 (default 4).
    cutoff : float
        -3 dB frequency of the applied response, Hz (default 10 kHz). Must be below the Nyquist limit
        (zero-phase mode: somewhat lower, since each pass is designed above ``cutoff``).
    mode : {"zero-phase", "causal"}
        ``zero-phase`` (default): forward and backward pass, no delay and no phase distortion, the
        response rises symmetrically around an edge. ``causal``: one pass, events delayed by
        ``info().delay_s``.

    Notes
    -----
    Chunked processing equals whole-file processing exactly in causal mode; in zero-phase mode to within
    about 1e-12 of the signal's variation (see the module ``_sos``). Memory: the zero-phase margin
    (:meth:`margin_samples`) plus one chunk.
    """

    name: ClassVar[str] = "bessel"
    summary: ClassVar[str] = "Bessel low-pass, causal or zero-phase; cutoff = -3 dB point of what is applied"
    version: ClassVar[str] = "1"
    params: ClassVar[dict[str, Param]] = {
        "order": Param(4, kind=int, low=1, high=10, doc="number of poles (1-10)"),
        "cutoff": Param(10e3, unit="Hz", low=0, low_inclusive=False,
                        doc="-3 dB frequency of the response applied to the data (both modes)"),
        "mode": Param("zero-phase", kind=str, choices=("zero-phase", "causal"),
                      doc="zero-phase: forward+backward pass, no delay; causal: one pass, delay reported"),
    }

    def design(self, sample_rate_hz: float) -> SosDesign:
        """Sections of one pass at this sample rate; raises ``ParameterError`` past the Nyquist limit."""
        return _design(self.order, float(self.cutoff), self.mode == "zero-phase", float(sample_rate_hz))[0]

    def pass_cutoff_hz(self, sample_rate_hz: float) -> float:
        """-3 dB frequency of each single pass, Hz (``cutoff`` in causal mode, higher in zero-phase)."""
        return _design(self.order, float(self.cutoff), self.mode == "zero-phase", float(sample_rate_hz))[1]

    def margin_samples(self, sample_rate_hz: float) -> int:
        """Samples held back in zero-phase mode (0 in causal mode)."""
        return self.design(sample_rate_hz).margin

    def info(self, sample_rate_hz: float) -> FilterInfo:
        """Measured -3 dB frequency (Hz), 10-90 % step rise time (s) and delay (s) at this sample rate.

        All three are computed from the digital filter as applied: the -3 dB point by a root find on the
        applied magnitude response, the rise time from a unit step pushed through this stage, the delay
        as the group delay at DC (causal) or 0 (zero-phase).
        """
        design = self.design(sample_rate_hz)
        cutoff = minus_3db_frequency(
            lambda f: np.abs(design.response(f, sample_rate_hz)) ** 2, sample_rate_hz)
        _, y = step_response([self], sample_rate_hz, settle_hz=self.cutoff)
        rise = rise_time_10_90(y, sample_rate_hz)
        delay = 0.0 if design.zero_phase else group_delay_samples(design.sos) / sample_rate_hz
        return FilterInfo(cutoff_hz=cutoff, rise_time_s=rise, delay_s=delay)
