"""Raw binary sample dumps: a flat run of fixed-size samples, optionally after a header, interleaved channels.

A raw file carries nothing about itself, so its layout comes from the pipeline file or a ``NAME.json``
sidecar (``dtype``, ``byte_order``, ``header_bytes``, ``n_channels``, ``channel``, ``sample_rate_hz``,
``gain_A_per_count``, ``offset_A``). The samples are memory-mapped and converted chunk by chunk.
"""

from __future__ import annotations

from contextlib import nullcontext
from pathlib import Path
from typing import ClassVar

import numpy as np
from impactline import InputError, Param, Reader, Recording

from ._common import (
    CHANNEL_PARAM,
    GAIN_PARAM,
    Settings,
    check_file,
    iter_array_chunks,
    looks_like_text,
    signature,
)

__all__ = ["RawReader"]

#: Sample types a raw file may hold, by the name used in the pipeline file.
DTYPES: dict[str, str] = {"int16": "i2", "int32": "i4", "float32": "f4", "float64": "f8"}
_ORDER_CHAR = {"little": "<", "big": ">"}


class RawReader(Reader):
    """Raw binary samples (int16, int32, float32 or float64, either byte order), scaled to amperes.

    Integer counts need a gain (A per count) from the pipeline file or the sidecar; floating-point
    samples are taken as amperes unless a gain is given. With ``n_channels`` > 1 the file holds frames of
    interleaved samples (channel 0, 1, ... of sample 0, then of sample 1...) and ``channel`` picks one.
    """

    name: ClassVar[str] = "raw"
    summary: ClassVar[str] = "raw binary samples (int16/int32/float32/float64, either byte order), with gain"
    version: ClassVar[str] = "1"
    extensions: ClassVar[tuple[str, ...]] = (".bin", ".raw", ".dat")
    params: ClassVar[dict[str, Param]] = {
        **Reader.params,
        "gain": GAIN_PARAM,
        "dtype": Param(
            None,
            kind=str,
            choices=tuple(DTYPES),
            doc="stored sample type; default: the sidecar's 'dtype' (e.g. \"<i2\"); required in one "
            "of the two",
        ),
        "byte_order": Param(
            None,
            kind=str,
            choices=("little", "big"),
            doc="byte order of the samples; default: sidecar 'byte_order', else the order "
            "written in the sidecar's dtype ('<' or '>'), else little",
        ),
        "header_bytes": Param(
            None, kind=int, low=0, doc="bytes to skip at the start of the file; default: sidecar or 0"
        ),
        "n_channels": Param(
            None, kind=int, low=1, doc="interleaved channels per sample frame; default: sidecar or 1"
        ),
        "channel": CHANNEL_PARAM,
    }

    @classmethod
    def sniff(cls, path: Path, head: bytes) -> bool:
        """Binary content that is none of the self-describing formats (a raw dump cannot be proven)."""
        return bool(head) and signature(head) is None and not looks_like_text(head)

    def open(self, path: Path) -> Recording:
        """Check the layout against the file size and return the recording (samples memory-mapped).

        Raises
        ------
        impactline.errors.InputError
            Missing or empty file, bad sidecar, unknown dtype, a size that is not a whole number of
            sample frames, missing sample rate, or integer counts without a gain.
        """
        path = Path(path)
        size = check_file(path)
        settings = Settings.load(path)
        dtype = self._dtype(settings)
        header_bytes = int(settings.pick("header_bytes", self.header_bytes, default=0))
        n_channels = int(settings.pick("n_channels", self.n_channels, default=1))
        frame_bytes = dtype.itemsize * n_channels
        body = size - header_bytes
        layout = (
            f"{n_channels} channel(s) x {dtype.itemsize} bytes of {settings.values['dtype']}, "
            f"{header_bytes} header bytes"
        )
        if body <= 0:
            raise InputError(
                path,
                f"file has {size} bytes, no samples after the {header_bytes} header bytes",
                "check header_bytes (pipeline file or sidecar) and that the file holds data",
                key="header_bytes",
            )
        if body % frame_bytes:
            whole = body // frame_bytes
            raise InputError(
                path,
                f"file size {size} bytes minus {header_bytes} header bytes = {body} bytes is not a "
                f"multiple of the sample frame size {frame_bytes} bytes ({layout}); "
                f"{body % frame_bytes} bytes are left over",
                "check dtype, n_channels and header_bytes in the [reader] section or "
                f"{settings.sidecar_name}; if the acquisition was cut off, the first "
                f"{header_bytes + whole * frame_bytes} bytes hold {whole} whole frames",
            )
        n_samples = body // frame_bytes
        channel = settings.channel(self.channel, n_channels)
        rate = settings.sample_rate(self.sample_rate)
        scaling = settings.scaling(
            self.gain, self.offset, integer=dtype.kind == "i", sample_type=settings.values["dtype"]
        )

        def open_source():
            return nullcontext(
                np.memmap(path, dtype=dtype, mode="r", offset=header_bytes, shape=(n_samples, n_channels))
            )

        def iter_chunks(chunk_samples: int):
            return iter_array_chunks(open_source, n_samples, chunk_samples, scaling, channel)

        return settings.recording(
            rate,
            n_samples,
            iter_chunks,
            format="raw",
            file_bytes=size,
            frame_bytes=frame_bytes,
            numpy_dtype=dtype.str,
        )

    def _dtype(self, settings: Settings) -> np.dtype:
        """Resolve the stored sample type and byte order."""
        text_order = None
        if self.dtype is not None:
            name = settings.pick("dtype", self.dtype)
        else:
            written = settings.sidecar.get("dtype")
            if written is None:
                raise InputError(
                    settings.path,
                    "raw binary has no header, and no sample type is given",
                    f'add dtype = "int16" (or int32, float32, float64) to the [reader] section, '
                    f'or "dtype": "<i2" to {settings.sidecar_name}',
                    key="dtype",
                )
            name, text_order = _parse_dtype(settings, written)
            settings.values["dtype"], settings.sources["dtype"] = name, "sidecar"
        sidecar_order = settings.sidecar.get("byte_order")
        if self.byte_order is None and sidecar_order and text_order and sidecar_order != text_order:
            raise InputError(
                settings.sidecar_file or settings.path,
                f"'byte_order' says {sidecar_order} but 'dtype' {settings.sidecar['dtype']!r} is "
                f"{text_order}-endian",
                "remove one of the two or make them agree",
                key="byte_order",
            )
        order = settings.pick("byte_order", self.byte_order, text_order, "little")
        if settings.sources["byte_order"] == "file":  # the '<'/'>' of the sidecar's dtype string
            settings.sources["byte_order"] = "sidecar"
        return np.dtype(_ORDER_CHAR[order] + DTYPES[name])


def _parse_dtype(settings: Settings, written: str) -> tuple[str, str | None]:
    """Name (``int16``...) and explicit byte order (``little``/``big``/None) of a sidecar dtype string."""
    where = settings.sidecar_file or settings.path
    try:
        dtype = np.dtype(written)
    except TypeError:
        dtype = None
    names = {np.dtype(code).str[1:]: name for name, code in DTYPES.items()}
    name = names.get(dtype.str[1:]) if dtype is not None and dtype.kind in "if" else None
    if name is None:
        raise InputError(
            where,
            f"sidecar dtype {written!r} is not a supported sample type",
            "use one of int16, int32, float32, float64, optionally as a NumPy string with byte "
            'order such as "<i2" or ">f4"',
            key="dtype",
        )
    # NumPy normalises the machine's own order to '=', so the order is read from the text itself.
    text_order = {"<": "little", ">": "big"}.get(written.strip()[:1])
    return name, text_order
