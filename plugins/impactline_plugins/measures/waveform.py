"""Each event's waveform, aligned and resampled to a fixed number of points, for clustering and classifying.

Why a fixed length per class
----------------------------
A ``list<float32>`` column has its length fixed in the stage's declaration (the events schema is known
before any file is read), so the number of points cannot be an ordinary parameter. The bundled stages
are ``waveform`` (64 points, the default), ``waveform-32`` and ``waveform-128``; any other length is one
line in a local plugin file named by the pipeline (``[plugins] local = ["shapes256.py"]``)::

    from impactline_plugins.measures.waveform import make_waveform_stage
    STAGES = [make_waveform_stage(256)]          # registers the measure "waveform-256"

Resampling
----------
The excursion from the detector's baseline is taken as the straight-line interpolant through the samples,
zero (the baseline) outside the context the runner hands over. Each output point is the *average* of that
interpolant over its bin, computed exactly from the interpolant's running integral. Averaging over bins
never aliases when the bins are wider than a sample (it acts as a box filter), reduces to linear
interpolation when they are narrower, and keeps the area: ``sum(shape) * shape_dt_s * shape_scale_A``
equals the charge under the window whenever the window covers the whole pulse.
"""

from __future__ import annotations

import math
from typing import Any, ClassVar

import numpy as np
from impactline import Column, EventWindow, FeatureExtractor, Param, ParameterError
from impactline.bandwidth import EDGE_LOOKBACK_SAMPLES, leading_edge

__all__ = ["Waveform", "Waveform32", "Waveform128", "make_waveform_stage", "bin_average", "log_edges",
           "WAVEFORM_STAGES"]

NORMALIZATIONS = ("none", "peak", "charge", "duration")
#: Fewest samples before the event for a ``pre`` baseline (else the detector's baseline is used).
MIN_BASELINE_SAMPLES = 5
#: Alignment points (``align``).
ALIGNMENTS = ("edge", "onset", "peak")


def bin_average(x: np.ndarray, edges: np.ndarray) -> np.ndarray:
    """Averages of the linear interpolant of ``x`` over the bins between consecutive ``edges``.

    Sample ``i`` of ``x`` sits at position ``i``; the interpolant falls linearly to zero one sample beyond
    each end (so a pulse cut at the end of the available context is not extended by a constant) and is
    zero further out.

    Parameters
    ----------
    x : ndarray, shape (n,)
        Samples (any unit).
    edges : ndarray, shape (n_bins + 1,)
        Increasing bin edges, in samples (positions may be fractional and lie outside the data).

    Returns
    -------
    ndarray, shape (n_bins,)
        Bin averages, in the unit of ``x``.
    """
    padded = np.concatenate(([0.0], np.asarray(x, dtype=np.float64), [0.0]))  # positions -1 .. n
    # Running integral of the interpolant at the knots (trapezoid rule is exact for a linear interpolant).
    knots = np.concatenate(([0.0], np.cumsum(0.5 * (padded[:-1] + padded[1:]))))
    edges = np.asarray(edges, dtype=np.float64)
    u = np.clip(edges + 1.0, 0.0, padded.size - 1.0)  # positions in the padded array
    i = np.minimum(np.floor(u).astype(np.int64), padded.size - 2)
    f = u - i
    integral = knots[i] + padded[i] * f + 0.5 * (padded[i + 1] - padded[i]) * f * f
    return np.diff(integral) / np.diff(edges)


def log_edges(pre: float, post: float, points: int) -> np.ndarray:
    """Bin edges (samples from the alignment point) for the ``log`` spacing.

    ``points // 8`` equal bins cover the ``pre`` samples before the alignment point (none when ``pre`` is
    0); the other bins cover ``[0, post]`` with edges at 0 and then geometrically spaced from one sample
    to ``post`` (one bin when ``post`` is at most one sample).
    """
    n_pre = points // 8 if pre > 0 else 0
    n_post = points - n_pre
    before = np.linspace(-pre, 0.0, n_pre + 1)[:-1] if n_pre else np.empty(0)
    if post > 1.0 and n_post > 1:
        after = np.concatenate(([0.0], np.geomspace(1.0, post, n_post)))
    else:
        after = np.linspace(0.0, max(post, 1.0), n_post + 1)
    return np.concatenate((before, after))


def _parabolic_peak(y: np.ndarray, i: int) -> float:
    """Sub-sample position of the maximum at ``i`` from the parabola through its neighbours.

    Common practice (three-point parabolic interpolation of a sampled maximum).
    """
    if 0 < i < y.size - 1:
        curvature = y[i - 1] - 2.0 * y[i] + y[i + 1]
        if curvature < 0:
            return i + 0.5 * (y[i - 1] - y[i + 1]) / curvature
    return float(i)


