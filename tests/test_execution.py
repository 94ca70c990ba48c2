"""The task runner: identical answers on every engine, retries when a worker dies, clear errors."""

from __future__ import annotations

import os

import numpy as np
import pytest

from cwsearch.physics import fstat
from cwsearch.stages.limits import stage as limits
from cwsearch.core.errors import InputError
from cwsearch.inference.execution import TaskRunner, run_tasks
from cwsearch.physics.noise import NoiseWeighting
from cwsearch.physics.simulate import invented_array, simulated_array


@pytest.fixture(scope="module")
def small_problem():
    arr = simulated_array(invented_array(n_pulsars=5, years=8, seed=3, toas_per_pulsar=60), seed=4)
    proj = fstat.project(NoiseWeighting(arr), np.array([4e-9, 8e-9]))
    ra = np.linspace(0.1, 6.0, 40)
    dec = np.linspace(-1.2, 1.2, 40)
    return proj, ra, dec


def _compute(problem, **engine):
    proj, ra, dec = problem
    return limits.compute_limits(proj, ra, dec, method="both", quadrature="fast", **engine)


def _assert_same(a, b):
    # every engine recomputes the same tasks: the same numbers to 1e-12 relative (plus 1e-12 of the largest
    # magnitude, for entries near zero), never bit for bit (common practice, no source)
    for key in ("bayes", "bayes_log_evidence", "bayes_table", "frequentist", "frequentist_p0",
                "frequentist_table", "fe"):
        want = np.asarray(a[key], dtype=float)
        scale = np.abs(want[np.isfinite(want)]).max(initial=0.0)
        np.testing.assert_allclose(np.asarray(b[key], dtype=float), want, rtol=1e-12, atol=1e-12 * scale,
                                   err_msg=key)


def test_same_answers_one_worker_two_workers_and_dask(small_problem):
    # results must not depend on the engine or the number of workers (issue 5)
    from distributed import LocalCluster

    serial = _compute(small_problem, workers=1)
    two = _compute(small_problem, workers=2)
    assert "2 local worker processes" in two["runner"]
    _assert_same(serial, two)
    with LocalCluster(n_workers=1, threads_per_worker=2, processes=False, dashboard_address=":0") as cluster:
        dask = _compute(small_problem, scheduler=cluster.scheduler_address)
    assert dask["runner"].startswith("Dask scheduler")
    _assert_same(serial, dask)


def test_results_in_task_order_whatever_finishes_first():
    with TaskRunner(workers=2) as runner:
        assert runner.engine == "processes"
        assert runner.map(abs, [-5, 3, -1, 0, -2]) == [5, 3, 1, 0, 2]
    assert run_tasks(abs, [], workers=2) == []


def test_dask_task_resubmitted_when_its_worker_dies(tmp_path):
    # a task kills its own worker process the first time it runs; with allowed-failures 0 the scheduler
    # reports KilledWorker at once, and the runner resubmits it (issue 5: retries when a Dask worker dies)
    import dask
    from distributed import LocalCluster

    marker = str(tmp_path / "died-once")

    def fragile(x):
        import os as _os

        if x == 2 and not _os.path.exists(marker):
            open(marker, "w").close()
            _os._exit(1)
        return x * 10

    with dask.config.set({"distributed.scheduler.allowed-failures": 0}):
        with LocalCluster(n_workers=1, threads_per_worker=1, processes=True, dashboard_address=":0") as cluster:
            done = []
            got = run_tasks(fragile, [1, 2, 3], scheduler=cluster.scheduler_address, on_done=done.append)
    assert got == [10, 20, 30]
    assert os.path.exists(marker) and sum(done) == 3


def test_local_pool_restarted_when_a_worker_process_dies(tmp_path):
    # a task kills its worker process once; the runner starts a fresh pool and resubmits what did not finish
    marker = str(tmp_path / "died-once")
    got = run_tasks(_crash_once, [(marker, x) for x in range(4)], workers=2)
    assert got == [0, 10, 20, 30]
    assert os.path.exists(marker)


def _crash_once(task):
    marker, x = task
    if x == 1 and not os.path.exists(marker):
        open(marker, "w").close()
        os._exit(1)
    return 10 * x


def test_task_errors_are_raised_not_retried():
    with pytest.raises(ZeroDivisionError):
        run_tasks(_divide_by_zero, [1, 2], workers=2)


def _divide_by_zero(x):
    return x / 0


def test_unreachable_scheduler_is_an_input_error():
    with pytest.raises(InputError, match="Dask scheduler"):
        TaskRunner(scheduler="tcp://127.0.0.1:9", connect_timeout=1).__enter__()


def test_workers_must_be_positive():
    with pytest.raises(InputError, match="workers"):
        TaskRunner(workers=-1)
