"""HDF5 files (through h5py): one numeric dataset read in slices.

The sample rate is looked for in the attributes of the dataset, then of each group above it up to the
root: ``sample_rate_hz``, ``sampling_rate_hz``, ``sample_rate``, ``sampling_rate``, ``fs`` (Hz; a text
value may carry a unit, "250 kHz"), or a sampling interval ``sample_interval_s``/``dt`` (s). The scaling
comes from the dataset's ``gain_A_per_count`` and ``offset_A`` attributes, or from the packing attributes
of the CF conventions (``scale_factor``, ``add_offset``, with ``units`` such as "pA"; Eaton et al., NetCDF
Climate and Forecast Metadata Conventions, section 8.1 "Packed data"). Pipeline and sidecar values win.
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any, ClassVar

import h5py
import numpy as np
from impactline import InputError, Param, Reader, Recording, parse_quantity
from impactline.units import QuantityError

from ._common import CHANNEL_PARAM, GAIN_PARAM, Settings, as_float, check_file, iter_array_chunks, signature

__all__ = ["Hdf5Reader"]

_RATE_ATTRS = ("sample_rate_hz", "sampling_rate_hz", "sample_rate", "sampling_rate", "fs")
_INTERVAL_ATTRS = ("sample_interval_s", "sampling_interval_s", "dt")


class Hdf5Reader(Reader):
    """One numeric dataset of an HDF5 file (1-D, or 2-D as samples x channels), read in slices."""

    name: ClassVar[str] = "hdf5"
    summary: ClassVar[str] = "HDF5 dataset (by path), with sample rate and gain from its attributes"
    version: ClassVar[str] = "1"
    extensions: ClassVar[tuple[str, ...]] = (".h5", ".hdf5")
    params: ClassVar[dict[str, Param]] = {
        **Reader.params,
        "gain": GAIN_PARAM,
        "dataset": Param(
            None,
            kind=str,
            doc="path of the dataset in the file, e.g. '/run1/current'; default: the only 1-D "
            "numeric dataset",
        ),
        "channel": CHANNEL_PARAM,
    }

    @classmethod
    def sniff(cls, path: Path, head: bytes) -> bool:
        """The HDF5 format signature at byte 0 or after a user block."""
        return signature(head) == "hdf5"

    def open(self, path: Path) -> Recording:
        """Find the dataset and its attributes and return the recording.

        Raises
        ------
        impactline.errors.InputError
            Not HDF5; no such dataset, or several candidates (all listed); non-numeric or empty dataset;
            an attribute that is not a number; missing sample rate; integer counts without a gain.
        """
        path = Path(path)
        check_file(path)
        settings = Settings.load(path)
        try:
            handle = h5py.File(path, "r")
        except OSError as exc:
            raise InputError(
                path,
                f"is not a readable HDF5 file ({exc})",
                "check the file, or choose the reader for its real format",
            ) from None
        with handle:
            dataset = self._find(path, handle)
            shape = tuple(dataset.shape)
            dtype = dataset.dtype
            rate_value, rate_attr = _attribute_rate(path, dataset)
            gain, offset, file_facts = _attribute_scaling(path, dataset)
            dataset_name = dataset.name
            storage = {
                "chunks": list(dataset.chunks) if dataset.chunks else None,
                "compression": dataset.compression,
            }
        n_samples = shape[0]
        n_channels = shape[1] if len(shape) == 2 else 1
        channel = settings.channel(self.channel, n_channels)
        rate = settings.sample_rate(self.sample_rate, rate_value)
        scaling = settings.scaling(
            self.gain,
            self.offset,
            integer=dtype.kind in "iu",
            sample_type=str(dtype),
            file_gain=gain,
            file_offset=offset,
        )
        column = channel if len(shape) == 2 else None

        @contextmanager
        def open_source() -> Iterator[Any]:
            with h5py.File(path, "r") as live:
                try:
                    yield live[dataset_name]
                except OSError as exc:
                    raise InputError(
                        path,
                        f"dataset {dataset_name!r} cannot be read ({exc})",
                        "check the file (it may be damaged)",
                        key=dataset_name,
                    ) from None

        def iter_chunks(chunk_samples: int) -> Iterator[np.ndarray]:
            return iter_array_chunks(open_source, n_samples, chunk_samples, scaling, column)

        return settings.recording(
            rate,
            n_samples,
            iter_chunks,
            format="hdf5",
            dataset=dataset_name,
            shape=list(shape),
            dtype=dtype.str,
            sample_rate_attribute=rate_attr,
            **file_facts,
            **storage,
        )

    def _find(self, path: Path, handle: h5py.File) -> h5py.Dataset:
        """The dataset named by the ``dataset`` parameter, or the only 1-D numeric one."""
        numeric: list[h5py.Dataset] = []

        def collect(_name: str, node: Any) -> None:
            if isinstance(node, h5py.Dataset) and node.dtype.kind in "iuf" and node.ndim in (1, 2):
                numeric.append(node)

        handle.visititems(collect)
        listed = ", ".join(f"{d.name} {d.dtype} {d.shape}" for d in numeric) or "none"
        if self.dataset is not None:
            node = handle.get(self.dataset)
            if not isinstance(node, h5py.Dataset):
                what = "is a group" if isinstance(node, h5py.Group) else "does not exist"
                raise InputError(
                    path,
                    f"dataset {self.dataset!r} {what}; numeric datasets: {listed}",
                    "correct dataset in the [reader] section",
                    key="dataset",
                )
            dataset = node
        else:
            ones = [d for d in numeric if d.ndim == 1]
            if len(ones) != 1:
                raise InputError(
                    path,
                    f"holds {len(ones)} 1-D numeric datasets, so none is chosen; numeric datasets: {listed}",
                    'set dataset = "/PATH" in the [reader] section',
                    key="dataset",
                )
            dataset = ones[0]
        if dataset.dtype.kind not in "iuf" or dataset.ndim not in (1, 2) or dataset.size == 0:
            raise InputError(
                path,
                f"dataset {dataset.name} {dataset.dtype} {dataset.shape} must be numeric, 1-D "
                "or 2-D (samples, channels), and not empty",
                "choose another dataset",
                key=dataset.name,
            )
        if dataset.ndim == 2 and dataset.shape[1] > dataset.shape[0]:
            raise InputError(
                path,
                f"dataset {dataset.name} {dataset.shape} has more columns than rows; "
                "impactline reads samples along the first axis (n_samples, n_channels)",
                "store the transposed array",
                key=dataset.name,
            )
        return dataset


def _attribute_number(path: Path, node: Any, key: str, unit: str) -> float:
    """A finite number from an attribute (numeric, or text with an SI unit); positive for Hz and s."""
    value = node.attrs[key]
    if isinstance(value, (bytes, np.bytes_)):
        value = value.decode("utf-8", errors="replace")
    number = None
    if isinstance(value, str):
        try:
            number = parse_quantity(value, unit)
        except QuantityError:
            number = None
    else:
        number = as_float(value)
    positive = unit in ("Hz", "s")
    if number is None or (positive and number <= 0):
        wanted = f"a {'positive ' if positive else ''}number{f' in {unit}' if unit else ''}"
        raise InputError(
            path,
            f"attribute {key!r} of {node.name} must be {wanted}, got {value!r}",
            "correct the attribute, or give the value in the pipeline file or sidecar",
            key=f"{node.name}@{key}",
        )
    return number


def _attribute_rate(path: Path, dataset: h5py.Dataset) -> tuple[float | None, str | None]:
    """Sample rate from the dataset's attributes or those of a group above it."""
    node: Any = dataset
    while True:
        for key in _RATE_ATTRS:
            if key in node.attrs:
                return _attribute_number(path, node, key, "Hz"), f"{node.name}@{key}"
        for key in _INTERVAL_ATTRS:
            if key in node.attrs:
                return 1.0 / _attribute_number(path, node, key, "s"), f"{node.name}@{key}"
        if node.name == "/":
            return None, None
        node = node.parent


