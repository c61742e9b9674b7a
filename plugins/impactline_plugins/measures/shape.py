"""Timing and shape of each event's pulse: peak time, rise, width, decay, sub-peaks."""

from __future__ import annotations

import math
from typing import Any, ClassVar

from impactline import Column, EventWindow, FeatureExtractor, Param

from .pulse import (
    EDGE_CONTEXT,
    Pulse,
    decay_time_constant_s,
    effective_bandwidth,
    extrapolated_duration_s,
    fwhm_s,
    make_pulse,
    peak_time_s,
    rise_time_s,
    subpeak_times_s,
    symmetric_context,
)

__all__ = ["PulseShape", "SUBPEAK_SLOTS"]

#: Length of the fixed-length ``subpeak_times_s`` list; later sub-peaks are counted but not listed.
SUBPEAK_SLOTS = 8
#: Floor of the decay fit and sub-peak prominence, as a fraction of the peak, when the detector gives no
#: usable noise level (a noiseless synthetic recording, for instance).
NOISELESS_FRACTION = 0.02


class PulseShape(FeatureExtractor):
    """Timing and shape of each event, with the pulse taken from the detector's baseline.

    The pulse is the excursion from ``event.baseline_A`` times the polarity (so cathodic events are
    measured like anodic ones). Edges are followed outward from the peak into up to ``edge_context`` of
    context on each side, because a threshold detector starts and ends an event part way up its edges.
    All levels (10 %, 50 %, 90 %...) are fractions of the largest event sample (``levels_of = "peak"``,
    for spikes) or of the plateau, the median of the event samples above half the peak (``"plateau"``,
    for step-like pulses, whose largest sample carries the filter's overshoot and the noise); crossings
    are interpolated linearly between samples.
    """

    name: ClassVar[str] = "pulse-shape"
    summary: ClassVar[str] = "peak time, 10-90 % rise, FWHM, edge-extrapolated duration, decay constant, sub-peaks"
    version: ClassVar[str] = "1"
    params: ClassVar[dict[str, Param]] = {
        "levels_of": Param("peak", kind=str, choices=("peak", "plateau"),
                           doc="fractions (10/50/90 %) of the peak sample, or of the median level above 50 %"),
        "edge_context": EDGE_CONTEXT,
        "decay_floor": Param(2.0, low=0, low_inclusive=False,
                             doc="the decay fit stops where the pulse falls below this many noise rms"),
        "decay_fit": Param("levenberg-marquardt", kind=str, choices=("levenberg-marquardt", "log-linear"),
                           doc="refine the weighted log-linear decay fit by Levenberg-Marquardt, or not"),
        "subpeak_prominence": Param(4.0, low=0, low_inclusive=False,
                                    doc="prominence a sub-peak needs, in noise rms"),
        "subpeak_fraction": Param(0.02, low=0, high=1,
                                  doc="prominence a sub-peak needs at least, as a fraction of the peak"),
        "subpeak_height": Param(5.0, low=0,
                                doc="height above the baseline a sub-peak needs, in noise rms"),
        "subpeak_min_distance": Param(None, unit="s", low=0,
                                      doc="closest two sub-peaks may be; default: one filter rise time"),
    }
    columns: ClassVar[dict[str, Column]] = {
        "peak_time_s": Column("float64", "s", "time of the largest excursion after the event start"),
        "rise_time_s": Column("float64", "s", "10-90 % rise time of the leading edge (levels: see levels_of)"),
        "fwhm_s": Column("float64", "s", "full width at half maximum"),
        "duration_extrapolated_s": Column(
            "float64", "s", "between the baseline crossings of lines fitted to the edges at 20-80 %"),
        "decay_time_s": Column("float64", "s", "time constant of an exponential fitted to the falling part"),
        "subpeak_count": Column("int32", "", "resolved maxima inside the event, the highest included"),
        "subpeak_times_s": Column("list<float32>", "s",
                                  f"times of the first {SUBPEAK_SLOTS} maxima after the event start, NaN-padded",
                                  length=SUBPEAK_SLOTS),
    }

    def context_samples(self, sample_rate_hz: float) -> tuple[int, int]:
        """Samples of context wanted before and after each event (``edge_context``)."""
        return symmetric_context(self.edge_context, sample_rate_hz)

    def measure(self, window: EventWindow) -> dict[str, Any]:
        """Measure one event; NaN for what cannot be measured (count 0 when the pulse is flat).

        Parameters
        ----------
        window : EventWindow
            The event with its context (clipped at the ends of the recording).

        Returns
        -------
        dict
            Every declared column, times in s.
        """
        out: dict[str, Any] = dict.fromkeys(self.columns, math.nan)
        out["subpeak_count"] = 0
        out["subpeak_times_s"] = [math.nan] * SUBPEAK_SLOTS
        pulse = make_pulse(window, *self.context_samples(window.sample_rate_hz), reference=self.levels_of)
        if pulse is None:
            return out
        floor_unit = _noise_unit(window, pulse)
        out["peak_time_s"] = peak_time_s(pulse)
        out["rise_time_s"] = rise_time_s(pulse)
        out["fwhm_s"] = fwhm_s(pulse)
        out["duration_extrapolated_s"] = extrapolated_duration_s(pulse)
        out["decay_time_s"] = decay_time_constant_s(pulse, self.decay_floor * floor_unit,
                                                    refine=self.decay_fit == "levenberg-marquardt")
        prominence = max(self.subpeak_prominence * floor_unit, self.subpeak_fraction * pulse.a[pulse.peak])
        times = subpeak_times_s(pulse, prominence, self._min_distance(window),
                                height_A=self.subpeak_height * floor_unit)
        out["subpeak_count"] = int(times.size)
        listed = [float(t) for t in times[:SUBPEAK_SLOTS]]
        out["subpeak_times_s"] = listed + [math.nan] * (SUBPEAK_SLOTS - len(listed))
        return out

    def _min_distance(self, window: EventWindow) -> int:
        """Sub-peak separation in samples: the parameter, else one rise time of the filter chain."""
        fs = window.sample_rate_hz
        if self.subpeak_min_distance is not None:
            return max(1, round(self.subpeak_min_distance * fs))
        rise = effective_bandwidth(window.filter_info)[1]
        return max(1, round(rise * fs)) if math.isfinite(rise) else 1


def _noise_unit(window: EventWindow, pulse: Pulse) -> float:
    """Noise rms the thresholds are counted in: the detector's, else a small fraction of the peak."""
    noise = window.event.noise_rms_A
    if noise is not None and math.isfinite(noise) and noise > 0:
        return float(noise)
    return NOISELESS_FRACTION * pulse.amplitude
