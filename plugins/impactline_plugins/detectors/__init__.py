"""Bundled detector stages.

threshold   excursions beyond k noise sigmas from a tracked baseline, with hysteresis (threshold.py)
cusum       level changes by Page's two-sided CUSUM (cusum.py)
_common     sample buffer in absolute indices, robust sigma, chunked driver used by the tests
"""

from .cusum import CusumDetector
from .threshold import ThresholdDetector

STAGES: list[type] = [ThresholdDetector, CusumDetector]
