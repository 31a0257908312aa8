"""What a file's first bytes must show before a loader could claim it, known without importing
the loader.

:func:`steelyard.loaders.load` asks the loaders in turn; importing one brings its format
library with it (the Keras readers import h5py, the PyTorch reader its unpickler and storage
modules), about 50-80 ms together on the benchmark host, which an ONNX or GGUF file paid on
every run only to be told "not mine" (docs/performance.md, Start-up, "Sixteenth session").
Each predicate here is a *necessary* condition of its loader's ``sniff`` (the loaders use these
same constants and functions), so skipping a loader whose predicate is False never changes
which loader claims a file; ``tests/loaders/test_signatures.py`` checks that on every fixture.

The magic numbers are the formats' own: the zip local file header ``PK\\x03\\x04`` (PKWARE
APPNOTE 4.3.7), the HDF5 superblock signature at offset 0 or a power-of-two user-block boundary
from 512 on (HDF5 File Format Specification, "Format Signature"), GGUF's ``GGUF`` (the GGUF
specification in the ggml repository), and PyTorch's legacy pickle magic number
(``MAGIC_NUMBER`` in ``torch/serialization.py``, from memory; torch's own legacy file
``fixtures/real/torch/legacy_mlp.pt`` starts with it).
"""

from __future__ import annotations

from pathlib import Path

ZIP_MAGIC = b"PK\x03\x04"
HDF5_MAGIC = b"\x89HDF\r\n\x1a\n"
GGUF_MAGIC = b"GGUF"
#: ``pickle.dumps(MAGIC_NUMBER, protocol=2)`` of torch's pre-1.6 format.
TORCH_LEGACY_MAGIC = b"\x80\x02\x8a\x0a" + (0x1950A86A20F9469CFC6C).to_bytes(10, "little") + b"."


#: The file names peft writes an adapter under (``save_pretrained``), safetensors first.
ADAPTER_FILES = ("adapter_model.safetensors", "adapter_model.bin")


def safetensors_head(head: bytes) -> bool:
    """A little-endian u64 header length, then the JSON header's opening brace."""
    return len(head) >= 9 and head[8:9] == b"{"


#: Tensor-name pieces of LoRA/DoRA factors, looked for in a safetensors header.
ADAPTER_MARKERS = (b".lora_A.", b".lora_B.", b".lora_embedding_A", b".lora_magnitude_vector")


def adapter_candidate(path: Path, head: bytes) -> bool:
    """A safetensors or zip file saved under peft's names (read when an
    ``adapter_config.json`` lies beside it), or a safetensors file whose header names LoRA
    factors: a plain safetensors checkpoint is not sniffed by the adapter reader."""
    if path.name in ADAPTER_FILES:
        return safetensors_head(head) or zip_archive(path, head)
    return safetensors_head(head) and any(marker in head for marker in ADAPTER_MARKERS)


def zip_archive(path: Path, head: bytes) -> bool:
    """A zip file (``.npz``, ``.keras``, PyTorch's archive format)."""
    return head[:4] == ZIP_MAGIC


def torch_tar(head: bytes) -> bool:
    """torch < 0.4 wrote a tar whose first member is ``sys_info`` (ustar magic at byte 257)."""
    return head[:9] == b"sys_info\x00" and head[257:262] == b"ustar"


def torch_file(path: Path, head: bytes) -> bool:
    """A zip, a legacy pickle with torch's magic number, or an old tar checkpoint."""
    return head.startswith((ZIP_MAGIC, TORCH_LEGACY_MAGIC)) or torch_tar(head)


def has_hdf5_magic(path: Path, head: bytes) -> bool:
    """HDF5 signature at offset 0 or at a user-block boundary (512, 1024, 2048, …)."""
    offsets = [0] + [512 << i for i in range(12)]
    if any(head[at : at + 8] == HDF5_MAGIC for at in offsets if at + 8 <= len(head)):
        return True
    beyond = [at for at in offsets if at + 8 > len(head)]
    if not beyond:
        return False
    try:
        with open(path, "rb") as handle:  # once for every boundary past the head
            for offset in beyond:
                handle.seek(offset)
                if handle.read(8) == HDF5_MAGIC:
                    return True
    except OSError:
        return False
    return False


def gguf_file(path: Path, head: bytes) -> bool:
    """A GGUF file."""
    return head[:4] == GGUF_MAGIC


def onnx_model(path: Path, head: bytes) -> bool:
    """The first protobuf fields are ModelProto fields (:func:`~steelyard.loaders.onnx.wire.
    looks_like_model`, the ONNX loader's own sniff; the wire module imports no library)."""
    from steelyard.loaders.onnx.wire import looks_like_model

    try:
        size = path.stat().st_size
    except OSError:
        return False
    return bool(head) and looks_like_model(head, size)
