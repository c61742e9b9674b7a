"""Bundled feature extractors (stage kind ``measure``).

Where things live
-----------------
pulse       pulse arithmetic shared by the extractors: level crossings, rise time, FWHM, edge lines,
            exponential decay fit, sub-peaks, Gaussian-filter amplitude loss
context     ``baseline-context``: baselines before/after, charge over a sloping baseline, local noise
shape       ``pulse-shape``: peak time, rise time, FWHM, extrapolated duration, decay constant, sub-peaks
bandwidth   ``bandwidth-limit``: short-event flag and the amplitude fraction the filter chain keeps
waveform    ``waveform`` (and -32, -128): each event's aligned, resampled waveform
"""

from .bandwidth import BandwidthLimit
from .context import BaselineContext
from .shape import PulseShape
from .waveform import WAVEFORM_STAGES

STAGES: list[type] = [BaselineContext, PulseShape, BandwidthLimit, *WAVEFORM_STAGES]
