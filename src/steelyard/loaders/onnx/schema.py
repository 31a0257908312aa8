"""The ONNX protobuf schema (``ModelProto``) without the ``onnx`` package's start-up.

Reading an ONNX file needs only the message classes that protoc generated from
``onnx-ml.proto``, which the ``onnx`` package ships as ``onnx/onnx_ml_pb2.py`` and which import
nothing but ``google.protobuf``. The package's ``__init__`` imports much more, ml_dtypes among
it (onnx 1.23, ``onnx/_mapping.py``), and that alone took 0.9-1.1 s with ml_dtypes 0.7.0 on
the benchmark host (``python -X importtime``): a 3,274-parameter ONNX audit took 1.45 s wall,
three times a safetensors file of the same weights (docs/performance.md, "Sixteenth session").

So the generated module is executed from the installed package's own file under a private
name, and ``sys.modules`` is left alone: a later ``import onnx`` (a user's code, or the test
suite) runs its own copy, whose descriptor file is byte for byte the one already in the
default descriptor pool, so the pool keeps it and both modules hand out the same message
classes (checked with protobuf's upb and pure-Python backends; see the tests). When ``onnx``
is already imported, or its layout is not the one expected, the package is used as is.
"""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from onnx import ModelProto

#: The generated module inside the ``onnx`` package (the ML superset its wheels build).
_GENERATED = "onnx_ml_pb2.py"
_PRIVATE_NAME = "steelyard.loaders.onnx._onnx_ml_pb2"
_cached: type[ModelProto] | None = None


def model_proto_class() -> type[ModelProto]:
    """The ``onnx.ModelProto`` message class, loaded without importing the ``onnx`` package
    when that is possible (see the module)."""
    global _cached
    if _cached is None:
        _cached = _from_package() if "onnx" in sys.modules else _standalone() or _from_package()
    return _cached


def _from_package() -> type[ModelProto]:
    from onnx import ModelProto

    return ModelProto


def _standalone() -> type[ModelProto] | None:
    """``ModelProto`` from the package's generated file, or None when it cannot be found
    where it is expected (another layout: the caller imports the package instead)."""
    package = importlib.util.find_spec("onnx")
    if package is None or not package.submodule_search_locations:
        return None
    for folder in package.submodule_search_locations:
        path = Path(folder) / _GENERATED
        if path.is_file():
            break
    else:
        return None
    spec = importlib.util.spec_from_file_location(_PRIVATE_NAME, path)
    if spec is None or spec.loader is None:
        return None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    found: Any = getattr(module, "ModelProto", None)
    return found if isinstance(found, type) else None
