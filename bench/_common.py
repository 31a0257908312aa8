"""Shared pieces of the benchmarks: seeded synthetic checkpoints and child-process measurement.

Every benchmark writes its checkpoints with the ``safetensors`` package itself (the reference
writer), into a temporary folder that is deleted afterwards. Each measured run happens in a
fresh child process (``python bench/<script>.py --child ...``) so that its peak memory is its
own: the child reports ``VmHWM`` (peak resident set, file-backed pages included) from
``/proc/self/status`` and the largest ``RssAnon`` (anonymous memory: what the process itself
allocated) seen by a sampling thread every few milliseconds.
"""

from __future__ import annotations

import json
import math
import os
import re
import subprocess
import sys
import threading
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "src"))

MIB = 2**20


# ---- checkpoints --------------------------------------------------------------------------
@dataclass(frozen=True)
class Shape:
    """A decoder-only transformer in the usual PyTorch naming (q/k/v/o, gate/up/down)."""

    vocab: int
    hidden: int
    intermediate: int
    layers: int
    tied: bool = False
    kv: int | None = None
    """Width of the key and value projections (grouped-query attention); None: ``hidden``."""
    heads: int | None = None
    """Query heads, written to config.json (None: no head count, so no heads are recognised)."""
    experts: int = 0
    """Routed experts per block (``mlp.experts.<e>.*`` and a router ``mlp.gate``), 0: dense."""

    def tensors(self) -> Iterator[tuple[str, tuple[int, ...]]]:
        """Tensor names and shapes in file order."""
        h, f = self.hidden, self.intermediate
        kv = self.kv or h
        yield "model.embed_tokens.weight", (self.vocab, h)
        for i in range(self.layers):
            p = f"model.layers.{i}"
            yield f"{p}.input_layernorm.weight", (h,)
            for name, rows in (("q_proj", h), ("k_proj", kv), ("v_proj", kv), ("o_proj", h)):
                yield f"{p}.self_attn.{name}.weight", (rows, h)
            yield f"{p}.post_attention_layernorm.weight", (h,)
            if self.experts:
                yield f"{p}.mlp.gate.weight", (self.experts, h)
            for e in range(self.experts) if self.experts else (None,):
                m = f"{p}.mlp" if e is None else f"{p}.mlp.experts.{e}"
                yield f"{m}.gate_proj.weight", (f, h)
                yield f"{m}.up_proj.weight", (f, h)
                yield f"{m}.down_proj.weight", (h, f)
        yield "model.norm.weight", (h,)
        if not self.tied:
            yield "lm_head.weight", (self.vocab, h)

    @property
    def parameters(self) -> int:
        return sum(math.prod(shape) for _, shape in self.tensors())

    @property
    def largest(self) -> int:
        """Elements of the largest tensor."""
        return max(math.prod(shape) for _, shape in self.tensors())


#: How synthetic weights are drawn: ``trained`` (the default) or ``gaussian``.
WEIGHTS = ("trained", "gaussian")


#: Matrices are drawn in row blocks of at most this many elements, so that writing a 256k-row
#: vocabulary never holds it in float32.
_DRAW_ELEMENTS = 2**26


