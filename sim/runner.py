"""Run many renders of one patch: in this process, across local processes, or on Dask.

Sweeps, spreads and tuning are loops of renders that differ only in overrides. Each
render is described by a :class:`Job` (a patch file, its ``REF.param=value``
overrides, the render options and optional moving parameters) and
:func:`run_jobs` returns each job's render report (the JSON dict of
:func:`sim.render.render`) in job order.

Where the renders run does not change what they give: every job loads its patch
from the file, compiles and simulates from power-on on its own, with no state shared
between jobs, so a job's report is the same number for number whichever process,
machine or order runs it. Executors:

- ``"local"`` (default): ``workers`` processes of this machine (``workers=1`` runs in
  this process, which is also what a single job does);
- ``"dask:ADDRESS"``: an existing ``dask.distributed`` scheduler (``dask:tcp://host:8786``);
  its workers need halfrail installed and must see the patch files at the same paths
  (a shared folder). Needs the optional ``cluster`` extra.
"""

from __future__ import annotations

import dataclasses
import multiprocessing
import os
import threading
from collections.abc import Sequence
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from dataclasses import dataclass

import numpy as np

from sim.errors import HalfrailError, UsageError
from sim.fileio import json_safe
from sim.render import RenderOptions

#: Executor names: local processes, or a Dask scheduler given as ``dask:ADDRESS``.
LOCAL = "local"
DASK_PREFIX = "dask:"

#: Seconds to wait for a Dask scheduler to answer before giving up with a clear message
#: (a scheduler on the same network answers in well under a second; this leaves room for
#: a busy one without making a typo in the address hang for long).
DASK_CONNECT_SECONDS = 10.0

#: Key added to a report by ``keep_audio=True``: the listening signal at the WAV's rate
#: in volts, as a float64 array of shape (samples,).
AUDIO_KEY = "audio_volts"

#: How a failed job travels back from a worker: a plain dict with this key (exceptions
#: of our own are turned into text in the worker, so no class has to unpickle there).
_FAILED = "__halfrail_failed__"

#: Loading the compiled kernel is done once per process; threads of an in-process Dask
#: worker share the process, so the first load is guarded.
_KERNEL_LOCK = threading.Lock()


@dataclass(frozen=True)
class Job:
    """One render of a batch.

    patch_path: the patch file (read by whichever process runs the job).
    overrides: ``"REF.param=value"`` strings, applied on top of the file's own values
        as ``--set`` does.
    opts: render options (seconds, settle, rate_hz, quality...); the progress bar of a
        single render is always off inside a batch.
    moves: moving parameters (:class:`sim.render.Move`) added to ``opts.moves``.
    """

    patch_path: str
    overrides: tuple[str, ...] = ()
    opts: RenderOptions = dataclasses.field(default_factory=RenderOptions)
    moves: tuple = ()

    def describe(self) -> str:
        """``R3.value=47k, supply.volts=7.5`` (or ``as written``) for messages."""
        shown = [*self.overrides, *(f"move {move}" for move in self.moves)]
        return ", ".join(shown) if shown else "as written"


class JobError(HalfrailError):
    """A job of a batch failed; the message names the job's overrides.

    ``exit_status`` is the failed job's own (2 for a patch or option problem, 3 for the
    solver), so the command exits as a single render would have.
    """

    def __init__(self, message: str, *, index: int, job: Job, exit_status: int):
        self.index, self.job, self.exit_status = index, job, exit_status
        super().__init__(message)


def _load_kernel() -> None:
    from sim import kernel

    with _KERNEL_LOCK:
        kernel.load()


def probe_measures(report: dict, probe: str | None) -> dict:
    """The measures of a render report at ``probe`` (None: the listening signal)."""
    return report["listen"] if probe is None else report["probes"][probe]


def render_job(job: Job, keep_audio: bool = False) -> dict:
    """Render ``job`` in this process (nothing written) and return its report.

    The report is plain JSON data (:func:`sim.fileio.json_safe`); with ``keep_audio`` it
    also holds ``AUDIO_KEY``: the listening signal at ``opts.rate_hz`` in volts, shape
    (samples,), for joining renders into one WAV. Raises the job's HalfrailError.
    """
    from sim.patch import load_patch
    from sim.render import render

    _load_kernel()
    opts = dataclasses.replace(job.opts, progress=False, wav=keep_audio,
                               moves=tuple(job.opts.moves) + tuple(job.moves))
    patch = load_patch(job.patch_path, job.overrides)
    result = render(patch, opts=opts, write=False)
    report = json_safe(result.report)
    if keep_audio:
        report[AUDIO_KEY] = np.asarray(result.audio_volts, dtype=np.float64)
    return report


def _worker(job: Job, keep_audio: bool) -> dict:
    """:func:`render_job` for any process: our errors come back as plain data."""
    try:
        return render_job(job, keep_audio)
    except HalfrailError as error:
        return {_FAILED: str(error), "exit_status": error.exit_status}


