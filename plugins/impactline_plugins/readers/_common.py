"""Pieces shared by the bundled readers.

File checks with clear errors, the precedence of settings (pipeline file > ``NAME.json`` sidecar > the
data file's own header > default, see :mod:`impactline.sidecar`) with a record of where each value came
from, the conversion of raw counts to amperes, and chunked slicing of array-like sources (NumPy memmaps,
HDF5 datasets) so that no reader ever holds more than one chunk of a recording in memory.
"""

from __future__ import annotations

import codecs
import math
import mmap
import stat
from collections.abc import Callable, Iterator
from contextlib import AbstractContextManager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from impactline import InputError, Param, Recording
from impactline.sidecar import choose, load_sidecar, sidecar_path

__all__ = [
    "HEAD_BYTES",
    "CHANNEL_PARAM",
    "GAIN_PARAM",
    "Settings",
    "Scaling",
    "check_file",
    "read_head",
    "looks_like_text",
    "signature",
    "as_float",
    "check_chunk_samples",
    "iter_array_chunks",
]

#: Bytes handed to ``sniff``.
HEAD_BYTES = 4096

GAIN_PARAM = Param(
    None,
    unit="A",
    doc="amperes per stored count; default: sidecar gain_A_per_count, then the file's own; "
    "required for integer samples, 1 for floating-point ones; negative flips the sign",
)

CHANNEL_PARAM = Param(
    None,
    kind=int,
    low=0,
    doc="0-based channel of multi-channel data; default: sidecar 'channel', or 0 when the "
    "file has a single channel",
)

# Magic numbers of the self-describing formats, so the fallback readers (raw, text) never claim them.
_HDF5_MAGIC = b"\x89HDF\r\n\x1a\n"
_NPY_MAGIC = b"\x93NUMPY"
_ZIP_MAGIC = b"PK\x03\x04"


def check_file(path: Path) -> int:
    """Check that ``path`` is a readable, non-empty regular file and return its size in bytes.

    Raises
    ------
    InputError
        For a missing file, a directory, an unreadable file or an empty one.
    """
    path = Path(path)
    try:
        info = path.stat()
    except FileNotFoundError:
        raise InputError(
            path, "file not found", "check the path (and the folder the command runs in)"
        ) from None
    except OSError as exc:
        raise InputError(
            path,
            f"file cannot be accessed ({exc.strerror or exc})",
            "check the path and its folders' permissions",
        ) from None
    if stat.S_ISDIR(info.st_mode):
        raise InputError(path, "is a folder, not a data file", "name the recording files (or a glob) instead")
    try:
        with open(path, "rb") as handle:
            handle.read(1)
    except OSError as exc:
        raise InputError(
            path, f"file cannot be read ({exc.strerror or exc})", "check the file's permissions"
        ) from None
    if info.st_size == 0:
        raise InputError(
            path,
            "file is empty (0 bytes)",
            "check that the acquisition finished writing it, or leave it out of the inputs",
        )
    return int(info.st_size)


def read_head(path: Path, n_bytes: int = HEAD_BYTES) -> bytes:
    """Return the first ``n_bytes`` of a checked (existing, non-empty) file."""
    check_file(path)
    with open(path, "rb") as handle:
        return handle.read(n_bytes)


def looks_like_text(head: bytes) -> bool:
    """True when ``head`` decodes as UTF-8 (or Latin-1) text without control characters.

    Binary samples (int16 counts, IEEE floats) almost always contain NUL or other control bytes within
    the first few kilobytes; delimited text never does.
    """
    if not head or b"\x00" in head:
        return False
    if any(b < 0x20 and b not in (0x09, 0x0A, 0x0C, 0x0D) for b in head) or 0x7F in head:
        return False
    try:
        # final=False: the 4 KiB cut may split a multi-byte character.
        codecs.getincrementaldecoder("utf-8")().decode(head, final=False)
    except UnicodeDecodeError:
        # Latin-1 text (e.g. a "µA" header from an old instrument) is still text if mostly printable.
        printable = sum(1 for b in head if 0x20 <= b < 0x7F or b in (0x09, 0x0A, 0x0D))
        return printable >= 0.95 * len(head)
    return True


def signature(head: bytes) -> str | None:
    """Name of the self-describing format whose magic number starts ``head`` (None if none does).

    HDF5 may sit after a user block of 512, 1024 or 2048 bytes (HDF5 File Format Specification,
    "Format Signature"); the others start at byte 0.
    """
    if any(head[offset : offset + 8] == _HDF5_MAGIC for offset in (0, 512, 1024, 2048)):
        return "hdf5"
    if head.startswith(_NPY_MAGIC):
        return "npy"
    if head.startswith(_ZIP_MAGIC):
        return "zip"
    if head[:4] in (b"RIFF", b"RIFX", b"RF64") and head[8:12] == b"WAVE":
        return "wav"
    return None


