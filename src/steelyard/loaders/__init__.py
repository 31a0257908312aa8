"""Loaders: one module per checkpoint format, chosen by content rather than extension.

:func:`load` is the single entry point: it sniffs the file's first bytes, asks each loader in
turn, and returns the :class:`~steelyard.graph.Checkpoint` of the first that recognises it.
"""

from __future__ import annotations

import importlib
from collections.abc import Callable, Iterable, Iterator
from pathlib import Path

from steelyard.errors import LoadError
from steelyard.graph import Checkpoint
from steelyard.loaders import signatures
from steelyard.loaders.base import Loader
from steelyard.safepath import kind_of, open_regular

#: (module, class, what the file's head must show) of each loader, in sniffing order. A loader
#: is imported on first use, and only when its signature (a necessary condition of its
#: ``sniff``, see :mod:`steelyard.loaders.signatures`) holds: an ONNX or GGUF file then never
#: imports the Keras and PyTorch readers, and a broken optional reader never stops the others.
#: None: the loader's own sniff is the test.
_REGISTRY: tuple[tuple[str, str, Callable[[Path, bytes], bool] | None], ...] = (
    ("steelyard.loaders.adapter", "AdapterLoader", signatures.adapter_candidate),
    ("steelyard.loaders.safetensors", "SafetensorsLoader", None),
    ("steelyard.loaders.npz", "NpzLoader", signatures.zip_archive),
    ("steelyard.loaders.keras.archive", "KerasArchiveLoader", signatures.zip_archive),
    ("steelyard.loaders.pytorch.loader", "PytorchLoader", signatures.torch_file),
    ("steelyard.loaders.keras.h5_loader", "KerasH5Loader", signatures.has_hdf5_magic),
    ("steelyard.loaders.onnx.loader", "OnnxLoader", signatures.onnx_model),
    ("steelyard.loaders.gguf", "GgufLoader", signatures.gguf_file),
)

SUPPORTED = (
    "safetensors (single or sharded), ONNX, Keras (.keras, legacy .h5, .weights.h5), "
    "NumPy .npz, PyTorch zip checkpoints, GGUF"
)

_HEAD_BYTES = 4096


def _each_loader(path: Path | None = None, head: bytes = b"") -> Iterator[Loader]:
    """Every available loader, in sniffing order, each imported only when its turn comes: a
    file the first loaders recognise never imports the others (docs/performance.md, Start-up).
    With ``path`` and ``head``, only the loaders whose signature they show."""
    for module_name, class_name, signature in _REGISTRY:
        if path is not None and signature is not None and not _shows(signature, path, head):
            continue
        try:
            module = importlib.import_module(module_name)
        except ModuleNotFoundError as exc:
            if exc.name == module_name:
                continue
            raise
        yield getattr(module, class_name)()


def _shows(signature: Callable[[Path, bytes], bool], path: Path, head: bytes) -> bool:
    """Whether the file's head shows ``signature``; when the check itself fails the loader
    is asked anyway, as it was before signatures existed."""
    try:
        return signature(path, head)
    except Exception:
        return True


def loaders() -> list[Loader]:
    """Every available loader, in sniffing order."""
    return list(_each_loader())


def sniff_format(path: Path) -> str | None:
    """The format of the file by its content (first bytes), or None when no loader knows it."""
    try:
        with open_regular(path) as handle:
            head = handle.read(_HEAD_BYTES)
    except (OSError, LoadError):
        return None
    if not head:
        return None
    return first_format(_each_loader(path, head), path, head)


def first_format(candidates: Iterable[Loader], path: Path, head: bytes) -> str | None:
    """The format of the first of ``candidates`` whose sniff claims the file (a sniff that
    raises is a "no")."""
    for loader in candidates:
        try:
            if loader.sniff(path, head):
                return loader.format.value
        except Exception:
            continue
    return None


def resolve(path: Path) -> Path:
    """The file to read for ``path``: a folder means the one checkpoint it holds."""
    if not path.exists():
        raise LoadError(path, "does not exist")
    if path.is_dir():
        # Discovery decides what a folder is (imported here: it builds on the loaders).
        from steelyard.discovery import single

        path = single(path)
        if path.is_dir():  # pragma: no cover - single() returns files and indexes only
            raise LoadError(path, "is a folder; name the checkpoint file")
    if not path.is_file():
        raise LoadError(path, f"is {kind_of(path.stat().st_mode)}, not a regular file")
    return path


def load(path: str | Path) -> Checkpoint:
    """Read a checkpoint's structure; tensors stay on disk until a rule asks for them."""
    target = resolve(Path(path))
    try:
        # Never blocks on a FIFO swapped in after resolve(); refuses anything not regular.
        with open_regular(target) as handle:
            head = handle.read(_HEAD_BYTES)
    except OSError as exc:
        raise LoadError(target, f"cannot be opened ({exc.strerror})") from None
    if not head:
        raise LoadError(target, "is empty")
    for loader in _each_loader(target, head):
        if loader.sniff(target, head):
            try:
                checkpoint = loader.load(target)
                # Heads and experts are named from the loaded graph, before any rule runs.
                from steelyard.transformer import annotate

                return annotate(checkpoint)
            except LoadError:
                raise
            except (RecursionError, MemoryError) as exc:
                raise LoadError(
                    target, f"is too deeply nested or too large to read ({exc})"
                ) from exc
            except Exception as exc:
                # Loaders validate what they read; this net only keeps the one-line contract
                # for a malformation nobody foresaw. The cause stays chained for --debug.
                raise LoadError(target, f"is malformed ({type(exc).__name__}: {exc})") from exc
    raise LoadError(target, f"is not a checkpoint steelyard can read; supported: {SUPPORTED}")


__all__ = ["SUPPORTED", "Loader", "load", "loaders", "resolve"]
