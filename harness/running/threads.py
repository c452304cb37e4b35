"""Thread pinning: every run uses one thread in its numeric libraries, so figures never depend on core counts.

BLAS and OpenMP pools (NumPy, SciPy, scikit-learn) are limited with threadpoolctl, torch
with ``torch.set_num_threads``. Summing in a different number of threads changes the
order of floating-point additions, and with it the last bits of a result; a threshold or a
neighbour ranking can then flip. Pinning one thread per run makes the local engine, Dask
workers and machines with other core counts give the same figures; runs are parallel
across processes instead.
"""

from __future__ import annotations

import os
from contextlib import contextmanager
from typing import Iterator

RUN_THREADS = 1


@contextmanager
def pinned_threads(n: int = RUN_THREADS) -> Iterator[dict]:
    """Limit BLAS/OpenMP pools and torch to ``n`` threads inside the block; yields what was set (for the run record)."""
    import torch
    from logtrial.detectors.torch_train import THREADS_ENV as TORCH_THREADS_ENV
    from threadpoolctl import threadpool_info, threadpool_limits

    before = torch.get_num_threads()
    # deep detectors read their thread count from this variable unless given one: the run's pin wins, on any engine
    env_before = os.environ.get(TORCH_THREADS_ENV)
    os.environ[TORCH_THREADS_ENV] = str(n)
    with threadpool_limits(limits=n):
        torch.set_num_threads(n)
        pools = sorted({f"{p.get('internal_api')}:{p.get('num_threads')}" for p in threadpool_info()})
        try:
            yield {"threads": n, "torch": torch.get_num_threads(), "pools": pools}
        finally:
            torch.set_num_threads(before)
            if env_before is None:
                os.environ.pop(TORCH_THREADS_ENV, None)
            else:
                os.environ[TORCH_THREADS_ENV] = env_before