def as_float(value: Any) -> float | None:
    """A finite float from a header value (Python or NumPy scalar, size-1 array); None if it is not one."""
    try:
        array = np.asarray(value)
        if array.size != 1 or array.dtype.kind not in "iuf":
            return None
        number = float(array.reshape(-1)[0])
    except (TypeError, ValueError):
        return None
    return number if math.isfinite(number) else None


@dataclass
class Settings:
    """Settings of one recording resolved by precedence, with the source of each value.

    Parameters
    ----------
    path : Path
        The data file.
    sidecar : dict
        Content of ``NAME.json`` (empty when there is none).
    sidecar_file : Path or None
        The sidecar, if present.
    values, sources : dict
        Resolved values and where each came from (``pipeline``, ``sidecar``, ``file`` or ``default``).
    """

    path: Path
    sidecar: dict[str, Any]
    sidecar_file: Path | None
    values: dict[str, Any] = field(default_factory=dict)
    sources: dict[str, str] = field(default_factory=dict)

    @classmethod
    def load(cls, path: Path) -> Settings:
        """Load (and check) the sidecar of ``path``."""
        sidecar, sidecar_file = load_sidecar(path)
        return cls(Path(path), sidecar, sidecar_file)

    @property
    def sidecar_name(self) -> str:
        """File name the sidecar has or would have (``NAME.json``)."""
        return sidecar_path(self.path).name

    @property
    def extra_files(self) -> list[Path]:
        """The sidecar as a list (for :attr:`impactline.Recording.extra_files`)."""
        return [self.sidecar_file] if self.sidecar_file is not None else []

    def pick(self, key: str, pipeline_value: Any, file_value: Any = None, default: Any = None) -> Any:
        """Resolve ``key`` by precedence (:func:`impactline.sidecar.choose`) and remember the source."""
        value = choose(pipeline_value, self.sidecar, key, file_value, default)
        if pipeline_value is not None:
            source = "pipeline"
        elif key in self.sidecar:
            source = "sidecar"
        elif file_value is not None:
            source = "file"
        else:
            source = "default"
        if value is not None:
            self.values[key] = value
            self.sources[key] = source
        return value

    def sample_rate(self, pipeline_value: float | None, file_value: float | None = None) -> float:
        """Resolve the sampling rate in Hz.

        Raises
        ------
        InputError
            When no rate is given anywhere, saying where to add one.
        """
        rate = self.pick("sample_rate_hz", pipeline_value, file_value)
        if rate is None:
            raise InputError(
                self.path,
                "no sample rate: the pipeline file sets none, there is no sidecar value "
                "and the file itself does not carry one",
                f'add sample_rate = "250 kHz" (your rate) to the [reader] section of the pipeline '
                f'file, or "sample_rate_hz": 250000 to {self.sidecar_name} beside the data file',
                key="sample_rate",
            )
        return float(rate)

    def channel(self, pipeline_value: int | None, n_channels: int) -> int:
        """Resolve the 0-based channel of data with ``n_channels`` channels.

        Raises
        ------
        InputError
            When the data has several channels and none is chosen, or the choice is out of range.
        """
        channel = self.pick("channel", pipeline_value, default=0 if n_channels == 1 else None)
        if channel is None:
            raise InputError(
                self.path,
                f"the data has {n_channels} channels and none is chosen",
                f"add channel = N (0 to {n_channels - 1}) to the [reader] section, or "
                f'"channel": N to {self.sidecar_name}',
                key="channel",
            )
        channel = int(channel)
        if channel >= n_channels:
            raise InputError(
                self.path,
                f"channel {channel} chosen ({self.sources['channel']}) but the data has "
                f"{n_channels} channel(s), numbered 0 to {n_channels - 1}",
                "choose an existing channel",
                key="channel",
            )
        return channel

    def scaling(
        self,
        gain: float | None,
        offset: float | None,
        *,
        integer: bool,
        sample_type: str,
        file_gain: float | None = None,
        file_offset: float | None = None,
    ) -> Scaling:
        """Resolve the conversion of stored values to amperes.

        Parameters
        ----------
        gain, offset : float or None
            Pipeline values (A per count, A).
        integer : bool
            True when the stored samples are integer counts: they then need a gain from somewhere,
            since taking one count as one ampere is never what a lab means.
        sample_type : str
            Stored type, for the message (``"int16"``...).
        file_gain, file_offset : float, optional
            Values carried by the data file itself (HDF5 attributes, NPZ arrays...).

        Raises
        ------
        InputError
            When integer counts have no gain, or the gain is zero.
        """
        value = self.pick("gain_A_per_count", gain, file_gain)
        if value is None:
            if integer:
                raise InputError(
                    self.path,
                    f"the samples are integer counts ({sample_type}) and no gain "
                    "(amperes per count) is given anywhere",
                    'add gain = "0.305 pA" (amperes per count, from your amplifier and ADC range) '
                    f'to the [reader] section, or "gain_A_per_count": 3.05e-13 to '
                    f"{self.sidecar_name}",
                    key="gain",
                )
            value = self.pick("gain_A_per_count", None, None, 1.0)
        if value == 0:
            raise InputError(
                self.path,
                f"gain is 0 A per count ({self.sources['gain_A_per_count']}), which "
                "would make every sample 0",
                "give the amplifier's real gain",
                key="gain",
            )
        shift = self.pick("offset_A", offset, file_offset, 0.0)
        return Scaling(float(value), float(shift))

    def recording(
        self,
        sample_rate_hz: float,
        n_samples: int | None,
        iter_chunks: Callable[[int], Iterator[np.ndarray]],
        **facts: Any,
    ) -> Recording:
        """The :class:`~impactline.Recording` of this file: facts and settings as metadata, sidecar listed."""
        return Recording(
            path=self.path,
            sample_rate_hz=sample_rate_hz,
            n_samples=n_samples,
            iter_chunks=iter_chunks,
            metadata=self.metadata(**facts),
            extra_files=self.extra_files,
        )

    def metadata(self, **facts: Any) -> dict[str, Any]:
        """JSON-serialisable metadata: the given facts, the resolved settings and their sources."""
        meta = {key: _plain(value) for key, value in facts.items()}
        meta["settings"] = {key: _plain(value) for key, value in self.values.items()}
        meta["sources"] = dict(self.sources)
        if self.sidecar_file is not None:
            meta["sidecar"] = {key: _plain(value) for key, value in self.sidecar.items()}
        return meta


