"""NumPy ``.npy`` and ``.npz`` files, read in chunks without loading the array.

* ``.npy``: the array is memory-mapped.
* ``.npz`` stored without compression (``numpy.savez``): the member's bytes sit unchanged in the zip
  file, so the array is memory-mapped at its offset, exactly like a ``.npy``.
* ``.npz`` with compression (``numpy.savez_compressed``): the member is inflated as a stream, one chunk
  at a time; memory stays at one chunk plus zlib's 32 KiB window. The cost is time: every pass
  decompresses from the start, and a column-major (Fortran-order) 2-D array decompresses the channels
  before the chosen one.

Arrays are 1-D, or 2-D with samples along the first axis and channels along the second. An ``.npz`` may
carry the sample rate as a scalar array ``sample_rate_hz`` (or ``fs``/``sample_rate``), and the scaling as
``gain_A_per_count`` and ``offset_A``. The ``.npy`` header is parsed here (NumPy's documented format,
``numpy.lib.format``) with :func:`ast.literal_eval`; object arrays are refused, since they would need
unpickling, which can run code.
"""

from __future__ import annotations

import ast
import struct
import zipfile
from collections.abc import Iterator
from contextlib import nullcontext
from dataclasses import dataclass
from pathlib import Path
from typing import BinaryIO, ClassVar

import numpy as np
from impactline import InputError, Param, Reader, Recording

from ._common import (
    CHANNEL_PARAM,
    GAIN_PARAM,
    Scaling,
    Settings,
    as_float,
    check_chunk_samples,
    check_file,
    iter_array_chunks,
    signature,
)

__all__ = ["NumpyReader"]

_RATE_NAMES = ("sample_rate_hz", "fs", "sample_rate")
_SCALAR_NAMES = (*_RATE_NAMES, "gain_A_per_count", "offset_A")
_MAX_HEADER = 1 << 20
_SKIP_BYTES = 1 << 24


@dataclass
class _Array:
    """Where and how an array is stored."""

    name: str
    dtype: np.dtype
    shape: tuple[int, ...]
    fortran: bool
    compressed: bool
    data_offset: int  # absolute offset in the file of the first data byte (stored arrays)
    header_bytes: int
    stored_bytes: int  # bytes available for header + data

    @property
    def n_values(self) -> int:
        return int(np.prod(self.shape, dtype=np.int64))

    def describe(self) -> str:
        return f"{self.name!r} {self.dtype} {self.shape}"