def _attribute_scaling(
    path: Path, dataset: h5py.Dataset
) -> tuple[float | None, float | None, dict[str, Any]]:
    """Gain (A per stored unit) and offset (A) from the dataset's attributes."""
    attrs = dataset.attrs
    facts: dict[str, Any] = {}
    if "gain_A_per_count" in attrs:
        gain = _attribute_number(path, dataset, "gain_A_per_count", "A")
        offset = _attribute_number(path, dataset, "offset_A", "A") if "offset_A" in attrs else None
        return gain, offset, facts
    unit_scale = None
    if "units" in attrs:
        units = attrs["units"]
        units = (
            units.decode("utf-8", errors="replace") if isinstance(units, (bytes, np.bytes_)) else str(units)
        )
        facts["units"] = units
        try:
            unit_scale = parse_quantity("1 " + units.strip(), "A")
        except QuantityError:
            unit_scale = None  # e.g. "counts": not a current unit, so it says nothing about scale
    scale_factor = _attribute_number(path, dataset, "scale_factor", "") if "scale_factor" in attrs else None
    add_offset = _attribute_number(path, dataset, "add_offset", "") if "add_offset" in attrs else None
    if scale_factor is None and unit_scale is None:
        gain = None
    else:
        gain = (1.0 if scale_factor is None else scale_factor) * (1.0 if unit_scale is None else unit_scale)
    offset = None if add_offset is None else add_offset * (1.0 if unit_scale is None else unit_scale)
    return gain, offset, facts
