"""Keras HDF5 files (``.h5``, ``.hdf5``, ``.weights.h5``): the loader, which tells the legacy
layout (:mod:`~steelyard.loaders.keras.legacy_h5`) from Keras 3's
(:mod:`~steelyard.loaders.keras.weights_h5`) and reads the file's structure in the HDF5
sandbox; tensors stay on disk until read.
"""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

from steelyard.errors import LoadError
from steelyard.graph import Checkpoint, Format
from steelyard.loaders.base import checkpoint_from, file_size
from steelyard.loaders.keras import hdf5_access as kh
from steelyard.loaders.keras.h5_file import H5_ERRORS, Location, reason
from steelyard.loaders.keras.hdf5_access import H5Store
from steelyard.loaders.keras.legacy_h5 import read_legacy
from steelyard.loaders.keras.weights_h5 import WeightsRead, read_weights_h5
from steelyard.loaders.sandbox import isolated
from steelyard.loaders.signatures import has_hdf5_magic


def load_h5_file(path: Path) -> Checkpoint:
    """The checkpoint of one Keras HDF5 file (runs inside :func:`isolated`)."""
    size = file_size(path)
    store = H5Store(path, Location(path, size))
    read: WeightsRead
    with store.open() as f:
        try:
            if "model_weights" in f or "layer_names" in f.attrs:
                read = read_legacy(store, f)
            elif "layers" in f or "vars" in f or "optimizer" in f:
                read = read_weights_h5(store, f, None, None)
            else:
                raise store.fail(
                    "is an HDF5 file without Keras weights (no model_weights, layer_names "
                    "or layers)"
                )
        except LoadError:
            raise
        except H5_ERRORS as exc:
            raise store.fail(f"is a damaged HDF5 file ({reason(exc)})") from None
    reading, metadata = read
    checkpoint = checkpoint_from(path, Format.KERAS_H5, size, reading, (path,))
    return replace(checkpoint, metadata=metadata) if metadata else checkpoint


class KerasH5Loader:
    """Legacy Keras ``.h5``/``.hdf5`` (whole model or weights only) and ``.weights.h5``."""

    format = Format.KERAS_H5

    def sniff(self, path: Path, head: bytes) -> bool:
        """True for any HDF5 file (the only HDF5 checkpoints we read are Keras')."""
        return has_hdf5_magic(path, head)

    def load(self, path: Path) -> Checkpoint:
        """Read the file's structure (in a time-limited child process); tensors stay on disk."""
        return isolated(path, load_h5_file, (path,), kh.load_timeout())
