"""Child-process entry for the hostile corpus: run the CLI, logging every file it opens.

Python's audit hooks (PEP 578) see every ``open`` made from Python code (builtins, ``os.open``,
``io``, NumPy's memory maps), so the parent can check that nothing outside the model's folder
was touched. Files opened by C libraries (HDF5) are not seen; the canary's content check in
the parent covers those.
"""

from __future__ import annotations

import os
import sys


def _install(log_path: str) -> None:
    opened: list[str] = []

    def hook(event: str, args: tuple[object, ...]) -> None:
        if event == "open" and args and isinstance(args[0], (str, bytes, os.PathLike)):
            opened.append(os.fsdecode(args[0]))  # type: ignore[arg-type]

    sys.addaudithook(hook)
    import atexit

    def dump() -> None:
        import resource

        peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024  # KiB on Linux
        with open(log_path, "w", encoding="utf-8", errors="surrogateescape") as handle:
            handle.write("\n".join([f"peak {peak}", *opened]))

    atexit.register(dump)


if __name__ == "__main__":
    log = os.environ.get("STEELYARD_OPEN_LOG")
    if log:
        _install(log)
    from steelyard.cli import main

    sys.argv[0] = "steelyard"
    main()
