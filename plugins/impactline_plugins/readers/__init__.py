"""Bundled readers: one module per file format, all following the ``NAME.json`` sidecar convention.

Where things live
-----------------
raw       raw binary dumps (int16/int32/float32/float64, either byte order, header, interleaved channels)
text      delimited text (CSV/TSV/semicolon/whitespace; header, units in column names, time column)
npy       NumPy .npy (memory-mapped) and .npz (memory-mapped when stored, streamed when compressed)
hdf5      HDF5 datasets through h5py, rate and scaling from attributes
wav       WAV through scipy.io.wavfile (memory-mapped)
_common   file checks, setting precedence with sources, scaling to amperes, chunked slicing

Readers with a magic number come first, so that content sniffing tries them before the fallbacks.
"""

from .hdf5 import Hdf5Reader
from .npy import NumpyReader
from .raw import RawReader
from .text import TextReader
from .wav import WavReader

__all__ = ["Hdf5Reader", "NumpyReader", "RawReader", "TextReader", "WavReader", "STAGES"]

STAGES: list[type] = [Hdf5Reader, NumpyReader, WavReader, RawReader, TextReader]
