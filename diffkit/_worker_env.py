"""The environment a campaign's worker process gives diffkit's runs.

A run is long numpy work in one thread. Two things that a Dask worker does by
default cost such work a good share of its time; diffkit's tasks set the first
right for the rest of the worker's life, and pause the second while they run:

* the C library's memory handling: Dask's nanny starts each worker with
  ``MALLOC_TRIM_THRESHOLD_`` set low, which freezes glibc's adaptive
  thresholds, so that every large array is mapped afresh and the top of the
  heap is given back to the system at nearly every ``free`` (page faults);
* the worker's statistical profiler, which samples every thread's stack every
  few milliseconds on the worker's event loop, taking the interpreter lock
  from the computing thread each time.

docs/campaigns.md (Dask section) gives the measured costs.
"""

from __future__ import annotations

import contextlib
import os
import threading

MMAP_THRESHOLD_BYTES = 32 * 1024 * 1024  # the largest value glibc's adaptive threshold takes
TRIM_THRESHOLD_BYTES = 2 * MMAP_THRESHOLD_BYTES  # glibc keeps trim at twice mmap when adapting
_M_TRIM_THRESHOLD = -1  # mallopt parameter numbers (glibc's malloc.h)
_M_MMAP_THRESHOLD = -3

#: Dask settings recommended for a cluster that runs diffkit campaigns (the Dask section of
#: docs/campaigns.md gives them as environment variables too): the event loops of the workers,
#: nannies and scheduler wake less often, so they take the interpreter lock and the cores from
#: the runs less often. Memory limits are still checked twice a second.
DASK_SETTINGS = {
    "distributed.admin.tick.interval": "1s",  # default 20ms: an event-loop health check
    "distributed.admin.system-monitor.interval": "2s",  # default 500ms: dashboard statistics
    "distributed.worker.memory.monitor-interval": "500ms",  # default 100ms
    "distributed.worker.profile.enabled": False,  # the sampling profiler, every 10ms
}

_malloc_tuned = []


def tune_malloc():
    """Give this process glibc's usual large-array handling back (once per process).

    Sets the mmap threshold to :data:`MMAP_THRESHOLD_BYTES` and the trim
    threshold to :data:`TRIM_THRESHOLD_BYTES` with ``mallopt``: what glibc's
    adaptive thresholds settle at when a program frees large arrays again and
    again, as the analysis does. A threshold given in the environment
    (``MALLOC_MMAP_THRESHOLD_`` or ``MALLOC_TRIM_THRESHOLD_``) by the user is
    left alone, except the trim threshold that Dask's nanny sets by itself
    (``distributed.nanny.pre-spawn-environ``), which is raised when it is below
    ours. Does nothing where the C library has no ``mallopt`` (not glibc).

    Returns
    -------
    dict of str to int
        The thresholds set, in bytes (keys ``mmap``, ``trim``); empty when none.
    """
    if _malloc_tuned:
        return dict(_malloc_tuned[0])
    wanted = {}
    if "MALLOC_MMAP_THRESHOLD_" not in os.environ:
        wanted["mmap"] = MMAP_THRESHOLD_BYTES
    if _trim_threshold_is_low(os.environ.get("MALLOC_TRIM_THRESHOLD_")):
        wanted["trim"] = TRIM_THRESHOLD_BYTES
    done = {}
    try:
        import ctypes

        mallopt = ctypes.CDLL(None).mallopt
        for name, value in wanted.items():
            param = _M_MMAP_THRESHOLD if name == "mmap" else _M_TRIM_THRESHOLD
            if mallopt(param, value) == 1:  # 1 on success
                done[name] = value
    except (OSError, AttributeError, TypeError):  # pragma: no cover - not glibc
        pass
    _malloc_tuned.append(done)
    return dict(done)


def _trim_threshold_is_low(text):
    """True when the trim threshold is unset or set below ours (as Dask's nanny does)."""
    if text is None:
        return True
    try:
        return int(text) < TRIM_THRESHOLD_BYTES
    except ValueError:
        return False  # not ours to interpret


def read_single_threaded():
    """In a worker process: read with one thread (the worker processes fill the cores)."""
    from .io._parsing import single_threaded

    single_threaded()


_profiler_lock = threading.Lock()
_profiler_users = [0]
_profiler_was_running = {}


def _dask_profiler():
    """The running Dask worker and its profiler's periodic callback, or (None, None)."""
    try:
        from distributed import get_worker

        worker = get_worker()
    except (ImportError, ValueError):  # not in a Dask worker
        return None, None
    callbacks = getattr(worker, "periodic_callbacks", None) or {}
    return worker, callbacks.get("profile")


@contextlib.contextmanager
def dask_profiler_paused():
    """Pause the Dask worker's statistical profiler while the block runs.

    Outside a Dask worker, or when the worker runs without a profiler, this
    does nothing. With several tasks at once in one worker, the profiler
    resumes when the last of them ends. Only the profiler's sampling stops:
    the dashboard's profile page shows no samples for diffkit's runs.
    """
    worker, callback = _dask_profiler()
    if callback is None:
        yield
        return
    key = id(callback)

    def pause():
        _profiler_was_running[key] = callback.is_running()
        callback.stop()

    def resume():
        if _profiler_was_running.pop(key, False) and not callback.is_running():
            callback.start()

    with _profiler_lock:
        _profiler_users[0] += 1
        if _profiler_users[0] == 1:
            worker.loop.add_callback(pause)  # the loop's own thread runs its callbacks
    try:
        yield
    finally:
        with _profiler_lock:
            _profiler_users[0] -= 1
            if _profiler_users[0] == 0:
                worker.loop.add_callback(resume)