class NumpyReader(Reader):
    """NumPy ``.npy`` / ``.npz`` arrays of current (A, or counts with a gain), read in chunks."""

    name: ClassVar[str] = "numpy"
    summary: ClassVar[str] = "NumPy .npy (memory-mapped) and .npz arrays (by name), with rate and gain arrays"
    version: ClassVar[str] = "1"
    extensions: ClassVar[tuple[str, ...]] = (".npy", ".npz")
    params: ClassVar[dict[str, Param]] = {
        **Reader.params,
        "gain": GAIN_PARAM,
        "array": Param(
            None,
            kind=str,
            doc="array name in an .npz; default: the array named 'current', else the only array "
            "besides the scalar settings",
        ),
        "channel": CHANNEL_PARAM,
    }

    @classmethod
    def sniff(cls, path: Path, head: bytes) -> bool:
        """An ``.npy`` magic number, or a zip file whose first member is an ``.npy``."""
        kind = signature(head)
        if kind == "npy":
            return True
        if kind == "zip" and len(head) >= 30:
            name_length = struct.unpack("<H", head[26:28])[0]
            return head[30 : 30 + name_length].endswith(b".npy")
        return False

    def open(self, path: Path) -> Recording:
        """Read the array's header (and the npz's scalar settings) and return the recording.

        Raises
        ------
        impactline.errors.InputError
            Not an .npy/.npz, truncated, object or non-numeric dtype, no or several candidate arrays,
            more than two dimensions, missing sample rate, integer counts without a gain.
        """
        path = Path(path)
        size = check_file(path)
        settings = Settings.load(path)
        with open(path, "rb") as handle:
            head = handle.read(8)
        kind = signature(head)
        file_values: dict[str, float] = {}
        if kind == "npy":
            with open(path, "rb") as handle:
                array = _read_header(path, handle, "array", compressed=False, base=0, stored=size)
            container = "npy"
        elif kind == "zip":
            arrays = _npz_members(path)
            array = self._pick_array(path, arrays)
            file_values = _npz_scalars(path, arrays)
            container = "npz"
        else:
            raise InputError(
                path,
                "is neither a NumPy .npy file nor an .npz archive (no magic number)",
                "save with numpy.save or numpy.savez, or choose the reader for its real format",
            )
        if array.dtype.kind not in "iuf":
            raise InputError(
                path,
                f"array {array.describe()} is not of a numeric type",
                "store the current as integers or floats",
                key=array.name,
            )
        if array.header_bytes + array.n_values * array.dtype.itemsize > array.stored_bytes:
            raise InputError(
                path,
                f"array {array.describe()} needs "
                f"{array.n_values * array.dtype.itemsize} data bytes but the file holds "
                f"{array.stored_bytes - array.header_bytes}: it is truncated",
                "copy the file again from the acquisition computer",
                key=array.name,
            )
        if len(array.shape) not in (1, 2) or array.n_values == 0:
            raise InputError(
                path,
                f"array {array.describe()} must be 1-D or 2-D (samples, channels) and not empty",
                "save the current as a 1-D array",
                key=array.name,
            )
        n_samples = array.shape[0]
        n_channels = array.shape[1] if len(array.shape) == 2 else 1
        if n_channels > n_samples:
            raise InputError(
                path,
                f"array {array.describe()} has more columns than rows; impactline reads "
                "samples along the first axis (n_samples, n_channels)",
                "save the transposed array (a.T)",
                key=array.name,
            )
        channel = settings.channel(self.channel, n_channels)
        rate = settings.sample_rate(
            self.sample_rate, next((file_values[n] for n in _RATE_NAMES if n in file_values), None)
        )
        scaling = settings.scaling(
            self.gain,
            self.offset,
            integer=array.dtype.kind in "iu",
            sample_type=str(array.dtype),
            file_gain=file_values.get("gain_A_per_count"),
            file_offset=file_values.get("offset_A"),
        )
        column = channel if len(array.shape) == 2 else None

        def iter_chunks(chunk_samples: int) -> Iterator[np.ndarray]:
            if not array.compressed:
                return iter_array_chunks(
                    lambda: nullcontext(
                        np.memmap(
                            path,
                            dtype=array.dtype,
                            mode="r",
                            offset=array.data_offset,
                            shape=array.shape,
                            order="F" if array.fortran else "C",
                        )
                    ),
                    n_samples,
                    chunk_samples,
                    scaling,
                    column,
                )
            return _stream_member(path, array, check_chunk_samples(chunk_samples), scaling, channel)

        return settings.recording(
            rate,
            n_samples,
            iter_chunks,
            format=container,
            array=array.name,
            shape=list(array.shape),
            dtype=array.dtype.str,
            fortran_order=array.fortran,
            compressed=array.compressed,
            access="stream (inflate)" if array.compressed else "memmap",
        )

    def _pick_array(self, path: Path, arrays: dict[str, _Array]) -> _Array:
        listed = ", ".join(a.describe() for a in arrays.values()) or "none"
        if self.array is not None:
            if self.array not in arrays:
                raise InputError(
                    path,
                    f"has no array named {self.array!r}; it holds {listed}",
                    "correct array in the [reader] section",
                    key="array",
                )
            return arrays[self.array]
        if "current" in arrays:
            return arrays["current"]
        candidates = [a for name, a in arrays.items() if name not in _SCALAR_NAMES]
        if len(candidates) != 1:
            raise InputError(
                path,
                f"holds {len(candidates)} candidate arrays ({listed}) and none is named 'current'",
                'set array = "NAME" in the [reader] section',
                key="array",
            )
        return candidates[0]


def _read_exact(stream: BinaryIO, n_bytes: int) -> bytes:
    """Read ``n_bytes`` (fewer only at the end of the stream)."""
    parts = []
    while n_bytes > 0:
        part = stream.read(n_bytes)
        if not part:
            break
        parts.append(part)
        n_bytes -= len(part)
    return b"".join(parts)


def _read_header(
    path: Path, stream: BinaryIO, name: str, *, compressed: bool, base: int, stored: int
) -> _Array:
    """Parse an ``.npy`` header (format versions 1.0, 2.0, 3.0) from ``stream``."""
    preamble = _read_exact(stream, 8)
    if preamble[:6] != b"\x93NUMPY":
        raise InputError(
            path,
            f"array {name!r} does not start with the .npy magic number",
            "save with numpy.save / numpy.savez",
            key=name,
        )
    major = preamble[6]
    if major not in (1, 2, 3):
        raise InputError(
            path,
            f"array {name!r} uses .npy format version {major}, which is unknown here",
            "save with numpy.save / numpy.savez",
            key=name,
        )
    size_format = "<H" if major == 1 else "<I"
    length_bytes = _read_exact(stream, struct.calcsize(size_format))
    header_length = -1
    if len(length_bytes) == struct.calcsize(size_format):
        header_length = struct.unpack(size_format, length_bytes)[0]
    if not 0 < header_length <= _MAX_HEADER:
        raise InputError(path, f"array {name!r} has a damaged .npy header", "save the array again", key=name)
    text = _read_exact(stream, header_length).decode("utf-8" if major == 3 else "latin-1", errors="replace")
    try:
        header = ast.literal_eval(text)
        dtype = np.lib.format.descr_to_dtype(header["descr"])
        shape = tuple(int(n) for n in header["shape"])
        fortran = bool(header["fortran_order"])
    except (ValueError, SyntaxError, KeyError, TypeError) as exc:
        raise InputError(
            path, f"array {name!r} has an unreadable .npy header ({exc})", "save the array again", key=name
        ) from None
    if dtype.hasobject:
        raise InputError(
            path,
            f"array {name!r} holds Python objects, which would need unpickling (refused: "
            "unpickling can run code)",
            "save a numeric array",
            key=name,
        )
    header_bytes = 8 + len(length_bytes) + header_length
    return _Array(name, dtype, shape, fortran, compressed, base + header_bytes, header_bytes, stored)


