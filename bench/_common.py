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
class _Layout:
    """What every layout derives from its tensor list."""

    def tensors(self) -> Iterator[tuple[str, tuple[int, ...]]]:
        raise NotImplementedError

    @property
    def parameters(self) -> int:
        return sum(math.prod(shape) for _, shape in self.tensors())

    @property
    def largest(self) -> int:
        """Elements of the largest tensor."""
        return max(math.prod(shape) for _, shape in self.tensors())


@dataclass(frozen=True)
class Shape(_Layout):
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

    def config(self) -> dict[str, Any] | None:
        """The ``config.json`` written beside the weights (a llama model's keys)."""
        config: dict[str, Any] = {
            "model_type": "llama",
            "hidden_act": "silu",
            "hidden_size": self.hidden,
            "intermediate_size": self.intermediate,
            "num_hidden_layers": self.layers,
            "vocab_size": self.vocab,
        }
        if self.heads:
            config["num_attention_heads"] = self.heads
            config["num_key_value_heads"] = self.heads * (self.kv or self.hidden) // self.hidden
        if self.experts:
            config["num_experts"] = self.experts
        return config


@dataclass(frozen=True)
class ConvShape(_Layout):
    """A bottleneck residual convolution network in torchvision's naming (``conv1``, ``bn1``,
    ``layer<s>.<b>.conv<k>``, ``downsample``, ``fc``); the default stages are ResNet-50's
    (He et al. 2016, "Deep residual learning for image recognition", CVPR: 3, 4, 6, 3
    bottleneck blocks of widths 64-512, expansion 4, 25.6M parameters). Every convolution is
    followed by an inference-form batch norm (weight, bias, running mean and variance), the
    layout whose folding and twin search a transformer never exercises."""

    stages: tuple[tuple[int, int], ...] = ((3, 64), (4, 128), (6, 256), (3, 512))
    classes: int = 1000

    def tensors(self) -> Iterator[tuple[str, tuple[int, ...]]]:
        def norm(name: str, width: int) -> Iterator[tuple[str, tuple[int, ...]]]:
            for part in ("weight", "bias", "running_mean", "running_var"):
                yield f"{name}.{part}", (width,)

        yield "conv1.weight", (64, 3, 7, 7)
        yield from norm("bn1", 64)
        inputs = 64
        for stage, (blocks, width) in enumerate(self.stages, 1):
            for block in range(blocks):
                p = f"layer{stage}.{block}"
                for k, (rows, cols, kernel) in enumerate(
                    ((width, inputs, 1), (width, width, 3), (4 * width, width, 1)), 1
                ):
                    yield f"{p}.conv{k}.weight", (rows, cols, kernel, kernel)
                    yield from norm(f"{p}.bn{k}", rows)
                if block == 0:
                    yield f"{p}.downsample.0.weight", (4 * width, inputs, 1, 1)
                    yield from norm(f"{p}.downsample.1", 4 * width)
                inputs = 4 * width
        yield "fc.weight", (self.classes, inputs)
        yield "fc.bias", (self.classes,)

    def config(self) -> dict[str, Any] | None:
        """No ``config.json``: the layout is inferred from the names."""
        return None


#: How synthetic weights are drawn: ``trained`` (the default) or ``gaussian``, the draws the
#: published results were measured with (never change them), then the families of
#: ``bench/families.py`` (drawn by ``family_matrix``).
WEIGHTS = ("trained", "gaussian", "lowrank-heavytail", "outlier-channels", "near-duplicate")


#: Matrices are drawn in row blocks of at most this many elements, so that writing a 256k-row
#: vocabulary never holds it in float32.
_DRAW_ELEMENTS = 2**26


