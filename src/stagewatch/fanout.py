"""One pure function over many inputs, on every core the process may use, results in input order.

Sizing a 1,000-stage plan means thousands of independent exact tail sums; on a machine with several cores they
are shared among forked worker processes, which inherit the inputs (nothing is pickled but the results). Small
jobs, a single core, a platform without ``fork``, or ``STAGEWATCH_WORKERS=1`` run in this process: the results
are the same either way, only the time differs. Workers ignore Ctrl-C; the parent stops them and exits 130.
"""

from __future__ import annotations

import os
import signal
from typing import Any, Callable, Hashable, Sequence

WORKERS_VARIABLE = "STAGEWATCH_WORKERS"
SMALLEST = 1000  # below this many inputs a pool costs more than it saves (our measurement: ~0.1 s to start)

_job: tuple[Callable[[Any], Any], Sequence[Any]] | None = None  # what the forked workers inherit


def workers() -> int:
    """How many processes to use: ``STAGEWATCH_WORKERS`` if set, else the cores this process may run on."""
    wanted = os.environ.get(WORKERS_VARIABLE, "").strip()
    if wanted.isdigit() and int(wanted) >= 1:
        return int(wanted)
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        return os.cpu_count() or 1


def _quiet() -> None:
    signal.signal(signal.SIGINT, signal.SIG_IGN)


def _group(indices: list[int]) -> list[Any]:
    assert _job is not None
    function, inputs = _job
    return [function(inputs[i]) for i in indices]


def fan_out(function: Callable[[Any], Any], inputs: Sequence[Any],
            key: Callable[[Any], Hashable] | None = None) -> list[Any]:
    """``[function(x) for x in inputs]``, shared among worker processes when that pays.

    Inputs with the same ``key`` go to the same worker, one group per task, so that what they have in common
    (cached tail sums) is computed once. The groups are handed out one at a time, largest first, so that the
    workers finish together.
    """
    global _job
    count = min(workers(), len(inputs))
    if count < 2 or len(inputs) < SMALLEST or "fork" not in _start_methods():
        return [function(x) for x in inputs]
    import multiprocessing

    groups: dict[Hashable, list[int]] = {}
    for i, x in enumerate(inputs):
        groups.setdefault(key(x) if key else i, []).append(i)
    tasks = sorted(groups.values(), key=len, reverse=True)
    _job = (function, inputs)
    out: list[Any] = [None] * len(inputs)
    try:
        with multiprocessing.get_context("fork").Pool(count, initializer=_quiet) as pool:
            for indices, results in zip(tasks, pool.imap(_group, tasks)):
                for i, result in zip(indices, results):
                    out[i] = result
    finally:
        _job = None
    return out


def _start_methods() -> list[str]:
    import multiprocessing

    return multiprocessing.get_all_start_methods()