def _checked(index: int, job: Job, report: dict) -> dict:
    """``report``, or a JobError naming the job when the worker sent back a failure."""
    if _FAILED in report:
        raise JobError(f"run {index + 1} ({job.describe()}): {report[_FAILED]}", index=index,
                       job=job, exit_status=report["exit_status"])
    return report


def check_executor(executor: str) -> str | None:
    """The Dask address of ``executor``, or None for ``"local"``; UsageError otherwise."""
    if executor == LOCAL:
        return None
    if executor.startswith(DASK_PREFIX) and executor[len(DASK_PREFIX):].strip():
        return executor[len(DASK_PREFIX):].strip()
    raise UsageError(f"unknown executor {executor!r}: expected {LOCAL!r} or "
                     f"'{DASK_PREFIX}ADDRESS' (an existing Dask scheduler, such as "
                     f"{DASK_PREFIX}tcp://127.0.0.1:8786)")


def default_workers() -> int:
    """Local worker processes when none are asked for: one per core."""
    return os.cpu_count() or 1


def run_jobs(jobs: Sequence[Job], workers: int | None = None, executor: str = LOCAL,
             progress: bool = True, label: str = "", keep_audio: bool = False) -> list[dict]:
    """Render every job (nothing written) and return each render report, in job order.

    workers: local processes (default :func:`default_workers`); 1 runs in this
    process; ignored by Dask, whose cluster decides. executor: ``"local"`` or
    ``"dask:ADDRESS"`` (an existing dask.distributed scheduler). The reports are the
    same whichever executor and however many workers. progress: a bar over the jobs,
    labelled ``label``. keep_audio: add ``AUDIO_KEY`` to each report (see
    :func:`render_job`). A failed job raises :class:`JobError` naming its overrides;
    an unreachable scheduler or a bad option raises UsageError.
    """
    jobs = list(jobs)
    address = check_executor(executor)
    if workers is None:
        workers = default_workers()
    if not (isinstance(workers, int) and workers >= 1):
        raise UsageError(f"--workers must be a whole number of at least 1, got {workers!r}")
    for job in jobs:
        job.opts.check()
    if not jobs:
        return []
    bar = _bar(len(jobs), progress, label)
    try:
        if address is not None:
            return _run_dask(jobs, address, keep_audio, bar)
        if workers == 1 or len(jobs) == 1:
            return _run_here(jobs, keep_audio, bar)
        return _run_processes(jobs, min(workers, len(jobs)), keep_audio, bar)
    finally:
        bar.close()


def _bar(total: int, progress: bool, label: str):
    from tqdm import tqdm

    return tqdm(total=total, desc=label or "renders", unit="render", disable=not progress)


def _run_here(jobs: list[Job], keep_audio: bool, bar) -> list[dict]:
    out = []
    for index, job in enumerate(jobs):
        out.append(_checked(index, job, _worker(job, keep_audio)))
        bar.update(1)
    return out


def _context():
    """Start method of local workers: fork where it exists, so each worker inherits the
    compiled kernel already loaded here instead of loading it again (about a second)."""
    methods = multiprocessing.get_all_start_methods()
    return multiprocessing.get_context("fork" if "fork" in methods else "spawn")


def _run_processes(jobs: list[Job], workers: int, keep_audio: bool, bar) -> list[dict]:
    _load_kernel()
    results: list[dict | None] = [None] * len(jobs)
    pool = ProcessPoolExecutor(max_workers=workers, mp_context=_context())
    try:
        pending = {pool.submit(_worker, job, keep_audio): index for index, job in enumerate(jobs)}
        while pending:
            done, _ = wait(pending, return_when=FIRST_COMPLETED)
            for future in done:
                index = pending.pop(future)
                results[index] = _checked(index, jobs[index], future.result())
                bar.update(1)
    finally:
        pool.shutdown(wait=True, cancel_futures=True)
    return results


def _run_dask(jobs: list[Job], address: str, keep_audio: bool, bar) -> list[dict]:
    try:
        from dask.distributed import Client, as_completed
    except ImportError as error:
        raise UsageError("--executor dask:... needs the optional Dask library: "
                         "pip install 'halfrail[cluster]'") from error
    try:
        client = Client(address, timeout=DASK_CONNECT_SECONDS, set_as_default=False)
    except (OSError, TimeoutError) as error:
        raise UsageError(f"cannot reach the Dask scheduler at {address} within "
                         f"{DASK_CONNECT_SECONDS:g} s: {error}") from error
    results: list[dict | None] = [None] * len(jobs)
    # Workers may run in another folder: give them the patch's full path.
    sent = [dataclasses.replace(job, patch_path=os.path.abspath(job.patch_path)) for job in jobs]
    try:
        futures = [client.submit(_worker, job, keep_audio, pure=False) for job in sent]
        index_of = {future.key: index for index, future in enumerate(futures)}
        for future in as_completed(futures, loop=client.loop):
            index = index_of[future.key]
            results[index] = _checked(index, jobs[index], future.result())
            bar.update(1)
    finally:
        client.close()
    return results
