"""Stages bundled with impactline, registered exactly as an outside plugin is.

This package is found through the ``impactline.plugins`` entry point named ``bundled`` and implements
the single hook ``impactline_stages``. It can be blocked or replaced like any other plugin.

Where things live
-----------------
readers/      one module per file format (raw binary, delimited text, NumPy, HDF5, WAV)
filters/      Bessel low-pass, wavelet denoising, baseline removal, mains notch
detectors/    threshold with hysteresis, CUSUM change-points
measures/     per-event feature extractors
classifiers/  clustering and trained classifiers of event shapes
"""

from impactline import hookimpl

from . import classifiers, detectors, filters, measures, readers

__version__ = "0.1.0"


@hookimpl
def impactline_stages() -> list[type]:
    """Return every bundled stage class."""
    return [*readers.STAGES, *filters.STAGES, *detectors.STAGES, *measures.STAGES, *classifiers.STAGES]