def _npz_members(path: Path) -> dict[str, _Array]:
    """Headers of every ``.npy`` member of an ``.npz``, read without loading any data."""
    arrays = {}
    try:
        with zipfile.ZipFile(path) as archive, open(path, "rb") as raw:
            for info in archive.infolist():
                if not info.filename.endswith(".npy"):
                    continue
                name = info.filename[:-4]
                if info.compress_type == zipfile.ZIP_STORED:
                    raw.seek(info.header_offset)
                    local = raw.read(30)
                    if local[:4] != b"PK\x03\x04":
                        raise zipfile.BadZipFile(f"member {info.filename} has no local header")
                    name_length, extra_length = struct.unpack("<HH", local[26:30])
                    start = info.header_offset + 30 + name_length + extra_length
                    raw.seek(start)
                    arrays[name] = _read_header(
                        path, raw, name, compressed=False, base=start, stored=info.file_size
                    )
                else:
                    with archive.open(info) as member:
                        arrays[name] = _read_header(
                            path, member, name, compressed=True, base=0, stored=info.file_size
                        )
    except (zipfile.BadZipFile, zipfile.LargeZipFile, NotImplementedError, EOFError, OSError) as exc:
        raise InputError(
            path,
            f"is not a readable .npz (zip) archive ({exc})",
            "copy the file again, or save it anew with numpy.savez",
        ) from None
    return arrays


def _npz_scalars(path: Path, arrays: dict[str, _Array]) -> dict[str, float]:
    """Scalar settings stored as arrays in the npz (sample rate, gain, offset)."""
    found = {name: a for name, a in arrays.items() if name in _SCALAR_NAMES}
    values = {}
    if found:
        with np.load(path, allow_pickle=False) as archive:
            for name, array in found.items():
                value = as_float(archive[name]) if array.n_values == 1 else None
                if value is None:
                    raise InputError(
                        path,
                        f"array {array.describe()} must hold one finite number",
                        f"store {name} as a scalar, e.g. numpy.savez(..., {name}=250000.0)",
                        key=name,
                    )
                values[name] = value
    if any(values.get(name, 1.0) <= 0 for name in _RATE_NAMES):
        raise InputError(
            path,
            "sample rate stored in the file is not positive",
            "store the rate in Hz",
            key="sample_rate_hz",
        )
    return values


def _stream_member(
    path: Path, array: _Array, chunk_samples: int, scaling: Scaling, channel: int
) -> Iterator[np.ndarray]:
    """Inflate a compressed npz member chunk by chunk."""
    n_samples = array.shape[0]
    n_channels = array.shape[1] if len(array.shape) == 2 else 1
    itemsize = array.dtype.itemsize
    # Column-major 2-D data holds each channel contiguously; row-major interleaves them.
    blocked = array.fortran and n_channels > 1
    with zipfile.ZipFile(path) as archive, archive.open(array.name + ".npy") as member:
        _read_header(path, member, array.name, compressed=True, base=0, stored=array.stored_bytes)
        if blocked:
            remaining = channel * n_samples * itemsize
            while remaining > 0:
                remaining -= len(_read_exact(member, min(remaining, _SKIP_BYTES)))
        row_items = 1 if blocked else n_channels
        for start in range(0, n_samples, chunk_samples):
            rows = min(chunk_samples, n_samples - start)
            data = _read_exact(member, rows * row_items * itemsize)
            if len(data) != rows * row_items * itemsize:
                raise InputError(
                    path,
                    f"array {array.name!r} ends early (compressed data cut short)",
                    "copy the file again",
                    sample_index=start + len(data) // (row_items * itemsize),
                )
            values = np.frombuffer(data, dtype=array.dtype).reshape(rows, row_items)
            yield scaling.apply(values[:, 0 if blocked else channel])
