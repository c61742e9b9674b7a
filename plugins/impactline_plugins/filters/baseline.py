"""Baseline removal: subtract a running median (or another percentile) over a centred window.

``y[i] = x[i] - P_q(x[i-h], ..., x[i+h])`` with ``2h + 1`` samples (the window rounded to an odd number of
samples) and ``P_q`` the order statistic that ``scipy.ndimage.percentile_filter`` picks (for q = 50 the
median). At the ends of the recording the signal is mirrored (``x[-1-k] = x[k]``, the "reflect" mode of
``scipy.ndimage``), so the first and last samples get a full window too.

Because every value is an element of its window, the result does not depend on how the stream is cut:
chunked equals whole exactly. Each output sample waits for the ``h`` samples after it (latency = half
the window); memory holds one window plus one chunk.

Events much shorter than the window pass unchanged (a median ignores a minority of outlying samples),
while drift slower than the window is removed. Events that occupy a sizeable fraction of a window (long
steps, dense bursts) pull the median and get partly subtracted: make the window long compared with the
events and the gaps between them. The downstream detector then sees a baseline near 0 A.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import ClassVar

import numpy as np
from impactline import Filter, FilterInfo, Param, ParameterError
from impactline.units import format_quantity
from scipy import ndimage

from ._edges import StreamBuffer

__all__ = ["Baseline"]


@dataclass
class _BaselineState:
    half: int                    # h: samples on each side of the centre
    percentile: float
    samples: StreamBuffer = field(default_factory=StreamBuffer)
    emitted: int = 0             # outputs emitted so far

    def emit(self, upto: int, n: int | None) -> np.ndarray:
        """Outputs emitted..upto-1 (every window inside the data, or mirrored once the length n is known)."""
        count = upto - self.emitted
        if count <= 0:
            return np.empty(0)
        h = self.half
        seg = self.samples.segment(self.emitted - h, upto + h, n)
        # Every window used lies inside ``seg``, so the filter's own edge mode never matters.
        base = ndimage.percentile_filter(seg, self.percentile, size=2 * h + 1, mode="reflect")[h:h + count]
        out = seg[h:h + count] - base
        self.emitted = upto
        # The start of the recording is only mirrored before the first output, while nothing was dropped.
        self.samples.drop_before(max(self.emitted - h, 0))
        return out


class Baseline(Filter):
    """Removes a slowly varying baseline with a running median or percentile over a centred window.

    Parameters
    ----------
    window : float
        Length of the centred window, s (default 0.5 s). Rounded to an odd number of samples, at least 3.
    percentile : float
        Order statistic of the window subtracted, 0-100 (default 50, the running median).

    Notes
    -----
    Not a linear filter: ``frequency_response`` is None and ``info()`` reports no cutoff; the delay is 0
    (the window is centred).
    """

    name: ClassVar[str] = "baseline"
    summary: ClassVar[str] = "subtracts a running median (or percentile) over a centred window"
    version: ClassVar[str] = "1"
    params: ClassVar[dict[str, Param]] = {
        "window": Param(0.5, unit="s", low=0, low_inclusive=False,
                        doc="centred window, long compared with the events (rounded to odd samples)"),
        "percentile": Param(50.0, low=0, high=100,
                            doc="order statistic subtracted: 50 = running median"),
    }

    def window_samples(self, sample_rate_hz: float) -> int:
        """Odd number of samples in the window at this sample rate (before validation)."""
        return 2 * int(round(0.5 * self.window * sample_rate_hz)) + 1

    def start(self, sample_rate_hz: float) -> _BaselineState:
        """Initial state; raises ``ParameterError`` when the window is shorter than 3 samples."""
        size = self.window_samples(sample_rate_hz)
        if size < 3:
            raise ParameterError(
                "filter 'baseline'", "window",
                f"{format_quantity(self.window, 's')} is shorter than 3 samples at the sample rate "
                f"{format_quantity(sample_rate_hz, 'Hz')} "
                f"(1 sample = {format_quantity(1 / sample_rate_hz, 's')}); "
                "use a window of many event durations, e.g. 0.5 s")
        return _BaselineState(half=size // 2, percentile=float(self.percentile))

    def process(self, x: np.ndarray, state: _BaselineState) -> tuple[np.ndarray, _BaselineState]:
        """Append a chunk; emit the samples whose whole window (``h`` samples each side) has arrived."""
        state.samples.append(np.asarray(x, dtype=np.float64))
        ready = state.samples.received - state.half
        # Each call filters a whole extra window; waiting for at least half a window of outputs keeps the
        # cost per sample bounded however small the chunks are (the values do not change).
        if ready - state.emitted < state.half:
            return np.empty(0), state
        return state.emit(ready, None), state

    def finish(self, state: _BaselineState) -> np.ndarray:
        """Emit the last ``h`` samples, their windows mirrored at the end of the recording."""
        received = state.samples.received
        return state.emit(received, received) if received else np.empty(0)

    def info(self, sample_rate_hz: float) -> FilterInfo:
        """No cutoff or rise time (not linear); no delay (centred window)."""
        return FilterInfo(cutoff_hz=None, rise_time_s=None, delay_s=0.0)
