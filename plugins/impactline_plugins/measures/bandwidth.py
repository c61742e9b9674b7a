"""Does the recording bandwidth flatten an event? A flag and the amplitude fraction the filter keeps."""

from __future__ import annotations

import math
from typing import Any, ClassVar

import numpy as np
from impactline import Column, EventWindow, FeatureExtractor, Param

from .pulse import (
    EDGE_CONTEXT,
    GAUSSIAN_RISE_TIME_FC,
    baseline_span,
    effective_bandwidth,
    fwhm_s,
    gaussian_peak_fraction,
    make_pulse,
    rectangle_width_s,
    symmetric_context,
)

__all__ = ["BandwidthLimit"]


class BandwidthLimit(FeatureExtractor):
    """Flags events too short for the filter chain and estimates how much of their amplitude survived.

    ``short_event`` is true when the event's FWHM (its detected duration when the FWHM cannot be
    measured) is shorter than ``short_rise_times`` rise times of the filter chain: a rectangular pulse
    longer than two rise times keeps 99 % of its amplitude through a Gaussian-like filter, a shorter one
    loses more (REFERENCES.md). It is null when the filter chain's bandwidth is unknown.

    ``expected_peak_fraction`` models the event as a rectangular pulse of width ``w`` through a Gaussian
    filter: the filter keeps the area ``A w`` and leaves ``A erf(w / (2 sqrt 2 sigma))`` at the peak,
    ``sigma = sqrt(ln 2) / (2 pi fc)``. The Gaussian is the one with the chain's 10-90 % rise time ``Tr``
    (``fc = 0.3396 / Tr``); for Bessel filters its impulse response has the real one's area-to-peak ratio
    within 3 % (6 % for the Gaussian with the chain's -3 dB frequency). ``w`` is recovered from the
    measured area-to-peak ratio (:func:`.pulse.rectangle_width_s`) rather than from the FWHM, because a
    filtered pulse is never narrower than the filter's own impulse response (FWHM about 0.92 rise times),
    so the FWHM of a very short event would overstate the amplitude kept.

    The filtered shape of a pulse much shorter than the filter's response forgets its width, so the
    inversion loses precision there: a 3 % error in the area-to-peak ratio (filter shape, noise) moves the
    fraction by +-0.03 at ``w = Tr`` but by about +-0.1 at ``w = Tr/2``, and below about ``Tr/4`` only the
    flag is trustworthy. Any filtering outside the pipeline (the amplifier's own low-pass) must be part of
    the chain's bandwidth, or short events will look better kept than they are. Divide ``peak_A`` by the
    fraction for the amplitude before filtering (for events close to rectangular).
    """

    name: ClassVar[str] = "bandwidth-limit"
    summary: ClassVar[str] = "flags events shorter than ~2 filter rise times; peak fraction kept by the filter"
    version: ClassVar[str] = "1"
    params: ClassVar[dict[str, Param]] = {
        "short_rise_times": Param(2.0, low=0, low_inclusive=False,
                                  doc="events with FWHM below this many filter rise times are flagged short"),
        "edge_context": EDGE_CONTEXT,
    }
    columns: ClassVar[dict[str, Column]] = {
        "short_event": Column("bool", "", "FWHM shorter than short_rise_times filter rise times"),
        "equivalent_width_s": Column("float64", "s", "width of the rectangular pulse with the same area/peak"),
        "expected_peak_fraction": Column("float64", "", "fraction of the rectangular pulse's amplitude kept"),
    }

    def context_samples(self, sample_rate_hz: float) -> tuple[int, int]:
        """Samples of context wanted before and after each event (``edge_context``)."""
        return symmetric_context(self.edge_context, sample_rate_hz)

    def measure(self, window: EventWindow) -> dict[str, Any]:
        """Measure one event.

        Parameters
        ----------
        window : EventWindow
            The event, its context and the filter chain's :class:`~impactline.FilterInfo`.

        Returns
        -------
        dict
            ``short_event`` (bool, or None when the bandwidth is unknown), ``equivalent_width_s`` (s) and
            ``expected_peak_fraction`` (NaN when undefined).
        """
        out: dict[str, Any] = {"short_event": None, "equivalent_width_s": math.nan,
                               "expected_peak_fraction": math.nan}
        fs = float(window.sample_rate_hz)
        _, rise = effective_bandwidth(window.filter_info)
        # The Gaussian with the chain's rise time: for Bessel filters its impulse response has the area/peak
        # ratio of the real one within 3 %, against 6 % for the Gaussian with the same -3 dB frequency.
        cutoff = GAUSSIAN_RISE_TIME_FC / rise
        pulse = make_pulse(window, *self.context_samples(fs))
        width = fwhm_s(pulse) if pulse is not None else math.nan
        if not math.isfinite(width):
            width = (int(window.end) - int(window.start)) / fs
        if math.isfinite(rise):
            out["short_event"] = bool(width < self.short_rise_times * rise)
        if pulse is None or not math.isfinite(cutoff):
            return out
        i, j = baseline_span(pulse)
        area_over_peak = float(np.sum(pulse.a[i:j])) / fs / pulse.a[pulse.peak]
        w = rectangle_width_s(area_over_peak, cutoff)
        out["equivalent_width_s"] = w
        out["expected_peak_fraction"] = float(gaussian_peak_fraction(w, cutoff))
        return out
