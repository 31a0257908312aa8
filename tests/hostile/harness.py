"""Run steelyard on a hostile input in a child process and measure what it cost.

Each case runs the real CLI in a child forked from one pre-imported process
(``_zygote.py``: imports cost seconds per case otherwise) with an address-space cap of 4 GiB,
so that an unbudgeted allocation of a few GiB *succeeds* and shows up in the peak
resident size (a lower cap would turn the bomb into a MemoryError and hide the missing
check). The zygote reads the child's peak RSS from ``wait4`` and its wall time, and the child
logs every file it opens (see ``_zygote.py``). The peak includes the zygote's own pages the
child inherited (about 150 MB), as a freshly started process would have them too.
"""

from __future__ import annotations

import atexit
import json
import os
import subprocess
import sys
import tempfile
from dataclasses import dataclass
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]

#: Limits every case must stay under (the issue's promise: 20 s and 1 GiB per case).
SECONDS = 20.0
PEAK_BYTES = 2**30
_ADDRESS_CAP = 4 * 2**30


@dataclass(frozen=True)
class Outcome:
    """What one child run did."""

    code: int
    stdout: str
    stderr: str
    seconds: float
    peak_bytes: int
    opened: tuple[str, ...]

    @property
    def lines(self) -> list[str]:
        """Non-empty stderr lines."""
        return [line for line in self.stderr.splitlines() if line.strip()]


class _Zygote:
    """The one pre-imported process that forks the cases (see ``_zygote.py``)."""

    def __init__(self) -> None:
        env = {
            **os.environ,
            "PYTHONPATH": os.pathsep.join([str(REPO), os.environ.get("PYTHONPATH", "")]),
            "NO_COLOR": "1",
            "COLUMNS": "120",
            # One BLAS thread: the zygote must stay single-threaded to fork safely, and
            # thread arenas would otherwise dominate the address space.
            "OPENBLAS_NUM_THREADS": "1",
            "OMP_NUM_THREADS": "1",
            "MKL_NUM_THREADS": "1",
        }
        self.process = subprocess.Popen(
            [sys.executable, "-m", "tests.hostile._zygote"],
            cwd=REPO,
            env=env,
            stdin=subprocess.PIPE,
            stdout=subprocess.PIPE,
            text=True,
        )
        assert self.process.stdout is not None
        ready = self.process.stdout.readline()
        assert ready.strip() == "ready", ready

    def alive(self) -> bool:
        return self.process.poll() is None

    def ask(self, request: dict[str, object]) -> dict[str, object]:
        assert self.process.stdin is not None and self.process.stdout is not None
        self.process.stdin.write(json.dumps(request) + "\n")
        self.process.stdin.flush()
        reply: dict[str, object] = json.loads(self.process.stdout.readline())
        return reply

    def close(self) -> None:
        if self.process.stdin is not None:
            self.process.stdin.close()
        self.process.wait(timeout=10)


_zygote: _Zygote | None = None


def _server() -> _Zygote:
    global _zygote
    if _zygote is None or not _zygote.alive():
        _zygote = _Zygote()
        atexit.register(_zygote.close)
    return _zygote


def run(args: list[str], cwd: Path, timeout: float = 4 * SECONDS, stdin: bytes = b"") -> Outcome:
    """Run ``steelyard *args`` in ``cwd`` in a forked child; kill it after ``timeout`` s."""
    with tempfile.TemporaryDirectory(prefix="steelyard-case-") as scratch:
        where = Path(scratch)
        (where / "stdin").write_bytes(stdin)
        reply = _server().ask(
            {
                "args": [str(a) for a in args],
                "cwd": str(cwd if cwd.is_dir() else cwd.parent),
                "stdin": str(where / "stdin"),
                "stdout": str(where / "stdout"),
                "stderr": str(where / "stderr"),
                "log": str(where / "opened"),
                "timeout": timeout,
                "address_cap": _ADDRESS_CAP,
            }
        )
        if reply["timed_out"]:
            raise AssertionError(f"steelyard {args} ran longer than {timeout} s")
        log = where / "opened"
        opened = tuple(
            line for line in (log.read_text(errors="replace") if log.exists() else "").splitlines()
            if line
        )
        return Outcome(
            int(reply["code"]),  # type: ignore[call-overload]
            (where / "stdout").read_bytes().decode(errors="replace"),
            (where / "stderr").read_bytes().decode(errors="replace"),
            float(reply["seconds"]),  # type: ignore[arg-type]
            int(reply["peak"]),  # type: ignore[call-overload]
            opened,
        )


def assert_refused(outcome: Outcome, *fragments: str) -> None:
    """Exit 2, exactly one stderr line naming the problem, no traceback, within limits."""
    assert_bounded(outcome)
    assert outcome.code == 2, (outcome.code, outcome.stderr[-2000:])
    assert "Traceback" not in outcome.stderr, outcome.stderr[-2000:]
    assert len(outcome.lines) == 1, outcome.lines
    line = outcome.lines[0]
    assert line.startswith("steelyard: "), line
    for fragment in fragments:
        assert fragment.lower() in line.lower(), (fragment, line)


def assert_bounded(outcome: Outcome) -> None:
    """Within the time and memory promise, and no traceback."""
    assert outcome.seconds < SECONDS, f"took {outcome.seconds:.1f} s"
    assert outcome.peak_bytes < PEAK_BYTES, f"peak RSS {outcome.peak_bytes / 2**20:.0f} MiB"
    assert "Traceback" not in outcome.stderr, outcome.stderr[-2000:]


def assert_stayed_inside(outcome: Outcome, outside: Path) -> None:
    """No file under ``outside`` was opened (Python-level opens; see ``_zygote.py``)."""
    base = str(outside.resolve())
    leaked = [p for p in outcome.opened if str(Path(p).resolve()).startswith(base)]
    assert not leaked, leaked
