"""The package's shape, checked on its source (parsed with :mod:`ast`, nothing imported):
no import cycles among steelyard's modules, modules and classes of a readable size, results
that do not import renderers, and one version number.

The limits (600 lines a module, 250 a class) are the project's own (DEVELOPERS.md); common
practice, no source. Imports inside functions are deliberate lazy imports and do not count;
neither do imports under ``if TYPE_CHECKING:``.
"""

from __future__ import annotations

import ast
import sys
from collections.abc import Iterator
from pathlib import Path

import tomllib

SRC = Path(__file__).resolve().parents[1] / "src"
PACKAGE = SRC / "steelyard"

#: Modules and classes allowed over the limit: none since the loaders were split (issue 14).
#: The sets may only shrink: a module that fits is refused here, so its entry is removed.
OVERSIZED_MODULES: set[str] = set()
OVERSIZED_CLASSES: set[str] = set()
MAX_MODULE_LINES = 600
MAX_CLASS_LINES = 250


def _modules() -> dict[str, Path]:
    found = {}
    for path in sorted(PACKAGE.rglob("*.py")):
        parts = path.relative_to(SRC).with_suffix("").parts
        name = ".".join(parts[:-1] if parts[-1] == "__init__" else parts)
        found[name] = path
    return found


MODULES = _modules()


def _top_level(body: list[ast.stmt]) -> Iterator[ast.stmt]:
    for node in body:
        if isinstance(node, ast.If) and "TYPE_CHECKING" in ast.unparse(node.test):
            continue
        if isinstance(node, ast.Try):
            yield from _top_level(node.body)
        else:
            yield node


def _imports(name: str, path: Path) -> set[str]:
    """steelyard modules that ``name`` imports when it is imported."""
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    wanted: set[str] = set()
    for node in _top_level(ast.parse(path.read_text(encoding="utf-8")).body):
        if isinstance(node, ast.Import):
            wanted.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")[: len(package.split(".")) - (node.level - 1)]
                module = ".".join([*base, *([node.module] if node.module else [])])
            else:
                module = node.module or ""
            submodules = [a.name for a in node.names if f"{module}.{a.name}" in MODULES]
            wanted.update(f"{module}.{s}" for s in submodules)
            if len(submodules) < len(node.names):
                wanted.add(module)
    resolved = set()
    for module in wanted:
        while module and module not in MODULES:
            module = module.rpartition(".")[0]
        if module and module != name:
            resolved.add(module)
    return resolved


def _cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected components of more than one module (Tarjan, iterative)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    found: list[list[str]] = []
    for root in graph:
        if root in index:
            continue
        work = [(root, iter(sorted(graph[root])))]
        index[root] = low[root] = len(index)
        stack.append(root)
        on_stack.add(root)
        while work:
            node, edges = work[-1]
            step = next(edges, None)
            if step is not None:
                if step not in index:
                    index[step] = low[step] = len(index)
                    stack.append(step)
                    on_stack.add(step)
                    work.append((step, iter(sorted(graph[step]))))
                elif step in on_stack:
                    low[node] = min(low[node], index[step])
                continue
            work.pop()
            if work:
                low[work[-1][0]] = min(low[work[-1][0]], low[node])
            if low[node] == index[node]:
                component = []
                while True:
                    member = stack.pop()
                    on_stack.discard(member)
                    component.append(member)
                    if member == node:
                        break
                if len(component) > 1:
                    found.append(sorted(component))
    return found


GRAPH = {name: _imports(name, path) for name, path in MODULES.items()}


