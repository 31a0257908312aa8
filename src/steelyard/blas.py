"""How many threads BLAS may use while a block of code runs.

``threadpoolctl.threadpool_limits`` finds the loaded BLAS libraries anew on every call (it walks
the process's shared objects: 1.4-4 ms a call here), which the audit paid once per layer. The
libraries are found once, by one cached :class:`threadpoolctl.ThreadpoolController`; numpy's
BLAS is loaded before any audit starts, so the cache never misses it.
"""

from __future__ import annotations

import functools
from contextlib import AbstractContextManager

from threadpoolctl import ThreadpoolController


@functools.cache
def _controller() -> ThreadpoolController:
    return ThreadpoolController()


def blas_threads(count: int) -> AbstractContextManager[object]:
    """Limit BLAS to ``count`` threads while the block runs."""
    return _controller().limit(limits=count, user_api="blas")
