"""Baseline and noise around each event, from the context before and after it."""

from __future__ import annotations

import math
from typing import Any, ClassVar

import numpy as np
from impactline import Column, EventWindow, FeatureExtractor, Param
from impactline.robust import MAD_TO_SIGMA

from .pulse import effective_bandwidth, symmetric_context

__all__ = ["BaselineContext"]

#: Rise times of the filter chain the guard band spans at least: beyond two rise times a filtered step has
#: settled to within about 1 % (REFERENCES.md: a rectangular pulse longer than 2 rise times keeps 99 %).
GUARD_RISE_TIMES = 2.0


class BaselineContext(FeatureExtractor):
    """Baselines before and after each event, a charge over a sloping baseline, and local noise.

    The context on each side is the stretch of ``context`` seconds that ends (before) or begins (after)
    a guard band away from the event. The guard band is ``guard`` or two rise times of the filter chain,
    whichever is longer, so the filtered flanks of the event stay out of the baseline; a longer automatic
    guard eats into the context rather than asking for more of it.

    Each side's baseline is the median of its context, placed at the side's centre in time; the local
    baseline under the event is the straight line through the two (a single side's value when only one
    side has context, e.g. at the ends of a recording).
    """

    name: ClassVar[str] = "baseline-context"
    summary: ClassVar[str] = "baseline before/after each event, charge over a sloping baseline, local noise"
    version: ClassVar[str] = "1"
    params: ClassVar[dict[str, Param]] = {
        "context": Param(1e-3, unit="s", low=0, low_inclusive=False,
                         doc="length of the baseline context on each side of the event"),
        "guard": Param(50e-6, unit="s", low=0,
                       doc="gap between event and context (at least two filter rise times are kept)"),
        "min_context_samples": Param(4, kind=int, low=1,
                                     doc="fewest context samples a side needs for its baseline"),
        "noise_estimator": Param("rms", kind=str, choices=("rms", "mad"),
                                 doc="rms of the context residual, or 1.4826 x its median absolute deviation"),
    }
    columns: ClassVar[dict[str, Column]] = {
        "baseline_before_A": Column("float64", "A", "median current of the context before the event"),
        "baseline_after_A": Column("float64", "A", "median current of the context after the event"),
        "baseline_step_A": Column("float64", "A", "baseline after minus baseline before"),
        "mean_current_A": Column("float64", "A", "mean current over the event samples (baseline included)"),
        "charge_linear_baseline_C": Column(
            "float64", "C", "signed sum of the event minus the line through both baselines, over fs"),
        "local_noise_rms_A": Column("float64", "A", "noise of the context around the local baseline line"),
        "snr_local": Column("float64", "", "peak excursion from the local baseline over the local noise"),
    }

    def context_samples(self, sample_rate_hz: float) -> tuple[int, int]:
        """Samples of context wanted before and after each event (context plus guard)."""
        return symmetric_context(self.context + self.guard, sample_rate_hz)

    def _guard_samples(self, window: EventWindow) -> int:
        rise = effective_bandwidth(window.filter_info)[1]
        guard = max(self.guard, GUARD_RISE_TIMES * rise) if math.isfinite(rise) else self.guard
        return math.ceil(guard * window.sample_rate_hz)

    def measure(self, window: EventWindow) -> dict[str, Any]:
        """Measure one event; NaN for what the available context cannot give.

        Parameters
        ----------
        window : EventWindow
            The event with its context (clipped at the ends of the recording).

        Returns
        -------
        dict
            Every declared column: currents in A, charge in C, ``snr_local`` dimensionless.
        """
        x = np.asarray(window.signal, dtype=np.float64)
        start, end, fs = int(window.start), int(window.end), float(window.sample_rate_hz)
        out = dict.fromkeys(self.columns, math.nan)
        if not 0 <= start < end <= x.size:
            return out
        wanted_pre, wanted_post = self.context_samples(fs)
        guard = self._guard_samples(window)
        # Context indices (into x): before = [b0, b1), after = [a0, a1).
        b1 = start - guard
        b0 = max(0, start - wanted_pre)
        a0 = end + guard
        a1 = min(x.size, end + wanted_post)
        before = x[b0:b1] if b1 - b0 >= self.min_context_samples else x[:0]
        after = x[a0:a1] if a1 - a0 >= self.min_context_samples else x[:0]
        level_before = float(np.median(before)) if before.size else math.nan
        level_after = float(np.median(after)) if after.size else math.nan
        out["baseline_before_A"] = level_before
        out["baseline_after_A"] = level_after
        out["baseline_step_A"] = level_after - level_before
        event = x[start:end]
        out["mean_current_A"] = float(event.mean())

        line = _baseline_line(level_before, (b0 + b1 - 1) / 2.0, level_after, (a0 + a1 - 1) / 2.0)
        if line is None:
            return out
        excursion = event - line(np.arange(start, end, dtype=np.float64))
        out["charge_linear_baseline_C"] = float(excursion.sum()) / fs

        residual = np.concatenate((before - line(np.arange(b0, b0 + before.size, dtype=np.float64)),
                                   after - line(np.arange(a0, a0 + after.size, dtype=np.float64))))
        if self.noise_estimator == "mad":
            noise = MAD_TO_SIGMA * float(np.median(np.abs(residual - np.median(residual))))
        else:
            noise = float(np.sqrt(np.mean(residual * residual)))
        out["local_noise_rms_A"] = noise
        sign = -1.0 if window.event.polarity < 0 else 1.0
        peak = float(np.max(sign * excursion))
        # A noiseless context has no finite SNR; NaN keeps column statistics usable.
        out["snr_local"] = abs(peak) / noise if noise > 0 else math.nan
        return out


def _baseline_line(level_before: float, t_before: float, level_after: float, t_after: float):
    """The local baseline as a function of sample index: the line through both sides, or one side's level.

    Returns None when neither side has a baseline.
    """
    has_before, has_after = math.isfinite(level_before), math.isfinite(level_after)
    if has_before and has_after and t_after > t_before:
        slope = (level_after - level_before) / (t_after - t_before)
        return lambda t: level_before + slope * (t - t_before)
    if has_before or has_after:
        level = level_before if has_before else level_after
        return lambda t: np.full_like(t, level)
    return None