def _values(
    rng: np.random.Generator, shape: tuple[int, ...], weights: str = "trained", dtype: Any = None
) -> np.ndarray:
    """Seeded weights. ``gaussian`` is an initializer's i.i.d. draw N(0, 1/fan_in), so every
    layer looks freshly initialised; ``trained`` gives each unit its own scale (log-normal,
    σ = 0.3: trained rows differ in norm) and adds a rank-4 component whose singular values
    sit at 3× the Marchenko–Pastur edge (trained layers grow a few strong directions). A
    convolution kernel ``[out, in, kh, kw]`` is drawn as its ``[out, in·kh·kw]`` matrix."""
    target = np.dtype(dtype or np.float32)
    if len(shape) > 2:
        return _values(rng, (shape[0], math.prod(shape[1:])), weights, target).reshape(shape)
    if len(shape) == 1:
        return (1.0 + 0.05 * rng.standard_normal(shape, dtype=np.float32)).astype(target)
    if weights in FAMILIES:
        return family_matrix(rng, shape[0], shape[1], weights).values.astype(target)
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


# ---- weight families (bench/families.py) --------------------------------------------------
#: Rank of the power-law part of the trained-like families, and its exponent: s_k ∝ k^-1.
POWER_RANK = 64
POWER_EXPONENT = 1.0
#: s_1 of the power-law part, in units of the noise's Marchenko–Pastur edge
#: σ(√rows + √cols): a few directions stand out of the bulk, the rest sit inside it.
POWER_STRENGTH = 6.0
#: Degrees of freedom of the Student-t noise (excess kurtosis 6/(ν − 4) = 6).
STUDENT_DOF = 5.0
#: Outlier input columns (the same channels in every matrix of a width, as activation
#: outlier features are) have ``OUTLIER_COLUMN_RANGE`` × the median norm of the other columns.
OUTLIER_COLUMN_RANGE = (20.0, 50.0)
OUTLIER_ROW_SCALE = 8.0
#: Share of rows that are near copies of another row, and the copies' relative noise.
DUPLICATE_SHARE = 0.3
DUPLICATE_NOISE = 1e-3
FAMILIES = ("lowrank-heavytail", "outlier-channels", "near-duplicate")


@dataclass
class FamilyDraw:
    """A family's matrix and what was planted in it (global row and column indices)."""

    values: np.ndarray
    singular_values: np.ndarray
    """Singular values of the power-law part (exact: its factors are orthonormal)."""
    outlier_columns: np.ndarray
    outlier_rows: np.ndarray
    copies: np.ndarray
    """Rows that are near copies, and beside them (``sources``) the rows they copy."""
    sources: np.ndarray


def student_t(rng: np.random.Generator, shape: tuple[int, ...], dof: float) -> np.ndarray:
    """Student-t draws scaled to unit variance (the variance of t_ν is ν / (ν − 2))."""
    scale = math.sqrt((dof - 2.0) / dof)
    return (rng.standard_t(dof, size=shape) * scale).astype(np.float32)


def _orthonormal(rng: np.random.Generator, n: int, rank: int) -> np.ndarray:
    """``n × rank`` with orthonormal columns (QR of a Gaussian draw; needs n >= rank)."""
    q, r = np.linalg.qr(rng.standard_normal((n, rank)))
    return (q * np.sign(np.diag(r))).astype(np.float32)