def _values(
    rng: np.random.Generator, shape: tuple[int, ...], weights: str = "trained", dtype: Any = None
) -> np.ndarray:
    """Seeded weights. ``gaussian`` is an initializer's i.i.d. draw N(0, 1/fan_in), so every
    layer looks freshly initialised; ``trained`` gives each unit its own scale (log-normal,
    σ = 0.3: trained rows differ in norm) and adds a rank-4 component whose singular values
    sit at 3× the Marchenko–Pastur edge (trained layers grow a few strong directions)."""
    target = np.dtype(dtype or np.float32)
    if len(shape) == 1:
        return (1.0 + 0.05 * rng.standard_normal(shape, dtype=np.float32)).astype(target)
    rows, cols = shape
    sigma = 1.0 / math.sqrt(cols)  # the usual fan-in scaling of an initialisation
    rank = 4
    strength = np.float32(3.0 * sigma * (math.sqrt(rows) + math.sqrt(cols)))
    step = max(1, _DRAW_ELEMENTS // cols)
    trained = weights != "gaussian"

    def draw_right() -> np.ndarray:
        return rng.standard_normal((rank, cols), dtype=np.float32) / np.float32(math.sqrt(cols))

    # The shared right factor is drawn last for a one-block matrix and first for a blocked
    # one: the draw orders the published benchmark results were measured with.
    right = draw_right() if trained and rows > step else None
    out = np.empty(shape, dtype=target)
    for start in range(0, rows, step):
        n = min(step, rows - start)
        block = rng.standard_normal((n, cols), dtype=np.float32)
        block *= np.float32(sigma)
        if trained:
            block *= rng.lognormal(0.0, 0.3, size=(n, 1)).astype(np.float32)
            left = rng.standard_normal((n, rank), dtype=np.float32) / np.float32(math.sqrt(rows))
            if right is None:
                right = draw_right()
            block += (left * strength) @ right
        out[start : start + n] = block.astype(target)
    return out


def write_checkpoint(
    folder: Path,
    shape: Shape,
    dtype: str,
    shard_bytes: int,
    seed: int = 0,
    weights: str = "trained",
) -> Path:
    """Write ``shape`` with seeded Gaussian weights; returns the file or the shard index."""
    import ml_dtypes
    from safetensors.numpy import save_file

    target = np.dtype(ml_dtypes.bfloat16) if dtype == "bf16" else np.dtype(np.float32)
    rng = np.random.default_rng(seed)
    folder.mkdir(parents=True, exist_ok=True)
    shards: list[dict[str, np.ndarray]] = [{}]
    size = 0
    names: list[list[str]] = [[]]
    files: list[str] = []

    def flush() -> None:
        index = len(files) + 1
        name = f"model-{index:05d}.safetensors"
        save_file(shards[-1], str(folder / name), metadata={"format": "pt"})
        files.append(name)
        shards[-1] = {}

    for name, tensor_shape in shape.tensors():
        array = _values(rng, tensor_shape, weights, target)
        if size and size + array.nbytes > shard_bytes:
            flush()
            names.append([])
            size = 0
        shards[-1][name] = array
        names[-1].append(name)
        size += array.nbytes
    flush()
    config = {
        "model_type": "llama",
        "hidden_act": "silu",
        "hidden_size": shape.hidden,
        "intermediate_size": shape.intermediate,
        "num_hidden_layers": shape.layers,
        "vocab_size": shape.vocab,
    }
    if shape.heads:
        config["num_attention_heads"] = shape.heads
        config["num_key_value_heads"] = shape.heads * (shape.kv or shape.hidden) // shape.hidden
    if shape.experts:
        config["num_experts"] = shape.experts
    (folder / "config.json").write_text(json.dumps(config))
    if len(files) == 1:
        single = folder / "model.safetensors"
        (folder / files[0]).rename(single)
        return single
    index = {
        "metadata": {"total_size": shape.parameters * target.itemsize},
        "weight_map": {n: files[i] for i, group in enumerate(names) for n in group},
    }
    path = folder / "model.safetensors.index.json"
    path.write_text(json.dumps(index))
    return path


def shard_files(path: Path) -> list[Path]:
    """The safetensors files of a checkpoint (the file itself or the index's shards)."""
    if path.name.endswith(".index.json"):
        weight_map = json.loads(path.read_text())["weight_map"]
        return [path.parent / f for f in sorted(set(weight_map.values()))]
    return [path]


# ---- memory -------------------------------------------------------------------------------
def _status() -> dict[str, int]:
    text = Path("/proc/self/status").read_text()
    return {k: int(v) * 1024 for k, v in re.findall(r"^(\w+):\s+(\d+) kB", text, re.M)}


class MemoryProbe:
    """Peak anonymous memory by sampling, peak resident set from the kernel's VmHWM."""

    def __init__(self, interval: float = 0.002) -> None:
        self.interval = interval
        self.peak_anon = 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)

    def _run(self) -> None:
        while not self._stop.is_set():
            self.sample()
            time.sleep(self.interval)

    def sample(self) -> None:
        self.peak_anon = max(self.peak_anon, _status().get("RssAnon", 0))

    def __enter__(self) -> MemoryProbe:
        self.start = _status()
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        self._thread.join()
        self.sample()
        self.end = _status()

    def report(self) -> dict[str, int]:
        return {
            "start_rss": self.start.get("VmRSS", 0),
            "start_anon": self.start.get("RssAnon", 0),
            "peak_anon": self.peak_anon,
            "vm_hwm": self.end.get("VmHWM", 0),
        }


def run_child(script: Path, args: list[str], env: dict[str, str] | None = None) -> dict[str, Any]:
    """Run ``script --child args`` in a fresh interpreter; its last stdout line is JSON."""
    merged = {**os.environ, **(env or {})}
    done = subprocess.run(
        [sys.executable, str(script), "--child", *args],
        capture_output=True,
        text=True,
        env=merged,
        check=False,
    )
    if done.returncode != 0:
        raise RuntimeError(f"child {args} failed:\n{done.stderr[-4000:]}")
    result: dict[str, Any] = json.loads(done.stdout.strip().splitlines()[-1])
    return result


def emit(result: dict[str, Any]) -> None:
    """A child's result, as the last line of stdout."""
    print(json.dumps(result), flush=True)


def timed(work: Callable[[], object]) -> float:
    start = time.perf_counter()
    work()
    return time.perf_counter() - start


def machine() -> dict[str, str]:
    """What the numbers were measured on."""
    import platform

    import ml_dtypes
    import safetensors

    return {
        "cores": str(os.cpu_count()),
        "python": platform.python_version(),
        "numpy": np.__version__,
        "safetensors": safetensors.__version__,
        "ml_dtypes": ml_dtypes.__version__,
        "load_average": " ".join(f"{x:.2f}" for x in os.getloadavg()),
    }


def mib(value: float) -> str:
    return f"{value / MIB:,.0f} MiB"
