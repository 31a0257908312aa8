"""The loaders' signatures (steelyard.loaders.signatures) are necessary conditions of their
sniffs, so skipping the loaders whose signature fails never changes which loader claims a file.

References: every file under ``fixtures/`` (written by torch, keras, onnx, safetensors, numpy,
h5py and the gguf package; see fixtures/README.md), files written here by the reference
libraries, and arbitrary bytes behind each format's magic number (hypothesis). The magic
numbers themselves come from the formats' specifications (module docstring).
"""

from __future__ import annotations

import zipfile
from pathlib import Path

import h5py
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from steelyard.loaders import _HEAD_BYTES, _REGISTRY, first_format, loaders, sniff_format
from tests._fresh_process import audited_imports
from tests.conftest import FIXTURES


def _head(path: Path) -> bytes:
    with open(path, "rb") as handle:
        return handle.read(_HEAD_BYTES)


def _first_claim(path: Path, head: bytes) -> str | None:
    """The format the first loader to sniff ``path`` gives, asking every loader (no
    signatures): what sniff_format answered before the signatures existed."""
    return first_format(loaders(), path, head)


def _check(path: Path) -> None:
    head = _head(path)
    everyone = loaders()
    assert len(everyone) == len(_REGISTRY)
    for loader, (_module, _name, signature) in zip(everyone, _REGISTRY, strict=True):
        try:
            claims = loader.sniff(path, head)
        except Exception:
            claims = False
        if claims and signature is not None:
            assert signature(path, head), (path.name, type(loader).__name__)
    assert sniff_format(path) == _first_claim(path, head), path


FIXTURE_FILES = sorted(p for p in FIXTURES.rglob("*") if p.is_file() and p.suffix != ".py")


def test_the_fixtures_cover_every_format() -> None:
    found = {sniff_format(p) for p in FIXTURE_FILES}
    assert {"safetensors", "onnx", "keras", "keras-h5", "npz", "pytorch", "gguf"} <= found, found


@pytest.mark.parametrize("path", FIXTURE_FILES, ids=lambda p: str(p.relative_to(FIXTURES)))
def test_every_fixture_is_claimed_as_before(path: Path) -> None:
    _check(path)


def test_files_written_here_by_the_reference_writers(tmp_path: Path) -> None:
    rng = np.random.default_rng(11)
    weights = {"dense.weight": rng.normal(size=(4, 3)).astype(np.float32)}
    np.savez(tmp_path / "plain.npz", **weights)  # type: ignore[arg-type]
    with h5py.File(tmp_path / "plain.h5", "w", userblock_size=1024) as h5:
        h5["dense/kernel"] = weights["dense.weight"].T
    with zipfile.ZipFile(tmp_path / "other.zip", "w") as archive:
        archive.writestr("readme.txt", "not a checkpoint")
    for path in sorted(tmp_path.iterdir()):
        _check(path)
    assert sniff_format(tmp_path / "plain.h5") == "keras-h5"  # the HDF5 signature after a user block


_MAGICS = [
    b"",
    b"PK\x03\x04",  # zip
    b"\x10\x00\x00\x00\x00\x00\x00\x00{",  # a safetensors header length and brace
    b"\x89HDF\r\n\x1a\n",  # HDF5
    b"GGUF",
    b"\x08\x07\x12\x04",  # ModelProto ir_version 7, then a string field
    b"sys_info\x00",  # torch's old tar
]


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(magic=st.sampled_from(_MAGICS), rest=st.binary(max_size=600))
def test_arbitrary_bytes_behind_each_magic(tmp_path: Path, magic: bytes, rest: bytes) -> None:
    path = tmp_path / "blob.bin"
    path.write_bytes(magic + rest)
    _check(path)


#: What a file the zip and HDF5 readers cannot read must not import.
_HEAVY = ("h5py", "steelyard.loaders.keras.archive", "steelyard.loaders.pytorch.loader",
          "steelyard.loaders.keras.h5_loader")


@pytest.mark.parametrize("name", ["gguf/types.gguf", "real/onnx/cnn_bn.onnx"])
def test_onnx_and_gguf_files_skip_the_zip_and_hdf5_readers(name: str) -> None:
    path = FIXTURES / name
    if not path.exists():
        pytest.skip(f"{name} not among the fixtures")
    _findings, imported = audited_imports(path, *_HEAVY)
    assert [m for m in _HEAVY if imported[m]] == []


def test_a_loader_without_a_signature_is_asked_for_every_file() -> None:
    unsigned = [name for _module, name, signature in _REGISTRY if signature is None]
    assert unsigned == ["SafetensorsLoader"]
    assert all(callable(getattr(loader, "sniff", None)) for loader in loaders())


def test_a_signature_that_fails_asks_the_loader_anyway(tmp_path: Path) -> None:
    from steelyard.loaders import _shows

    def broken(path: Path, head: bytes) -> bool:
        raise ValueError("a check that could not decide")

    assert _shows(broken, tmp_path, b"") is True


@pytest.mark.parametrize("userblock", [512, 8192, 65536])
def test_the_hdf5_signature_is_found_after_a_user_block_beyond_the_head(
    tmp_path: Path, userblock: int
) -> None:
    # Reference: h5py writes the user block; the HDF5 specification puts the superblock
    # signature at 0 or at a power-of-two boundary from 512 on, here past the 4 KiB head too.
    from steelyard.loaders.signatures import has_hdf5_magic

    path = tmp_path / "weights.h5"
    with h5py.File(path, "w", userblock_size=userblock) as h5:
        h5["dense/kernel"] = np.ones((4, 3), np.float32)
    head = path.read_bytes()[:_HEAD_BYTES]
    assert has_hdf5_magic(path, head)
    # The same bytes with the signature broken are not HDF5, whatever the file's length.
    data = bytearray(path.read_bytes())
    data[userblock : userblock + 8] = b"\x00" * 8
    broken = tmp_path / "broken.h5"
    broken.write_bytes(bytes(data) + b"\x00" * (2**21))
    assert not has_hdf5_magic(broken, bytes(data[:_HEAD_BYTES]))