class Waveform(FeatureExtractor):
    """The event's waveform with context, aligned on its leading edge, onset or peak, resampled to a fixed length.

    The waveform is the excursion from a baseline (sign kept: anodic events point up, cathodic down):
    by default the median of the ``pre`` window before the event start, or the detector's baseline.
    With a fixed time base the window runs from ``pre`` before to ``post`` after the alignment point:

    * ``edge``: the instant the leading edge reaches half of the event's *first* peak, interpolated between
      samples (:func:`impactline.bandwidth.leading_edge`, the same instant the runner reports as ``onset_s``
      before its correction for the filters' lead). It depends on the waveform only, not on which sample
      first crossed the detector's threshold, and a burst is anchored at its first sub-spike whichever is
      highest.
    * ``onset``: the detector's event start, a whole sample (the threshold crossing, which moves by a sample
      with the noise: on a pulse of a few samples that is a visible shift).
    * ``peak``: the largest excursion, refined to a fraction of a sample by a parabola through its
      neighbours (a burst is anchored at whichever sub-spike is highest).

    Adding ``"duration"`` to
    ``normalize`` stretches the time base instead: the event itself always fills the same middle points
    and ``duration_context`` of its duration is kept on each side (capped by ``pre``/``post``, the
    context the stage asks the runner for), which makes long and short events of one form alike.
    ``spacing = "log"`` (fixed time base) puts ``points // 8`` even points before the alignment point and
    the rest on geometrically growing bins from one sample to ``post`` after it, so microsecond blips
    and millisecond tails show in one shape.

    Amplitude normalization (``normalize``, at most one of): ``"none"`` (the shape is in amperes),
    ``"peak"`` (divided by the absolute peak excursion) or ``"charge"`` (divided by the absolute mean
    excursion over the event, |charge| / duration, so the event's area in units of its duration is 1).
    ``shape_scale_A`` holds the divisor (1 A for ``"none"``): ``shape * shape_scale_A`` is always in A.
    When the window reaches beyond the available signal (recording ends, or a duration-scaled window
    longer than the context) the missing part is the baseline (0) and ``shape_complete`` is false.
    A divisor of zero (a flat or bipolar event) gives a shape of NaN, which the clustering leaves
    unassigned.
    """

    name: ClassVar[str] = "waveform"
    summary: ClassVar[str] = "each event's waveform: aligned, resampled to 64 points, normalized"
    version: ClassVar[str] = "1"
    #: Points of the ``shape`` column (fixed per class; see :func:`make_waveform_stage`).
    points: ClassVar[int] = 64
    params: ClassVar[dict[str, Param]] = {
        "pre": Param(50e-6, unit="s", low=0, doc="window before the alignment point (fixed time base)"),
        "post": Param(200e-6, unit="s", low=0, doc="window after the alignment point (fixed time base)"),
        "align": Param("edge", kind=str, choices=ALIGNMENTS,
                       doc="align on the half-height instant of the first peak's edge (sub-sample), the "
                           "detector's event start, or the (sub-sample) largest peak"),
        "normalize": Param(["peak"], kind=list, choices=NORMALIZATIONS,
                           doc="none, peak or charge (amplitude), plus duration (time base); e.g. [\"peak\"]"),
        "spacing": Param("linear", kind=str, choices=("linear", "log"),
                         doc="points evenly spaced, or (log) geometrically after the alignment point"),
        "baseline": Param("pre", kind=str, choices=("pre", "detector"),
                          doc="level subtracted: median of the pre window before the event, or the detector's"),
        "duration_context": Param(0.25, low=0, high=10,
                                  doc="with duration normalization: context each side, in event durations"),
    }
    columns: ClassVar[dict[str, Column]] = {}  # set per class by make_waveform_stage / __init_subclass__

    def __init_subclass__(cls, **kwargs: Any) -> None:
        super().__init_subclass__(**kwargs)
        cls.columns = _columns(cls.points)

    def __init__(self, **values: Any):
        super().__init__(**values)
        chosen = set(self.normalize)
        stage = f"measure {self.name!r}"
        if "none" in chosen and chosen - {"none", "duration"}:
            raise ParameterError(stage, "normalize", f"'none' cannot be combined with {sorted(chosen - {'none'})}")
        if {"peak", "charge"} <= chosen:
            raise ParameterError(stage, "normalize", "choose one of 'peak' and 'charge', not both")
        if "duration" not in chosen and self.pre + self.post <= 0:
            raise ParameterError(stage, "post", "pre + post must be > 0 with a fixed time base")

    def _baseline(self, window: EventWindow, fs: float) -> float:
        """The level the waveform is measured from, A.

        ``pre``: the median of the samples in the ``pre`` window before the event start (at least
        :data:`MIN_BASELINE_SAMPLES` of them; the detector's baseline otherwise). A level taken right
        before the onset follows a drifting or stepped baseline more closely than a baseline interpolated
        over a long block.
        """
        start = int(window.start)
        if self.baseline == "pre" and 0 <= start <= len(window.signal):
            before = window.signal[max(0, start - math.ceil(self.pre * fs)):start]
            if before.size >= MIN_BASELINE_SAMPLES:
                return float(np.median(before))
        return float(window.event.baseline_A)

    @property
    def stretched(self) -> bool:
        """True when the time base follows the event duration."""
        return "duration" in self.normalize

    def context_samples(self, sample_rate_hz: float) -> tuple[int, int]:
        """Samples of context wanted before and after each event.

        One extra sample on each side keeps the interpolant's last interval inside the data; with peak
        alignment the peak can sit anywhere in the event, which the window after the event end absorbs;
        with edge alignment the anchor can lie up to :data:`impactline.bandwidth.EDGE_LOOKBACK_SAMPLES` before
        the event start (as many more before it).
        """
        extra = EDGE_LOOKBACK_SAMPLES if self.align == "edge" and not self.stretched else 0
        return (math.ceil(self.pre * sample_rate_hz) + 1 + extra, math.ceil(self.post * sample_rate_hz) + 1)

    def measure(self, window: EventWindow) -> dict[str, Any]:
        """Cut, align, resample and normalize one event.

        Parameters
        ----------
        window : EventWindow
            The event with its context (clipped at the ends of the recording).

        Returns
        -------
        dict
            ``shape`` (list of ``points`` floats; A times ``1/shape_scale_A``), ``shape_scale_A`` (A),
            ``shape_dt_s`` (s, time between points) and ``shape_complete`` (bool).
        """
        n = self.points
        fs = float(window.sample_rate_hz)
        start, end = int(window.start), int(window.end)
        x = np.asarray(window.signal, dtype=np.float64) - self._baseline(window, fs)
        nan_out = {"shape": [math.nan] * n, "shape_scale_A": math.nan, "shape_dt_s": math.nan,
                   "shape_complete": False}
        if not 0 <= start < end <= x.size:
            return nan_out
        event = x[start:end]
        polarity = -1.0 if window.event.polarity < 0 else 1.0
        peak_index = int(np.argmax(polarity * event))
        if self.stretched:
            duration = float(end - start)
            first = start - self.duration_context * duration
            last = end + self.duration_context * duration
            available = (start - math.ceil(self.pre * fs) - 1, end + math.ceil(self.post * fs) + 1)
        else:
            if self.align == "peak":
                anchor = start + _parabolic_peak(polarity * event, peak_index)
            elif self.align == "edge":
                edge = leading_edge(polarity * x[:end], float(window.event.noise_rms_A), start)
                anchor = edge.crossing if edge is not None else float(start)
            else:
                anchor = float(start)
            first = anchor - self.pre * fs
            last = anchor + self.post * fs
            available = (-math.inf, math.inf)
        if self.spacing == "log" and not self.stretched:
            edges = anchor + log_edges(self.pre * fs, self.post * fs, n)
            dt = math.nan
        else:
            edges = first + (last - first) / n * np.arange(n + 1, dtype=np.float64)
            dt = (last - first) / n / fs
        # The interpolant is known on [0, size - 1]; and (duration mode) only as far as the context asked for.
        lo = max(0.0, available[0])
        hi = min(x.size - 1.0, available[1])
        complete = bool(first >= lo - 1e-9 and last <= hi + 1e-9)
        if not complete:
            x = x.copy()
            x[:max(0, math.ceil(lo))] = 0.0
            x[math.floor(hi) + 1:] = 0.0
        shape = bin_average(x, edges)

        if "peak" in self.normalize:
            scale = abs(float(event[peak_index]))
        elif "charge" in self.normalize:
            scale = abs(float(np.mean(event)))
        else:
            scale = 1.0
        if not (scale > 0 and math.isfinite(scale)):
            return {**nan_out, "shape_dt_s": dt, "shape_complete": complete}
        return {"shape": (shape / scale).astype(np.float32).tolist(), "shape_scale_A": scale,
                "shape_dt_s": dt, "shape_complete": complete}


