"""An audit in a fresh Python process, and which modules it imported: what start-up costs
depend on (each import is paid by every command that needs none of it)."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

_PROBE = (
    "import sys; from steelyard.api import audit; r = audit(sys.argv[1]); "
    "print(len(r.audits[0].findings), *(m in sys.modules for m in sys.argv[2:]))"
)


def audited_imports(path: Path, *modules: str) -> tuple[int, dict[str, bool]]:
    """(findings, whether each of ``modules`` was imported) of ``steelyard.api.audit(path)``
    run in a fresh process."""
    done = subprocess.run(
        [sys.executable, "-c", _PROBE, str(path), *modules], capture_output=True, text=True
    )
    assert done.returncode == 0, done.stderr
    findings, *flags = done.stdout.split()
    return int(findings), {m: flag == "True" for m, flag in zip(modules, flags, strict=True)}