@dataclass(frozen=True)
class Scaling:
    """Conversion of stored values to amperes: ``(raw - zero) * gain_A_per_count + offset_A``.

    Parameters
    ----------
    gain_A_per_count : float
        Amperes per stored unit (negative to flip an instrument that records cathodic current as
        positive: impactline's convention is anodic positive).
    offset_A : float
        Added after scaling, A.
    """

    gain_A_per_count: float = 1.0
    offset_A: float = 0.0

    def apply(self, raw: np.ndarray, zero: float = 0.0) -> np.ndarray:
        """Return ``raw`` as float64 amperes (a new array, never a view of a memory map).

        ``zero`` is the stored value of zero current (128 for unsigned 8-bit PCM, otherwise 0).
        """
        if zero or self.gain_A_per_count == 1.0:
            samples = np.array(raw, dtype=np.float64, copy=True).reshape(-1)
            if zero:
                samples -= zero
            if self.gain_A_per_count != 1.0:
                samples *= self.gain_A_per_count
        else:
            # Converting and scaling in one pass: the same values (each sample widened to float64, then
            # multiplied), one sweep over the chunk fewer. np.asarray first, so a memory map's subclass
            # does not carry over to the result.
            samples = np.multiply(np.asarray(raw), self.gain_A_per_count, dtype=np.float64).reshape(-1)
        if self.offset_A:
            samples += self.offset_A
        return samples


def check_chunk_samples(chunk_samples: int) -> int:
    """Return ``chunk_samples`` as an int, raising ValueError unless it is a positive integer."""
    if isinstance(chunk_samples, bool) or int(chunk_samples) != chunk_samples or chunk_samples < 1:
        raise ValueError(f"chunk_samples must be a positive integer, got {chunk_samples!r}")
    return int(chunk_samples)


def iter_array_chunks(
    open_source: Callable[[], AbstractContextManager[Any]],
    n_samples: int,
    chunk_samples: int,
    scaling: Scaling,
    channel: int | None = None,
    zero: float = 0.0,
) -> Iterator[np.ndarray]:
    """Yield amperes from an array-like source, ``chunk_samples`` rows at a time.

    Parameters
    ----------
    open_source : callable
        Returns a context manager giving an object sliceable like an array of shape ``(n_samples,)``
        or ``(n_samples, n_channels)`` (a memmap, an HDF5 dataset). Opened when iteration starts and
        closed when it ends, so an opened :class:`~impactline.Recording` holds no file handle.
    n_samples : int
        Rows to read.
    chunk_samples : int
        Largest chunk, samples.
    scaling : Scaling
        Conversion to amperes.
    channel : int, optional
        Column of 2-D data (None for 1-D data).
    zero : float
        Stored value of zero current.
    """
    chunk_samples = check_chunk_samples(chunk_samples)
    with open_source() as source:
        mapping = getattr(source, "_mmap", None)
        for start in range(0, n_samples, chunk_samples):
            stop = min(start + chunk_samples, n_samples)
            raw = source[start:stop] if channel is None else source[start:stop, channel]
            samples = scaling.apply(raw, zero)
            if mapping is not None:
                # Pages of a memory-mapped file count in the resident set until released: drop the ones
                # read so far, so memory stays flat however long the file is (they are re-read if needed).
                mapping.madvise(mmap.MADV_DONTNEED)
            yield samples


def _plain(value: Any) -> Any:
    """A JSON-serialisable version of a setting (NumPy scalars to Python, paths and dtypes to text)."""
    if isinstance(value, (bool, int, float, str)) or value is None:
        return value
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    return str(value)