def _columns(points: int) -> dict[str, Column]:
    return {
        "shape": Column("list<float32>", "",
                        f"{points} bin averages of the excursion over shape_scale_A (A when normalize = none)",
                        length=points),
        "shape_scale_A": Column("float64", "A", "current the shape was divided by (1 A when not normalized)"),
        "shape_dt_s": Column("float64", "s", "time between shape points (NaN with log spacing)"),
        "shape_complete": Column("bool", "", "the window lay inside the available signal (else padded with 0)"),
    }


Waveform.columns = _columns(Waveform.points)


def make_waveform_stage(points: int) -> type[Waveform]:
    """A :class:`Waveform` measure with ``points`` points, registered as ``waveform-<points>``.

    Parameters
    ----------
    points : int
        Length of the ``shape`` column (4 to 4096).

    Returns
    -------
    type
        A new stage class; list it in a plugin's ``STAGES`` to register it.
    """
    points = int(points)
    if not 4 <= points <= 4096:
        raise ValueError(f"waveform points must be between 4 and 4096, got {points}")
    return type(f"Waveform{points}", (Waveform,), {
        "name": f"waveform-{points}",
        "summary": f"each event's waveform: aligned, resampled to {points} points, normalized",
        "points": points,
        "__doc__": f"{Waveform.__doc__.splitlines()[0]} ({points} points; see :class:`Waveform`).",
        "__module__": __name__,
    })


Waveform32 = make_waveform_stage(32)
Waveform128 = make_waveform_stage(128)

#: The bundled waveform measures (listed in ``measures.STAGES``).
WAVEFORM_STAGES: list[type] = [Waveform, Waveform32, Waveform128]
