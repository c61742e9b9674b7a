"""Bundled filter stages.

bessel      Bessel low-pass, causal or zero-phase (cutoff = -3 dB point of the applied response)
wavelet     wavelet shrinkage denoising (universal, SURE, BayesShrink), block-wise with margins
baseline    running median / percentile baseline removal over a centred window
mains       notch filters at the mains frequency and its harmonics, causal or zero-phase
"""

from .baseline import Baseline
from .bessel import Bessel
from .mains import Mains
from .wavelet import Wavelet

STAGES: list[type] = [Bessel, Wavelet, Baseline, Mains]