def test_the_cycle_finder_finds_a_planted_cycle() -> None:
    assert _cycles({"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}) == [["a", "b", "c"]]
    assert _cycles({"a": {"b"}, "b": set()}) == []


def test_no_import_cycles() -> None:
    assert _cycles(GRAPH) == []


def test_results_and_the_engine_do_not_import_renderers() -> None:
    # Renderers take results and return text; a result that imports a renderer when it is
    # imported makes the cycle report.py <-> render/json_report.py. (Report.to_json() is a
    # documented convenience that imports its renderer lazily, inside the method.)
    engine = [n for n in MODULES if not n.startswith(("steelyard.render", "steelyard.cli"))]
    offenders = {
        name: sorted(m for m in GRAPH[name] if m.startswith("steelyard.render"))
        for name in engine
        # The API and the package face offer render(); the baseline writer is itself an
        # output document built from the JSON report's finding blocks.
        if name not in ("steelyard.api", "steelyard", "steelyard.baseline")
    }
    assert {k: v for k, v in offenders.items() if v} == {}


def test_modules_fit_the_size_limit() -> None:
    sizes = {n: len(p.read_text(encoding="utf-8").splitlines()) for n, p in MODULES.items()}
    over = {n for n, lines in sizes.items() if lines > MAX_MODULE_LINES}
    assert over - OVERSIZED_MODULES == set(), "split these modules"
    assert OVERSIZED_MODULES - over == set(), "these fit now: remove them from the allow-list"


def test_classes_fit_the_size_limit() -> None:
    over = set()
    for name, path in MODULES.items():
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if (
                isinstance(node, ast.ClassDef)
                and node.end_lineno is not None
                and node.end_lineno - node.lineno + 1 > MAX_CLASS_LINES
            ):
                over.add(f"{name}.{node.name}")
    assert over - OVERSIZED_CLASSES == set()
    assert OVERSIZED_CLASSES - over == set()


def test_one_version_number() -> None:
    project = tomllib.loads((SRC.parent / "pyproject.toml").read_text(encoding="utf-8"))
    tree = ast.parse((PACKAGE / "version.py").read_text(encoding="utf-8"))
    (value,) = [
        node.value.value
        for node in tree.body
        if isinstance(node, ast.Assign)
        and isinstance(node.value, ast.Constant)
        and any(isinstance(t, ast.Name) and t.id == "__version__" for t in node.targets)
    ]
    assert value == project["project"]["version"]


def test_start_up_imports_no_heavy_format_library() -> None:
    # ml_dtypes alone took 1.3 s to import on the 2-core CI machine (python -X importtime),
    # most of `steelyard --version`; format libraries are imported when a file needs them,
    # not when the loaders are imported to identify a file.
    import subprocess
    import sys

    probe = (
        "import sys, steelyard.cli, steelyard.loaders, steelyard.loaders.gguf; "
        "print(','.join(m for m in ('ml_dtypes', 'onnx', 'h5py', 'gguf', 'tokenizers') if m in sys.modules))"
    )
    loaded = subprocess.run(
        [sys.executable, "-c", probe], capture_output=True, text=True, check=True
    ).stdout.strip()
    assert loaded == ""


#: What ``pip install steelyard`` installs (pyproject's dependencies), by import name.
RUNTIME = {"numpy", "h5py", "safetensors", "onnx", "rich", "click", "ml_dtypes", "typing_extensions",
           "threadpoolctl", "tomli", "blake3"}
#: The extras' packages (pyproject's optional-dependencies), by import name: imported only
#: inside the functions that need them, never when a module is imported.
EXTRAS = {"gguf", "tokenizers", "jinja2", "markupsafe", "vl_convert"}


def _third_party_imports() -> list[tuple[str, str, bool]]:
    """(module, imported top-level name, at module level) for every non-stdlib import."""
    found = []
    for name, path in MODULES.items():
        tree = ast.parse(path.read_text(encoding="utf-8"))
        top_level = {id(node) for node in tree.body}
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                roots = [alias.name.split(".")[0] for alias in node.names]
            elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
                roots = [node.module.split(".")[0]]
            else:
                continue
            for root in roots:
                if root != "steelyard" and root not in sys.stdlib_module_names:
                    found.append((name, root, id(node) in top_level))
    return found


def test_only_declared_dependencies_are_imported() -> None:
    """A package a fresh install lacks would fail at start-up (typer >= 0.26 vendored click, so
    ``import click`` once worked here only because another package had installed it)."""
    found = _third_party_imports()
    assert {"numpy", "click", "gguf"} <= {r for _, r, _ in found}  # the scan sees imports at all
    undeclared = {(m, r) for m, r, _ in found if r not in RUNTIME | EXTRAS}
    assert undeclared == set()


def test_extras_are_imported_lazily() -> None:
    eager = {(m, r) for m, r, top in _third_party_imports() if r in EXTRAS and top}
    # The HTML page module is only ever imported through render.report_formats.html_renderers,
    # which turns a missing extra into one error line.
    allowed = {("steelyard.render.html.page", "markupsafe")}
    assert eager - allowed == set()


def _audit_imports(path: Path, log: Path) -> set[str]:
    """Which of the slow optional libraries a JSON audit of ``path`` imported, in its process
    or in the sandbox processes it forks (HDF5 structures are read in one, which inherits the
    import hook): every import of one is written to ``log``."""
    import subprocess

    probe = (
        "import sys\n"
        "class Hook:\n"
        "    def find_spec(self, name, path=None, target=None):\n"
        "        if name in ('ml_dtypes', 'onnx'):\n"
        f"            with open({str(log)!r}, 'a') as out:\n"
        "                out.write(name + '\\n')\n"
        "sys.meta_path.insert(0, Hook())\n"
        "from steelyard.cli import main\n"
        f"sys.argv = ['steelyard', 'audit', {str(path)!r}, '--fail-on', 'never', '-f', 'json', '-q']\n"
        "try:\n    main()\nexcept SystemExit as exit:\n    assert exit.code == 0, exit.code\n"
    )
    log.unlink(missing_ok=True)
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    return set(log.read_text().split()) if log.exists() else set()


def test_auditing_ieee_floats_does_not_import_ml_dtypes(tmp_path: Path) -> None:
    # ml_dtypes 0.7.0 took 1.1-2.1 s to import here (python -X importtime,
    # ml_dtypes._ml_dtypes_ext), ten times the rest of a small audit, so a file stored in
    # float32 or float16 must never import it (docs/performance.md, Start-up), nor a bf16
    # safetensors file (widened from its bit patterns). Files written by the reference writers
    # (safetensors.numpy, numpy.savez) in two shapes and two float types, plus the
    # Keras-written demo files (fixtures/make_demo.py), the bf16 safetensors demo and a GGUF file
    # with bf16 tensors (fixtures/gen_gguf.py, written by the gguf package). ONNX files are
    # checked in tests/loaders/test_onnx_schema.py by what a fresh process has imported: this
    # probe logs the spec look-up the schema module makes for the onnx package's files.
    import numpy as np
    from safetensors.numpy import save_file

    rng = np.random.default_rng(18)
    written = []
    for dtype in (np.float32, np.float16):
        for width in (3, 17):
            tensors = {
                "encoder.weight": rng.normal(size=(width, 5)).astype(dtype),
                "encoder.bias": rng.normal(size=width).astype(dtype),
                "head.weight": rng.normal(size=(2, width)).astype(dtype),
            }
            stem = tmp_path / f"model_{np.dtype(dtype).name}_{width}"
            save_file(tensors, f"{stem}.safetensors")
            np.savez(f"{stem}.npz", **tensors)  # type: ignore[arg-type]
            written += [Path(f"{stem}.safetensors"), Path(f"{stem}.npz")]
    demo = SRC.parent / "fixtures" / "demo"
    written += [
        demo / "pumpwear-nightly-bad.keras",
        demo / "pumpwear-healthy.h5",
        demo / "pumpwear-healthy.bf16.safetensors",
        SRC.parent / "fixtures" / "gguf" / "types.gguf",  # bf16 among the ggml types
    ]
    loaded = {path.name: _audit_imports(path, tmp_path / "imports.log") for path in written}
    assert {name: mods for name, mods in loaded.items() if "ml_dtypes" in mods} == {}


def test_the_import_probe_sees_ml_dtypes_when_a_file_needs_it(tmp_path: Path) -> None:
    # The probe above can fail: an fp8 safetensors file is decoded by ml_dtypes (the reference
    # library; written here by safetensors.numpy from ml_dtypes arrays), and an import in the
    # HDF5 sandbox is seen too (a Keras file whose weights are bf16, written with h5py in the
    # layout of fixtures/demo/*.keras).
    import shutil
    import zipfile

    import h5py
    import ml_dtypes
    import numpy as np
    from safetensors.numpy import save_file

    log = tmp_path / "imports.log"
    rng = np.random.default_rng(3)
    fp8 = tmp_path / "fp8.safetensors"
    save_file({"encoder.weight": rng.normal(size=(6, 5)).astype(ml_dtypes.float8_e4m3fn)}, str(fp8))
    assert "ml_dtypes" in _audit_imports(fp8, log)
    demo = SRC.parent / "fixtures" / "demo" / "pumpwear-nightly-bad.keras"
    with zipfile.ZipFile(demo) as archive:
        archive.extractall(tmp_path / "members")
    weights = tmp_path / "members" / "model.weights.h5"
    with h5py.File(weights, "r+") as h5:
        found: list[str] = []
        h5.visititems(lambda name, obj: found.append(name) if isinstance(obj, h5py.Dataset) else None)
        for name in found:
            values = np.asarray(h5[name][()])
            if values.dtype == np.float32 and values.size:
                del h5[name]
                # Keras 3's layout for bfloat16: 2-byte opaque data with a dtype attribute.
                h5[name] = values.astype(ml_dtypes.bfloat16).view(np.uint16).view("V2")
                h5[name].attrs["dtype"] = "bfloat16"
                break
    shutil.make_archive(str(tmp_path / "bf16"), "zip", tmp_path / "members")
    keras_bf16 = (tmp_path / "bf16.zip").rename(tmp_path / "bf16.keras")
    assert "ml_dtypes" in _audit_imports(keras_bf16, log)
