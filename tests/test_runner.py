"""sim.runner: a batch of renders gives the same reports wherever and in whatever order it runs."""

from pathlib import Path

import numpy as np
import pytest

from sim import runner
from sim.errors import HalfrailError, UsageError
from sim.render import Move, RenderOptions
from sim.runner import AUDIO_KEY, Job, JobError, run_jobs

ROOT = Path(__file__).resolve().parents[1]
OSCILLATOR = str(ROOT / "scenarios" / "tri-square.yaml")

#: Short renders: 0.1 s kept holds about 40 periods of the oscillator, plenty for a
#: steady pitch, and keeps a batch of three under a couple of seconds.
OPTS = RenderOptions(seconds=0.1, settle=0.05)

#: Three variants of the integrator resistor.
JOBS = [Job(OSCILLATOR, (f"R3.value={ohms}",), OPTS) for ohms in ("82k", "100k", "120k")]


def timeless(report: dict) -> dict:
    """A report without the solver's wall-clock time, the one figure that is not a
    result of the simulation (it depends on how busy the machine is)."""
    solver = {k: v for k, v in report["solver"].items() if k != "wall_seconds"}
    return {**report, "solver": solver, AUDIO_KEY: None}


def assert_same_reports(got: list[dict], expected: list[dict]) -> None:
    assert [timeless(r) for r in got] == [timeless(r) for r in expected]
    for a, b in zip(got, expected):
        np.testing.assert_array_equal(a[AUDIO_KEY], b[AUDIO_KEY])


@pytest.fixture(scope="module")
def serial():
    return run_jobs(JOBS, workers=1, progress=False, keep_audio=True)


def test_reports_come_back_in_job_order(serial):
    # source: closed form f = R2 / (4 R1 R3 C1): the pitch falls as R3 grows
    freqs = [r["listen"]["freq_hz"] for r in serial]
    assert freqs == sorted(freqs, reverse=True)
    assert [r["overrides"] for r in serial] == [list(job.overrides) for job in JOBS]


def test_the_same_jobs_run_again_give_the_same_numbers(serial):
    assert_same_reports(run_jobs(JOBS, workers=1, progress=False, keep_audio=True), serial)


def test_two_local_processes_give_the_same_reports_as_one(serial):
    assert_same_reports(run_jobs(JOBS, workers=2, progress=False, keep_audio=True), serial)


def test_the_order_of_the_jobs_does_not_change_any_report(serial):
    backwards = run_jobs(JOBS[::-1], workers=2, progress=False, keep_audio=True)
    assert_same_reports(backwards[::-1], serial)


@pytest.mark.parametrize("processes", [False, True])
def test_a_local_dask_cluster_gives_the_same_reports(serial, processes):
    """In this process (threads), and in a worker process of its own, started afresh
    with Dask's own settings: the reports agree to the bit."""
    from dask.distributed import LocalCluster

    with LocalCluster(n_workers=1, threads_per_worker=2, processes=processes,
                      dashboard_address=None) as cluster:
        got = run_jobs(JOBS, executor=f"dask:{cluster.scheduler_address}", progress=False,
                       keep_audio=True)
    assert_same_reports(got, serial)


def test_kept_audio_is_the_listening_signal_at_the_wav_rate(serial):
    for report in serial:
        assert report[AUDIO_KEY].shape == (round(OPTS.seconds * OPTS.rate_hz),)


def test_reports_without_audio_are_plain_json_data(serial):
    import json

    report = run_jobs(JOBS[:1], workers=1, progress=False)[0]
    assert AUDIO_KEY not in report
    assert json.loads(json.dumps(report, allow_nan=False)) == report


def test_a_jobs_moves_turn_its_parameter_during_the_render():
    job = Job(OSCILLATOR, (), OPTS, moves=(Move("R3", "value", "90k", "110k"),))
    report = run_jobs([job], progress=False)[0]
    assert report["moves"] == [{"param": "R3.value", "start": 90e3, "stop": 110e3,
                                "from_seconds": OPTS.settle,
                                "to_seconds": OPTS.settle + OPTS.seconds}]


@pytest.mark.parametrize("workers", [1, 2])
def test_a_failing_job_is_named_by_its_overrides_and_keeps_its_exit_status(workers):
    jobs = [JOBS[0], Job(OSCILLATOR, ("R3.value=-4k7",), OPTS)]
    with pytest.raises(JobError) as caught:
        run_jobs(jobs, workers=workers, progress=False)
    message = str(caught.value)
    assert "run 2 (R3.value=-4k7)" in message and "must be positive" in message
    assert "\n" not in message
    assert caught.value.exit_status == 2 and caught.value.index == 1


@pytest.mark.parametrize("executor", ["dask", "dask:", "threads", "Local"])
def test_an_unknown_executor_is_a_usage_error(executor):
    with pytest.raises(UsageError, match="unknown executor"):
        run_jobs(JOBS, executor=executor, progress=False)


@pytest.mark.parametrize("workers", [0, -1, 1.5])
def test_workers_must_be_a_whole_number_of_at_least_one(workers):
    with pytest.raises(UsageError, match="--workers"):
        run_jobs(JOBS, workers=workers, progress=False)


def test_an_unreachable_scheduler_is_a_usage_error(monkeypatch):
    monkeypatch.setattr(runner, "DASK_CONNECT_SECONDS", 1.0)
    # Port 9 (discard) on the loopback: nothing of ours listens there.
    with pytest.raises(UsageError, match="cannot reach the Dask scheduler"):
        run_jobs(JOBS, executor="dask:tcp://127.0.0.1:9", progress=False)


def test_bad_render_options_fail_before_anything_runs():
    bad = Job(OSCILLATOR, (), RenderOptions(seconds=-1.0))
    with pytest.raises(HalfrailError, match="--seconds"):
        run_jobs([bad], progress=False)


def test_no_jobs_give_no_reports():
    assert run_jobs([], progress=False) == []
