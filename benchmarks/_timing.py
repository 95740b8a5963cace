"""Timing shared by the benchmark scripts: implementations take turns, medians are kept."""

import statistics
import time


def median_times(runs: dict, repeats: int, warmup: bool = False) -> dict:
    """Median wall time of each callable over ``repeats`` rounds.

    Each round runs every callable once, so the drift of a shared machine hits all of them
    alike; ``warmup`` first runs each once untimed (JIT compile or cache load).
    """
    if warmup:
        for fn in runs.values():
            fn()
    times = {k: [] for k in runs}
    for _ in range(repeats):
        for k, fn in runs.items():
            t0 = time.perf_counter()
            fn()
            times[k].append(time.perf_counter() - t0)
    return {k: statistics.median(v) for k, v in times.items()}
