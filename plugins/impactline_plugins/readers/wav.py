"""WAV files (RIFF/RIFX/RF64 WAVE) through :func:`scipy.io.wavfile.read` with ``mmap=True``.

Why a lab writes current into WAV: the format is universal, carries its sample rate, and a cheap
audio-grade digitiser produces it. What it does not carry is the amplifier's scale, so:

* integer PCM (8-, 16-, 32-bit) holds counts and needs a gain, A per count, from the pipeline file
  (``gain = "0.305 pA"``) or the sidecar (``"gain_A_per_count": 3.05e-13``); without one the reader
  stops and asks, because no default (1 A per count, or full scale = 1 A) would be right. 8-bit PCM is
  unsigned with zero at 128 (IBM & Microsoft, Multimedia Programming Interface and Data Specifications
  1.0, 1991, WAVE PCM data format; from memory); the reader subtracts 128 first.
* floating-point WAV (32- or 64-bit IEEE) is taken as amperes as written, unless a gain is given (for a
  file normalised to full scale, give the amperes that full scale stands for).

24-bit PCM cannot be memory-mapped by SciPy; convert it to 32-bit PCM first.
"""

from __future__ import annotations

import warnings
from collections.abc import Iterator
from contextlib import nullcontext
from pathlib import Path
from typing import ClassVar

import numpy as np
from impactline import InputError, Param, Reader, Recording
from scipy.io import wavfile

from ._common import CHANNEL_PARAM, GAIN_PARAM, Settings, check_file, iter_array_chunks, signature

__all__ = ["WavReader"]


class WavReader(Reader):
    """WAV audio-format recordings: integer PCM with a gain (A per count), or float samples in A."""

    name: ClassVar[str] = "wav"
    summary: ClassVar[str] = (
        "WAV (PCM 8/16/32-bit with a gain in A per count, or float in A), rate from header"
    )
    version: ClassVar[str] = "1"
    extensions: ClassVar[tuple[str, ...]] = (".wav",)
    params: ClassVar[dict[str, Param]] = {**Reader.params, "gain": GAIN_PARAM, "channel": CHANNEL_PARAM}

    @classmethod
    def sniff(cls, path: Path, head: bytes) -> bool:
        """A RIFF (or RIFX/RF64) container of form type WAVE."""
        return signature(head) == "wav"

    def open(self, path: Path) -> Recording:
        """Read the WAV header and return the recording (samples memory-mapped).

        Raises
        ------
        impactline.errors.InputError
            Not a readable WAV (or 24-bit); no samples; several channels and none chosen; integer PCM
            without a gain.
        """
        path = Path(path)
        check_file(path)
        settings = Settings.load(path)
        header_rate, data, notes = _read(path)
        shape, dtype = data.shape, data.dtype
        del data  # the map is reopened for each pass
        if shape[0] == 0:
            raise InputError(path, "WAV file holds no samples", "check that the recording was written")
        n_channels = shape[1] if len(shape) == 2 else 1
        channel = settings.channel(self.channel, n_channels)
        rate = settings.sample_rate(self.sample_rate, float(header_rate) if header_rate > 0 else None)
        integer = dtype.kind in "iu"
        kind = f"{dtype.itemsize * 8}-bit {'PCM' if integer else 'float'}"
        scaling = settings.scaling(self.gain, self.offset, integer=integer, sample_type=kind)
        zero = 128.0 if dtype == np.uint8 else 0.0
        column = channel if len(shape) == 2 else None
        n_samples = int(shape[0])

        def open_source():
            return nullcontext(_read(path)[1])

        def iter_chunks(chunk_samples: int) -> Iterator[np.ndarray]:
            return iter_array_chunks(open_source, n_samples, chunk_samples, scaling, column, zero=zero)

        return settings.recording(
            rate,
            n_samples,
            iter_chunks,
            format="wav",
            sample_type=kind,
            n_channels=n_channels,
            header_sample_rate_hz=int(header_rate),
            warnings=notes,
        )


def _read(path: Path) -> tuple[int, np.ndarray, list[str]]:
    """Header rate, memory-mapped samples and SciPy's warnings (e.g. skipped chunks) of a WAV file."""
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            rate, data = wavfile.read(path, mmap=True)
    except (ValueError, OSError, EOFError, IndexError, KeyError) as exc:
        text = str(exc)
        fix = "check the file, or choose the reader for its real format"
        if "24" in text or "mmap" in text:
            fix = "convert it to 32-bit PCM (or float) WAV, which can be memory-mapped"
        raise InputError(path, f"is not a WAV file this reader can map ({text})", fix) from None
    return int(rate), data, [str(w.message) for w in caught]
