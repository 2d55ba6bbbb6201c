"""The environment campaign workers give their runs: glibc thresholds and Dask's profiler."""

import json
import os
import subprocess
import sys
import textwrap
import time

import pytest

from diffkit import _worker_env

GLIBC = sys.platform.startswith("linux") and os.confstr("CS_GNU_LIBC_VERSION") is not None

# The child allocates and frees one 4 MiB array 200 times, before and after tune_malloc(),
# counting minor page faults (getrusage(2), ru_minflt).
_FAULTS = textwrap.dedent("""
    import json, resource
    import numpy as np
    from diffkit._worker_env import tune_malloc

    def faults():
        before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
        for _ in range(200):
            a = np.ones(1 << 19)  # 4 MiB of float64, written (touched) in full
            del a
        return resource.getrusage(resource.RUSAGE_SELF).ru_minflt - before

    untuned = faults()
    tuned_to = tune_malloc()
    again = tune_malloc()
    print(json.dumps({"untuned": untuned, "tuned": faults(), "set": tuned_to, "again": again}))
""")


def _child(env_extra):
    env = {k: v for k, v in os.environ.items() if not k.startswith("MALLOC_")}
    env.update(env_extra)
    proc = subprocess.run([sys.executable, "-c", _FAULTS], capture_output=True, text=True,
                          env=env, timeout=120)
    assert proc.returncode == 0, proc.stderr
    return json.loads(proc.stdout.strip().splitlines()[-1])


@pytest.mark.skipif(not GLIBC, reason="mallopt thresholds are glibc's")
def test_tune_malloc_undoes_the_dask_nanny_trim_threshold():
    # Dask's nanny starts workers with MALLOC_TRIM_THRESHOLD_=65536 (distributed's default
    # "distributed.nanny.pre-spawn-environ"). With a fixed trim threshold glibc stops adapting
    # its mmap threshold (mallopt(3), Linux man-pages: "M_MMAP_THRESHOLD ... dynamic
    # adjustment"), so every 4 MiB array is mapped afresh and its pages faulted in anew each
    # time (1,024 pages of 4 KiB; fewer where transparent huge pages serve part of it).
    got = _child({"MALLOC_TRIM_THRESHOLD_": "65536"})
    assert got["untuned"] >= 200 * 8
    # afterwards the freed block is reused from the heap: almost no new faults
    assert got["tuned"] < 0.05 * got["untuned"]
    assert got["set"] == {"mmap": _worker_env.MMAP_THRESHOLD_BYTES,
                          "trim": _worker_env.TRIM_THRESHOLD_BYTES}
    assert got["again"] == got["set"]  # once per process; later calls report the same


@pytest.mark.skipif(not GLIBC, reason="mallopt thresholds are glibc's")
def test_tune_malloc_leaves_the_users_thresholds_alone():
    got = _child({"MALLOC_MMAP_THRESHOLD_": "1048576", "MALLOC_TRIM_THRESHOLD_": "268435456"})
    assert got["set"] == {}
    # the user's 1 MiB mmap threshold stays: each 4 MiB array is still mapped afresh
    assert got["tuned"] > 0.8 * got["untuned"] > 0


def test_trim_threshold_reading():
    assert _worker_env._trim_threshold_is_low(None)
    assert _worker_env._trim_threshold_is_low("65536")
    assert not _worker_env._trim_threshold_is_low(str(_worker_env.TRIM_THRESHOLD_BYTES))
    assert not _worker_env._trim_threshold_is_low("lots")


def test_profiler_pause_is_a_no_op_outside_dask():
    with _worker_env.dask_profiler_paused():
        x = 1
    assert x == 1


def _profiler_state(dask_worker=None):
    return dask_worker.periodic_callbacks["profile"].is_running()


def _state_inside_pause():
    """Run in a Dask worker: the profiler's state seen from inside a paused block."""
    from distributed import get_worker

    callback = get_worker().periodic_callbacks["profile"]
    with _worker_env.dask_profiler_paused():
        deadline = time.monotonic() + 10
        while callback.is_running() and time.monotonic() < deadline:
            time.sleep(0.01)  # the pause is carried out by the worker's event loop
        return callback.is_running()


def _wait_for(client, want, seconds=10):
    deadline = time.monotonic() + seconds
    while True:
        states = list(client.run(_profiler_state).values())
        if all(s == want for s in states) or time.monotonic() > deadline:
            return states
        time.sleep(0.05)


@pytest.mark.slow
def test_profiler_paused_during_a_dask_task_and_resumed_after():
    distributed = pytest.importorskip("dask.distributed")
    with distributed.LocalCluster(n_workers=1, threads_per_worker=2, processes=True,
                                  dashboard_address=None) as cluster, \
            distributed.Client(cluster) as client:
        assert _wait_for(client, True) == [True]  # the profiler runs by default
        assert client.submit(_state_inside_pause, pure=False).result() is False
        assert _wait_for(client, True) == [True]  # resumed after the task
        # two tasks at once in one worker: paused while either runs
        futures = [client.submit(_state_inside_pause, pure=False) for _ in range(2)]
        assert [f.result() for f in futures] == [False, False]
        assert _wait_for(client, True) == [True]


class _FakeCallback:
    def __init__(self, running):
        self.running, self.starts, self.stops = running, 0, 0

    def is_running(self):
        return self.running

    def start(self):
        self.running, self.starts = True, self.starts + 1

    def stop(self):
        self.running, self.stops = False, self.stops + 1


class _FakeWorker:
    class loop:  # noqa: N801 - stands for the worker's IOLoop: runs callbacks at once
        @staticmethod
        def add_callback(fn):
            fn()


@pytest.mark.parametrize("initially_running", [True, False])
def test_profiler_pause_counts_overlapping_tasks(monkeypatch, initially_running):
    callback = _FakeCallback(initially_running)
    monkeypatch.setattr(_worker_env, "_dask_profiler", lambda: (_FakeWorker, callback))
    first, second = _worker_env.dask_profiler_paused(), _worker_env.dask_profiler_paused()
    first.__enter__()
    assert not callback.is_running()
    second.__enter__()
    second.__exit__(None, None, None)
    assert not callback.is_running()  # the first task still runs
    first.__exit__(None, None, None)
    assert callback.is_running() is initially_running  # a stopped profiler stays stopped
    assert callback.stops == 1 and callback.starts == int(initially_running)
    # an exception in the block resumes it too
    with pytest.raises(RuntimeError):
        with _worker_env.dask_profiler_paused():
            raise RuntimeError("run failed")
    assert callback.is_running() is initially_running


def test_documented_dask_environment_matches_the_settings():
    # docs/campaigns.md gives DASK_SETTINGS as environment variables for `dask worker`; Dask
    # reads them with its own rules (dask.config.collect_env), which are the reference here.
    dask_config = pytest.importorskip("dask.config")
    from diffkit.campaign import DASK_SETTINGS

    docs = os.path.join(os.path.dirname(__file__), os.pardir, "docs", "campaigns.md")
    with open(docs, encoding="utf-8") as f:
        text = f.read()
    block = text[text.index("As environment variables"):]
    block = block[block.index("```bash"):]
    block = block[:block.index("```", 3)]
    env = dict(line.split(None, 1)[1].split("=", 1) for line in block.splitlines()
               if line.startswith("export DASK_"))
    assert len(env) == len(DASK_SETTINGS)
    collected = dask_config.collect_env(env)
    for key, value in DASK_SETTINGS.items():
        assert dask_config.get(key, config=collected) == value, key
