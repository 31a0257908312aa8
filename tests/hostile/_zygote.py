"""A pre-imported parent that forks one child per hostile case.

Starting Python and importing steelyard (NumPy, ml_dtypes, h5py, onnx, click) costs seconds,
which, for a few hundred cases, dwarfs the cases themselves. This process imports once, then
for each request forks a child that sets its own limits (address space, no core files),
redirects its standard streams to files, logs every file it opens (Python's audit hooks,
PEP 578: builtins, ``os.open``, ``io`` and NumPy's memory maps; files opened inside C
libraries such as HDF5 are not seen) and runs the real CLI. The parent reaps the child with
``wait4``, which gives that child's own peak resident size, and kills it at the time limit.

Protocol (one JSON object per line on stdin, one per line on stdout): request
``{"args", "cwd", "stdin", "stdout", "stderr", "log", "timeout", "address_cap"}``; reply
``{"code", "seconds", "peak", "timed_out"}``. The process must stay single-threaded (a fork
copies only the calling thread): BLAS pools are limited to one thread by the environment the
harness starts it with.
"""

from __future__ import annotations

import json
import os
import resource
import signal
import sys
import time
from typing import Any


def _child(request: dict[str, Any]) -> int:
    os.chdir(request["cwd"])
    cap = int(request["address_cap"])
    resource.setrlimit(resource.RLIMIT_AS, (cap, cap))
    resource.setrlimit(resource.RLIMIT_CORE, (0, 0))
    for fd, path, flags in (
        (0, request["stdin"], os.O_RDONLY),
        (1, request["stdout"], os.O_WRONLY | os.O_CREAT | os.O_TRUNC),
        (2, request["stderr"], os.O_WRONLY | os.O_CREAT | os.O_TRUNC),
    ):
        opened = os.open(path, flags, 0o600)
        os.dup2(opened, fd)
        os.close(opened)
    # The parent's sys.stdin may hold read-ahead protocol lines: give the CLI the new fd 0.
    sys.stdin = open(0, encoding="utf-8", errors="surrogateescape", closefd=False)  # noqa: SIM115
    opened_files: list[str] = []

    def hook(event: str, args: tuple[object, ...]) -> None:
        if event == "open" and args and isinstance(args[0], (str, bytes, os.PathLike)):
            opened_files.append(os.fsdecode(args[0]))  # type: ignore[arg-type]

    sys.addaudithook(hook)
    from steelyard.cli import main

    sys.argv = ["steelyard", *request["args"]]
    code = 1
    try:
        main()
        code = 0
    except SystemExit as done:
        code = done.code if isinstance(done.code, int) else (0 if done.code is None else 1)
    except BaseException:  # the CLI let something through: show it as Python would
        import traceback

        traceback.print_exc()
        code = 1
    finally:
        try:
            sys.stdout.flush()
            sys.stderr.flush()
        except Exception:  # the stream may be broken; the exit code is what matters
            pass
        with open(request["log"], "w", encoding="utf-8", errors="surrogateescape") as handle:
            handle.write("\n".join(opened_files))
    return code


def _serve(request: dict[str, Any]) -> dict[str, Any]:
    sys.stdout.flush()
    started = time.monotonic()
    pid = os.fork()
    if pid == 0:
        code = 1
        try:
            code = _child(request)
        finally:
            os._exit(code)
    deadline = started + float(request["timeout"])
    timed_out = False
    while True:
        reaped, status, usage = os.wait4(pid, os.WNOHANG)
        if reaped:
            break
        if time.monotonic() > deadline:
            os.kill(pid, signal.SIGKILL)
            _, status, usage = os.wait4(pid, 0)
            timed_out = True
            break
        time.sleep(0.005)
    seconds = time.monotonic() - started
    code = os.waitstatus_to_exitcode(status)
    return {"code": code, "seconds": seconds, "peak": usage.ru_maxrss * 1024, "timed_out": timed_out}


def main() -> None:
    """Import the CLI and every reader once, then serve requests until stdin closes."""
    import steelyard.cli  # noqa: F401
    from steelyard.loaders import loaders

    loaders()  # the readers and their libraries (h5py, onnx) are imported now, once
    sys.stdout.write("ready\n")
    sys.stdout.flush()
    for line in sys.stdin:
        reply = _serve(json.loads(line))
        sys.stdout.write(json.dumps(reply) + "\n")
        sys.stdout.flush()


if __name__ == "__main__":
    main()