def outlier_channels(cols: int) -> tuple[np.ndarray, np.ndarray]:
    """The outlier input channels of a width and their factors: fixed per width (not drawn
    from the checkpoint's generator), so every matrix reading that width has the same ones."""
    fixed = np.random.default_rng([cols, 20])
    count = max(2, cols // 256)
    channels = np.sort(fixed.choice(cols, size=count, replace=False))
    return channels, fixed.uniform(*OUTLIER_COLUMN_RANGE, size=count)


def family_matrix(rng: np.random.Generator, rows: int, cols: int, family: str) -> FamilyDraw:
    """A ``rows × cols`` float32 matrix of ``family``, drawn in row blocks.

    Every family starts from the trained-like draw ``lowrank-heavytail``: a power-law part
    L·diag(s)·R with s_k = POWER_STRENGTH · edge · k^-POWER_EXPONENT over POWER_RANK
    directions (L, R orthonormal, so those are its singular values: the rows share a few
    strong directions and are correlated) plus Student-t noise at the initialisation scale
    1/√fan_in, each row's noise scaled by its own log-normal factor (σ = 0.3).
    ``outlier-channels`` then sets a few input columns to 20–50 × the median norm of the
    other columns and multiplies a few rows by OUTLIER_ROW_SCALE; ``near-duplicate`` replaces
    DUPLICATE_SHARE of each block's rows by a copy of another row of the block plus
    Gaussian noise of DUPLICATE_NOISE × that row's norm."""
    if family not in FAMILIES:
        raise ValueError(f"unknown weight family {family!r}")
    sigma = 1.0 / math.sqrt(cols)
    rank = min(POWER_RANK, rows, cols)
    edge = sigma * (math.sqrt(rows) + math.sqrt(cols))
    ks = np.arange(1, rank + 1, dtype=np.float64)
    strengths = (POWER_STRENGTH * edge * ks**-POWER_EXPONENT).astype(np.float32)
    right = _orthonormal(rng, cols, rank).T
    channels, factors = (
        outlier_channels(cols) if family == "outlier-channels" else (np.empty(0, int), None)
    )
    out = np.empty((rows, cols), dtype=np.float32)
    big_rows: list[np.ndarray] = []
    copies: list[np.ndarray] = []
    sources: list[np.ndarray] = []
    step = max(1, _DRAW_ELEMENTS // cols)
    for start in range(0, rows, step):
        n = min(step, rows - start)
        # Blocks of orthonormal columns scaled by √(n/rows) stack to orthonormal columns.
        if n >= rank:
            left = _orthonormal(rng, n, rank) * np.float32(math.sqrt(n / rows))
        else:  # a last block thinner than the rank: only approximately orthonormal
            left = rng.standard_normal((n, rank), dtype=np.float32) / np.float32(math.sqrt(rows))
        block = student_t(rng, (n, cols), STUDENT_DOF)
        block *= (sigma * rng.lognormal(0.0, 0.3, size=(n, 1))).astype(np.float32)
        block += (left * strengths) @ right
        if family == "outlier-channels":
            picked = rng.choice(n, size=max(1, n // 512), replace=False)
            block[picked] *= np.float32(OUTLIER_ROW_SCALE)
            big_rows.append(start + picked)
            norms = np.linalg.norm(block, axis=0)
            others = np.median(np.delete(norms, channels))
            assert factors is not None
            block[:, channels] *= (factors * others / norms[channels]).astype(np.float32)
        elif family == "near-duplicate" and n >= 2:
            order = rng.permutation(n)
            count = min(round(DUPLICATE_SHARE * n), n - 1)
            copy, source = order[:count], rng.choice(order[count:], size=count)
            noise = rng.standard_normal((count, cols), dtype=np.float32)
            noise *= (
                DUPLICATE_NOISE
                * np.linalg.norm(block[source], axis=1, keepdims=True)
                / math.sqrt(cols)
            ).astype(np.float32)
            block[copy] = block[source] + noise
            copies.append(start + copy)
            sources.append(start + source)
        out[start : start + n] = block
    empty = np.empty(0, dtype=np.int64)
    return FamilyDraw(
        values=out,
        singular_values=strengths,
        outlier_columns=channels,
        outlier_rows=np.concatenate(big_rows) if big_rows else empty,
        copies=np.concatenate(copies) if copies else empty,
        sources=np.concatenate(sources) if sources else empty,
    )


def write_checkpoint(
    folder: Path,
    shape: Shape | ConvShape,
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
    config = shape.config()
    if config is not None:
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
    """Peak resident set from the kernel's VmHWM and, when ``sample``, peak anonymous memory
    by polling ``/proc/self/status`` from a thread every ``interval`` seconds.

    Timed calls use ``sample=False``: the polling thread takes the interpreter lock every
    2 ms, which slows a multi-threaded audit on two cores (21M bf16, medians of 6 children
    each: the timed call 81.8 ms polled against 70.0 ms bare, the steady state 73 against
    65 ms; docs/performance.md, section B, "Sixth session") while a C-bound baseline hardly
    notices it. ``peak_anon`` is then the larger of the start and end readings, not a peak."""

    def __init__(self, interval: float = 0.002, sample: bool = True) -> None:
        self.interval = interval
        self.sampling = sample
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
        self.peak_anon = self.start.get("RssAnon", 0)
        if self.sampling:
            self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        if self.sampling:
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
    return run_children(script, [args], env)[0]


def run_children(
    script: Path, args: list[list[str]], env: dict[str, str] | None = None
) -> list[dict[str, Any]]:
    """``script --child a`` for each ``a`` of ``args``, all at once, each in a fresh
    interpreter; the last stdout line of each is JSON."""
    merged = {**os.environ, **(env or {})}
    running = [
        subprocess.Popen(
            [sys.executable, str(script), "--child", *a],
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
            env=merged,
        )
        for a in args
    ]
    results = []
    for a, process in zip(args, running, strict=True):
        out, err = process.communicate()
        if process.returncode != 0:
            raise RuntimeError(f"child {a} failed:\n{err[-4000:]}")
        results.append(json.loads(out.strip().splitlines()[-1]))
    return results


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

    cpu = re.findall(r"^model name\s*:\s*(.+)$", Path("/proc/cpuinfo").read_text(), re.M)
    return {
        "cpu": cpu[0] if cpu else platform.machine(),
        "cores": str(os.cpu_count()),
        "python": platform.python_version(),
        "numpy": np.__version__,
        "safetensors": safetensors.__version__,
        "ml_dtypes": ml_dtypes.__version__,
        "load_average": " ".join(f"{x:.2f}" for x in os.getloadavg()),
    }


def mib(value: float) -> str:
    return f"{value / MIB:,.0f} MiB"


def rule_shares(path: str, policy: Any = None, digest: str = "blake3") -> dict[str, float]:
    """Seconds per rule on one thread under ``policy`` (default: every rule at its defaults):
    hooks timed per layer, data loads charged to the first rule that asks for them, as in a
    real run; then the files' identity digest with ``digest`` (the audit's default, BLAKE3),
    labelled by its algorithm. ``bench/audit_speed.py`` and ``bench/families.py`` both
    report it."""
    from steelyard.api import load
    from steelyard.rules import registry

    checkpoint = load(path)
    specs = list(registry().values())  # every rule (``enabled`` in the policy is not read)
    # A first, untimed pass: it pays lazy imports, first reads and first allocations, which
    # are not what a layer costs (21M bf16: dead-unit 86 -> 21 ms, untrained-token 52 -> 27 ms
    # on the second pass).
    _one_pass(checkpoint, specs, policy, digest)
    return _one_pass(checkpoint, specs, policy, digest)


def _one_pass(checkpoint: Any, specs: list[Any], policy: Any, digest: str) -> dict[str, float]:
    from steelyard.checkpoint_audit import digest_of
    from steelyard.policy import Policy
    from steelyard.rules import AuditContext, RuleSettings
    from steelyard.stats import LayerStats

    stats = LayerStats(checkpoint)
    ctx = AuditContext(
        checkpoint=checkpoint, stats=stats, policy=policy or Policy(), gradients=None
    )
    spent = {spec.name: 0.0 for spec in specs}
    settings: dict[str, Any] = {s.name: RuleSettings(s, ctx.policy) for s in specs}
    for layer in checkpoint.layers:
        for spec in specs:
            if spec.per_layer is not None:
                start = time.perf_counter()
                list(spec.per_layer(ctx, settings[spec.name], layer))
                spent[spec.name] += time.perf_counter() - start
        stats.release(layer)
    for spec in specs:
        start = time.perf_counter()
        if spec.whole is not None:
            list(spec.whole(ctx, settings[spec.name]))
        elif spec.finish is not None:
            list(spec.finish(ctx, settings[spec.name]))
        spent[spec.name] += time.perf_counter() - start
    start = time.perf_counter()
    digest_of(checkpoint.files or (checkpoint.path,), digest)
    spent[f"({digest} of the files)"] = time.perf_counter() - start
    return spent
