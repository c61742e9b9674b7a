"""A sample buffer for window-based filters: absolute indices, mirrored ends, bounded memory.

Window filters (running percentile, block-wise wavelet denoising) need samples on both sides of the ones
they emit. :class:`StreamBuffer` keeps the raw samples from some absolute index on, hands out any index
range with the recording mirrored at its ends (``x[-1-k] = x[k]`` and ``x[n+k] = x[n-1-k]``, repeated when
a range is longer than the recording), and drops samples no longer needed.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["mirror_index", "StreamBuffer"]


def mirror_index(index: np.ndarray, n: int | None) -> np.ndarray:
    """Map indices beyond the ends of a recording of ``n`` samples onto it by mirroring.

    ``n`` is None while the length is unknown: then only the start is mirrored (indices < 0), which
    agrees with the final mapping as long as the recording is longer than the reach of the indices.
    """
    if n is None:
        return np.where(index < 0, -1 - index, index)
    period = 2 * n
    folded = np.mod(index, period)
    return np.where(folded >= n, period - 1 - folded, folded)


@dataclass
class StreamBuffer:
    """Raw samples from absolute index ``start`` to ``received`` (exclusive)."""

    data: np.ndarray = field(default_factory=lambda: np.empty(0))
    start: int = 0
    received: int = 0

    def append(self, x: np.ndarray) -> None:
        """Add the next chunk."""
        if x.size:
            self.data = np.concatenate([self.data, x]) if self.data.size else x.copy()
            self.received += x.size

    def segment(self, lo: int, hi: int, n: int | None = None) -> np.ndarray:
        """Samples ``lo .. hi-1`` (absolute) of the mirrored recording; ``n`` = its length once known."""
        if lo >= 0 and (n is None or hi <= n):
            return self.data[lo - self.start:hi - self.start]
        return self.data[mirror_index(np.arange(lo, hi), n) - self.start]

    def drop_before(self, index: int) -> None:
        """Forget samples before absolute ``index`` (kept: the start, while it may still be mirrored)."""
        if index > self.start:
            self.data = self.data[index - self.start:].copy()
            self.start = index
