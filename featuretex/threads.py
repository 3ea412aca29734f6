"""How many threads one run may use, and every thread pool sized to that.

A batch on the `pool` launcher runs several scans side by side in separate processes. Each would
otherwise size its pools (torch's OpenMP team, numba's, OpenCV's) for the whole machine, and with
more busy threads than cores the OpenMP teams spin against each other. So a run takes its share:
the CPUs this process may use (its affinity mask: a SLURM allocation, `taskset`) divided by the
number of jobs the launcher runs at once (joblib's n_jobs; -1 = one per CPU, -2 = all but one).
"""

from __future__ import annotations

import os


def cpus_allowed() -> int:
    """CPUs this process may run on (its affinity mask), at least 1."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


def side_by_side_jobs(cpus: int) -> int:
    """Jobs of this batch that share the machine at once: the launcher's n_jobs in a Hydra multirun
    on a local process pool, else 1 (a single run, or jobs that run one after the other)."""
    from hydra.core.hydra_config import HydraConfig
    from hydra.types import RunMode
    from omegaconf import OmegaConf

    if not HydraConfig.initialized() or HydraConfig.get().mode != RunMode.MULTIRUN:
        return 1
    n = OmegaConf.select(HydraConfig.get().launcher, "n_jobs", default=None)
    if not isinstance(n, int) or n == 0:
        return 1
    return max(1, min(cpus, n if n > 0 else cpus + 1 + n))    # joblib's convention for negative n_jobs


def job_threads() -> int:
    """This run's share of the cores, at least 1."""
    cpus = cpus_allowed()
    return max(1, cpus // side_by_side_jobs(cpus))


def use_threads(n: int) -> None:
    """Size torch's intra-op pool, numba's and OpenCV's to `n` threads (BLAS follows OMP_NUM_THREADS,
    which the pool launcher sets in each worker before numpy loads)."""
    import cv2
    import numba
    import torch

    torch.set_num_threads(n)
    numba.set_num_threads(max(1, min(n, numba.config.NUMBA_NUM_THREADS)))
    cv2.setNumThreads(n)
