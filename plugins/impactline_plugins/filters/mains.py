"""Mains interference removal: a cascade of notch filters at the mains frequency and its harmonics.

Each line ``k * frequency`` (k = 1 .. ``harmonics``) gets a second-order notch
(``scipy.signal.iirnotch``: a zero pair on the unit circle, so the line itself is removed completely) with
quality factor ``q``; its -3 dB width is ``k * frequency / q``, so higher harmonics, which drift ``k`` times
as much as the fundamental, get proportionally wider notches. The sections stream through the shared
engine (``_sos``): causal with carried state (exact), or zero-phase (forward and backward, each notch's
response squared: the same lines removed, the stop band narrower at -3 dB, and no phase shift next to the
lines).

The default ``q = 10`` (5 Hz wide at 50 Hz) keeps more than 30 dB of attenuation when the mains frequency
is 0.05 Hz off nominal (34 dB; q = 30 gives only 24.5 dB there), at the price of a wider notch. Notches ring
for about ``q / (pi * frequency)`` seconds (64 ms at 50 Hz, q = 10); in zero-phase mode the held-back
margin is correspondingly long (1.7 s of samples at 50 Hz, q = 10; 5.1 s at q = 30), so causal mode is the
default: its phase shift is confined to a few notch widths around each line, far below the
frequencies that shape events (``info().delay_s`` reports the group delay in that band, a fraction of a
sample).
"""

from __future__ import annotations

import functools
from typing import ClassVar

import numpy as np
from impactline import FilterInfo, Param, ParameterError
from impactline.units import format_quantity
from scipy import signal

from ._sos import SosDesign, SosFilter, group_delay_samples

__all__ = ["Mains"]

#: Above this multiple of the highest notch, event edges see the group delay that ``info()`` reports.
_EVENT_BAND_FACTOR = 10.0


@functools.lru_cache(maxsize=32)
def _design(frequency_hz: float, harmonics: int, q: float, zero_phase: bool,
            sample_rate_hz: float) -> SosDesign:
    nyquist = 0.5 * sample_rate_hz
    top = harmonics * frequency_hz
    if top >= nyquist:
        fits = int(np.ceil(nyquist / frequency_hz)) - 1
        limit = (f"the Nyquist limit {format_quantity(nyquist, 'Hz')} (half the sample rate "
                 f"{format_quantity(sample_rate_hz, 'Hz')})")
        if fits < 1:
            raise ParameterError("filter 'mains'", "frequency",
                                 f"{format_quantity(frequency_hz, 'Hz')} is not below {limit}")
        raise ParameterError(
            "filter 'mains'", "harmonics",
            f"{format_quantity(frequency_hz, 'Hz')} x {harmonics} = {format_quantity(top, 'Hz')} "
            f"is not below {limit}; use harmonics = {fits} or fewer")
    sections = [np.concatenate(signal.iirnotch(k * frequency_hz, q, fs=sample_rate_hz))
                for k in range(1, harmonics + 1)]
    return SosDesign.build(np.vstack(sections), zero_phase)


class Mains(SosFilter):
    """Notch filters at the mains frequency (50 or 60 Hz) and its harmonics, causal or zero-phase.

    Parameters
    ----------
    frequency : float
        Mains frequency, Hz (default 50; 60 in the Americas and parts of Asia).
    harmonics : int
        Number of lines removed: ``frequency`` times 1, 2, ..., ``harmonics`` (default 3).
    q : float
        Quality factor of each notch: line frequency / -3 dB width of one pass (default 10).
    mode : {"causal", "zero-phase"}
        ``causal`` (default): one pass with carried state; ``zero-phase``: forward and backward.
    """

    name: ClassVar[str] = "mains"
    summary: ClassVar[str] = "notch filters at the mains frequency (50/60 Hz) and its harmonics"
    version: ClassVar[str] = "1"
    params: ClassVar[dict[str, Param]] = {
        "frequency": Param(50.0, unit="Hz", low=0, low_inclusive=False,
                           doc="mains frequency (50 or 60 Hz; any interference line works)"),
        "harmonics": Param(3, kind=int, low=1, high=200,
                           doc="lines removed: the fundamental and its harmonics up to this multiple"),
        "q": Param(10.0, low=0.5, high=1e4,
                   doc="quality factor of each notch (line frequency / -3 dB width of one pass)"),
        "mode": Param("causal", kind=str, choices=("causal", "zero-phase"),
                      doc="causal: one pass, carried state; zero-phase: forward+backward, long margin"),
    }

    def design(self, sample_rate_hz: float) -> SosDesign:
        """Notch sections at this sample rate; raises ``ParameterError`` when a line is past Nyquist."""
        return _design(float(self.frequency), self.harmonics, float(self.q), self.mode == "zero-phase",
                       float(sample_rate_hz))

    def info(self, sample_rate_hz: float) -> FilterInfo:
        """Not a low-pass (no cutoff, no rise time); delay = group delay where events live.

        The delay is the group delay at ten times the highest notched line (causal; it only falls further
        above), 0 in zero-phase mode.
        """
        design = self.design(sample_rate_hz)
        if design.zero_phase:
            return FilterInfo(cutoff_hz=None, rise_time_s=None, delay_s=0.0)
        at = min(_EVENT_BAND_FACTOR * self.harmonics * self.frequency, 0.4 * sample_rate_hz)
        delay = group_delay_samples(design.sos, at, sample_rate_hz) / sample_rate_hz
        return FilterInfo(cutoff_hz=None, rise_time_s=None, delay_s=delay)
