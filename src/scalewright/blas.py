"""One BLAS thread for the engine's small matrix products.

On the 2-core machines this tool is built for, a multi-threaded BLAS made
the engine's small and thin products many times slower and erratic
(measured; see ``benchmarks/`` and DEVELOPERS.md, "Speed"), so estimation
runs with BLAS pinned to one thread.  threadpoolctl finds the loaded BLAS
libraries by scanning the process's shared objects, which costs about 3 ms;
the scan is done once, on first use, and its controller reused.
"""

from __future__ import annotations

from functools import cache

from threadpoolctl import ThreadpoolController


@cache
def _controller() -> ThreadpoolController:
    return ThreadpoolController()


def one_blas_thread():
    """Context manager: BLAS limited to one thread inside, restored after."""
    return _controller().limit(limits=1, user_api="blas")
