"""The batch runner: many pairs, warm worker processes, resume, failure isolation, a summary.

:func:`run_batch` takes the pairs of :mod:`stereomesh.io.manifest` and converts
each with :func:`convert_pair` (:func:`stereomesh.jobs.run_job` in a worker
that keeps its kernels and solver :class:`~stereomesh.matching.sgm.Workspace`
between pairs), on local worker processes or on a Dask distributed cluster.

Layout of ``--out DIR``::

    NAME/                 one finished pair (outputs, report.json, log.txt, checksums.sha256)
    summary.csv, summary.json, index.html, SHA256SUMS
    batch.log             events of every run; tracebacks of failures
    _batch/tmp/           pairs being written (removed when a run starts)
    _batch/failed/NAME/   what a failed pair left: partial outputs, report, log

Integrity: a pair is written into ``_batch/tmp/`` and renamed to ``NAME/``
when complete (a rename within one file system is atomic), so a ``NAME/`` folder
is always a finished pair; a killed run leaves at most a temporary folder,
which the next run removes. A finished pair is skipped when the fingerprint in
its report (SHA-256 of the input files, every parameter, the software version,
layout and swap) equals the one the pair has now, and redone otherwise.

Failures: bad input (an unreadable image, a pair that cannot be rectified, a
calibration that does not fit) fails the pair at once, since trying again
gives the same answer; a worker that dies (killed, often by the kernel's
out-of-memory killer), a pair past ``pair_timeout`` or an internal error is
tried again up to ``retries`` times. Other pairs go on either way.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import shutil
import signal
import socket
import sys
import time
import traceback
import uuid
from collections import deque
from dataclasses import dataclass
from pathlib import Path

from stereomesh import CAUTION, __version__
from stereomesh.errors import InputError
from stereomesh.io.manifest import PairSpec
from stereomesh.params import Params

BATCH_DIR = "_batch"

# Flags for a human look on the contact sheet; a pair past any of them is shown marked.
LOW_DENSITY = 0.5  # fraction of left pixels with a kept disparity
HIGH_RESIDUAL_PX = 1.0  # median vertical residual of matches after rectification
MANY_FILLED = 0.05  # fraction of mesh vertices made by hole filling

# Memory a worker needs besides the solver's budget: the interpreter, numba's
# kernels, Open3D and PyMeshLab loaded (about 400 MB measured here), and the
# geometry stages' arrays, about 1 KB per pixel of a pair at most.
_WORKER_BASE_MB = 450
_BYTES_PER_PIXEL = 1000


class PairTimeout(Exception):  # noqa: N818  (a state the batch records, like Cancelled)
    """Raised in a worker by the progress callback when a pair passes its time limit."""


@dataclass
class BatchResult:
    """What :func:`run_batch` returns.

    Attributes
    ----------
    rows : list of dict
        One summary row per pair (see :func:`summary_row`).
    done, skipped, failed : int
        Pairs converted in this run, found finished from an earlier run, failed.
    """

    rows: list
    done: int
    skipped: int
    failed: int


# --- fingerprints and resume ------------------------------------------------------------------

def pair_params(base: Params, spec: PairSpec) -> Params:
    """The batch's parameters with the pair's manifest overrides, validated."""
    if not spec.overrides:
        return base
    return base.with_overrides(spec.overrides, source=f"manifest row {spec.name!r}")


def params_from_dict(data: dict) -> Params:
    """:class:`Params` from :meth:`Params.to_dict` (field names are unique over sections)."""
    flat = {k: v for section in data.values() for k, v in section.items()}
    return Params().with_overrides(flat)


def fingerprint(spec: PairSpec, params: Params) -> dict:
    """What decides whether a finished pair is still current.

    Returns
    -------
    dict
        ``inputs`` (SHA-256 of each input and calibration file, in order),
        ``params``, ``version``, ``layout``, ``swap`` and ``key``, the SHA-256 of
        all of them. Paths are left out: a folder moved elsewhere is still done.
    """
    from stereomesh.report import sha256_of

    files = [*spec.inputs, *([spec.calib] if spec.calib is not None else [])]
    record = {"inputs": [sha256_of(p) for p in files], "params": params.to_dict(),
              "version": __version__, "layout": spec.layout, "swap": spec.swap}
    text = json.dumps(record, sort_keys=True, default=str)
    return {**record, "key": hashlib.sha256(text.encode()).hexdigest()}


def finished_report(out_dir: Path, name: str) -> dict | None:
    """The report of a finished pair folder ``out_dir/name``, or None."""
    path = out_dir / name / "report.json"
    try:
        report = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return report if report.get("status") == "ok" else None


def read_checksums(folder: Path) -> dict[str, str]:
    """``{relative path: sha256}`` from a pair's ``checksums.sha256``."""
    out = {}
    with contextlib.suppress(OSError):
        for line in (folder / "checksums.sha256").read_text(encoding="utf-8").splitlines():
            digest, _, rel = line.partition("  ")
            if rel:
                out[rel] = digest
    return out


def hash_folder(folder: Path) -> dict[str, str]:
    """SHA-256 of every file under ``folder``, by path relative to it, sorted."""
    from stereomesh.report import sha256_of

    return {p.relative_to(folder).as_posix(): sha256_of(p)
            for p in sorted(folder.rglob("*")) if p.is_file()}


# --- one pair, in a worker --------------------------------------------------------------------

_STATE: dict = {}
"""Per worker process: the solver workspace kept between pairs, the warm-up flag."""


def _workspace():
    if "workspace" not in _STATE:
        from stereomesh.matching.sgm import Workspace

        _STATE["workspace"] = Workspace()
    return _STATE["workspace"]


def warm_worker(params: Params | None = None) -> float:
    """Load the kernels and geometry libraries once per worker process; seconds taken.

    A tiny pair runs up to the cleaned cloud through the worker's workspace, so
    the kernels the pairs select are loaded (or compiled) before the first one.
    """
    if _STATE.get("warm"):
        return 0.0
    t = time.perf_counter()
    import numpy as np

    from stereomesh.matching.disparity import warm_up
    from stereomesh.pipeline import StereoPair, reconstruct
    from stereomesh.rectify import RectifiedRig

    params = params or Params()
    warm_up(params.disparity)
    right = np.random.default_rng(0).integers(0, 255, (48, 96, 3), dtype=np.uint8)
    pair = StereoPair(np.roll(right, 8, axis=1), right,
                      RectifiedRig(focal_px=100.0, cx=48.0, cy=24.0, baseline=0.1))
    with contextlib.suppress(Exception):  # a broken install shows in the first pair's error
        reconstruct(pair, Params().with_overrides({"disp_range": "0:32"}),
                    workspace=_workspace(), stop_after="filter_cloud")
        import pymeshlab  # noqa: F401  (its first import takes seconds)
    _STATE["warm"] = True
    _STATE["warm_seconds"] = time.perf_counter() - t
    return _STATE["warm_seconds"]


def _replace_dir(src: Path, dst: Path, trash: Path) -> None:
    """Rename ``src`` onto ``dst``; an old ``dst`` is moved to ``trash`` first, then removed.

    Between the two renames no ``dst`` exists, so a reader never sees a mix.
    """
    old = None
    if dst.exists():
        old = trash / f"{dst.name}.{uuid.uuid4().hex[:8]}"
        trash.mkdir(parents=True, exist_ok=True)
        os.replace(dst, old)
    os.replace(src, dst)
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)


class _PairLog:
    """The pair's ``log.txt``: stage progress with times, then the outcome."""

    def __init__(self, path: Path, name: str, deadline: float | None, notify=None):
        self.fh = open(path, "a", encoding="utf-8")  # noqa: SIM115  (closed by close())
        self.t0 = time.perf_counter()
        self.deadline = deadline
        self.notify = notify
        self.step = None
        self.stage = "read"
        self.name = name

    def write(self, text: str) -> None:
        self.fh.write(f"{time.strftime('%Y-%m-%dT%H:%M:%S')} +{time.perf_counter() - self.t0:7.2f}"
                      f" s  {text}\n")
        self.fh.flush()

    def progress(self, step: str, fraction: float) -> None:
        if step != self.step:  # one line per step, not per report
            self.step = step
            if step.replace(" ", "_") in ("disparity", "triangulate", "filter_cloud", "surface",
                                          "repair"):
                self.stage = step.replace(" ", "_")
            self.write(f"{fraction:6.1%}  {self.stage}: {step}" if step != self.stage.replace(
                "_", " ") else f"{fraction:6.1%}  {step}")
            if self.notify is not None:
                self.notify(self.stage, step)
        if self.deadline is not None and time.monotonic() > self.deadline:
            raise PairTimeout(f"the pair took longer than its time limit (--pair-timeout) "
                              f"and was stopped during {step!r}")

    def close(self) -> None:
        self.fh.close()


def convert_pair(task: dict, notify=None) -> dict:
    """Convert one pair in this process: write it under a temporary name, then commit it.

    Parameters
    ----------
    task : dict
        ``spec`` (:meth:`PairSpec.to_dict`), ``params`` (:meth:`Params.to_dict`),
        ``out`` (the batch folder), ``fingerprint`` (:func:`fingerprint`),
        ``attempt`` (1 for the first try), ``timeout`` (seconds or None).
    notify : callable, optional
        ``notify(stage, step)`` on each new step (the local pool forwards it to
        the batch log).

    Returns
    -------
    dict
        The outcome: ``name``, ``status`` (``"done"`` or ``"failed"``),
        ``seconds``, ``worker`` (host and pid), and either ``report`` and
        ``hashes`` or ``kind`` (``input``, ``timeout``, ``crash``), ``stage``,
        ``reason``, ``traceback``.

    Examples
    --------
    Run by the batch's workers; see :func:`run_batch`.
    """
    from stereomesh.jobs import run_job
    from stereomesh.report import Report, input_records, jsonable

    spec = PairSpec.from_dict(task["spec"])
    params = params_from_dict(task["params"])
    out = Path(task["out"])
    warm_worker(params)
    # The first pair of a worker carries its warm-up time; later ones show the reuse.
    before = _STATE.get("pairs", 0)
    _STATE["pairs"] = before + 1
    warm = _STATE["warm_seconds"] if before == 0 else 0.0
    t0 = time.perf_counter()
    tmp = out / BATCH_DIR / "tmp" / f"{spec.name}.{os.getpid()}.{uuid.uuid4().hex[:8]}"
    tmp.mkdir(parents=True)
    deadline = None if not task.get("timeout") else time.monotonic() + float(task["timeout"])
    log = _PairLog(tmp / "log.txt", spec.name, deadline, notify)
    import numba  # loaded by the warm-up already

    worker = {"host": socket.gethostname(), "pid": os.getpid(),
              "numba_threads": numba.get_num_threads()}
    log.write(f"pair {spec.name} attempt {task['attempt']} on {worker['host']} pid "
              f"{worker['pid']}" + (f" (worker warm-up {warm:.1f} s)" if warm else ""))
    outcome: dict = {"name": spec.name, "worker": worker, "attempt": task["attempt"]}
    error = None
    try:
        run_job(spec.inputs, spec.calib, tmp, params, command="batch", progress=log.progress,
                workspace=_workspace(), layout=spec.layout, swap=spec.swap)
    except BaseException as exc:  # noqa: BLE001  (recorded; KeyboardInterrupt re-raised below)
        if isinstance(exc, KeyboardInterrupt | SystemExit):
            log.close()
            shutil.rmtree(tmp, ignore_errors=True)
            raise
        error = exc
    final = out / spec.name
    report_path = tmp / "report.json"
    if error is not None and not report_path.is_file():  # failed while reading: no report yet
        with contextlib.suppress(Exception):
            records = input_records([*spec.inputs, *([spec.calib] if spec.calib else [])])
            rep = Report("batch", params, records)
            rep.fail("read", error)
            rep.finish(report_path, status="failed")
    try:
        report = json.loads(report_path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        report = {"status": "failed"}
    report["meta"] = dict(spec.meta)
    report["batch"] = {"name": spec.name, "fingerprint": task["fingerprint"],
                       "attempt": task["attempt"], "worker": worker,
                       "worker_warm_up_seconds": round(warm, 3),
                       "worker_pairs_before": before}
    seconds = round(time.perf_counter() - t0, 3)
    outcome["seconds"] = seconds
    if error is None:
        # The report names the folder it will have, not the temporary one.
        text = json.dumps(jsonable(report), indent=2).replace(str(tmp), str(final)) + "\n"
        from stereomesh.io.atomic import write_text_atomic

        write_text_atomic(report_path, text)
        log.write(f"done in {seconds:.2f} s")
        log.close()
        hashes = hash_folder(tmp)
        sums = "".join(f"{digest}  {rel}\n" for rel, digest in hashes.items())
        write_text_atomic(tmp / "checksums.sha256", sums)
        _replace_dir(tmp, final, out / BATCH_DIR / "trash")
        # What an earlier failed attempt left is no longer the pair's state.
        shutil.rmtree(out / BATCH_DIR / "failed" / spec.name, ignore_errors=True)
        outcome.update(status="done", report=json.loads(text), hashes=hashes)
        return outcome
    kind = ("timeout" if isinstance(error, PairTimeout)
            else "input" if isinstance(error, InputError) else "crash")
    stage = report.get("failed_stage", log.stage)
    reason = f"{type(error).__name__}: {error}"
    trace = "".join(traceback.format_exception(error))
    log.write(f"failed ({kind}) at stage {stage}: {reason}")
    log.fh.write(trace)
    log.close()
    from stereomesh.io.atomic import write_text_atomic

    write_text_atomic(report_path, json.dumps(jsonable(report), indent=2) + "\n")
    failed_dir = out / BATCH_DIR / "failed"
    failed_dir.mkdir(parents=True, exist_ok=True)
    _replace_dir(tmp, failed_dir / spec.name, out / BATCH_DIR / "trash")
    outcome.update(status="failed", kind=kind, stage=stage, reason=reason, traceback=trace,
                   report=report)
    return outcome


# --- local worker processes -------------------------------------------------------------------

def _limit_opencv_threads(threads: int) -> None:
    """OpenCV's own pool to the worker's share of the cores.

    Its threads keep spinning for a while after a call (reading, rectifying,
    previews) and then compete with numba's for the same cores.
    """
    with contextlib.suppress(Exception):
        import cv2

        cv2.setNumThreads(threads)


def _local_worker(conn, threads: int, params_dict: dict) -> None:
    """A worker process: warm up, then convert pairs sent over ``conn`` until it closes."""
    # Before numba loads: each worker uses its share of the cores, no more.
    os.environ["NUMBA_NUM_THREADS"] = str(threads)
    os.environ.setdefault("OMP_NUM_THREADS", str(threads))
    # The command's own settings (threading layer, small pages): a worker is our process,
    # and each pair's arrays are fresh memory touched about once, as in one command
    # (benchmarks/batch.py: 57-75 against 50-70 pairs a minute with numpy's huge pages).
    from stereomesh.cli import configure_process

    configure_process()
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # the parent decides what an interrupt stops
    _limit_opencv_threads(threads)
    warm_worker(params_from_dict(params_dict))
    conn.send(("ready", None))
    while True:
        try:
            task = conn.recv()
        except (EOFError, OSError):  # the parent is gone
            return
        if task is None:
            return
        name = task["spec"]["name"]
        conn.send(("start", name))
        outcome = convert_pair(task, notify=lambda stage, step, n=name: conn.send(
            ("step", (n, stage, step))))
        conn.send(("result", outcome))


class _Worker:
    def __init__(self, ctx, threads: int, params_dict: dict):
        self.conn, child = ctx.Pipe()
        self.process = ctx.Process(target=_local_worker, args=(child, threads, params_dict),
                                   daemon=True)
        self.process.start()
        child.close()
        self.task = None
        self.started = None
        self.stage = "read"

    def stop(self, kill: bool = False) -> None:
        if kill:
            with contextlib.suppress(Exception):
                self.process.kill()
        else:
            with contextlib.suppress(Exception):
                self.conn.send(None)
        self.process.join(5)
        if self.process.is_alive():
            self.process.kill()
            self.process.join(5)
        self.conn.close()


def _signal_name(code: int | None) -> str:
    if code is None or code >= 0:
        return f"exit code {code}"
    with contextlib.suppress(ValueError):
        return signal.Signals(-code).name
    return f"signal {-code}"


def _run_local(tasks: list[dict], workers: int, threads: int, params_dict: dict, events) -> None:
    """Run ``tasks`` on ``workers`` local processes; ``events.finish(task, outcome)`` may
    return a task to try again. A dead or timed-out worker is replaced by a fresh one."""
    import multiprocessing as mp
    from multiprocessing.connection import wait

    ctx = mp.get_context("spawn")  # no fork of a process that has loaded OpenMP or threads
    queue = deque(tasks)
    pool = [_Worker(ctx, threads, params_dict) for _ in range(min(workers, len(tasks)))]
    try:
        while queue or any(w.task for w in pool):
            for w in pool:
                if w.task is None and queue:
                    w.task, w.started, w.stage = queue.popleft(), None, "read"
                    w.conn.send(w.task)
            deadlines = [w.started + w.task["timeout"] * 1.2 + 5 for w in pool
                         if w.task and w.started and w.task.get("timeout")]
            wait_for = max(0.05, min(deadlines) - time.monotonic()) if deadlines else 1.0
            wait([w.conn for w in pool] + [w.process.sentinel for w in pool],
                 timeout=min(wait_for, 1.0))
            for i, w in enumerate(pool):
                outcome = None
                try:
                    while w.conn.poll():
                        kind, value = w.conn.recv()
                        if kind == "start":
                            w.started = time.monotonic()
                            events.started(w.task)
                        elif kind == "step":
                            w.stage = value[1]
                            events.step(*value)
                        elif kind == "result":
                            outcome = value
                            break
                except (EOFError, OSError):
                    pass
                if outcome is not None:
                    task, w.task = w.task, None
                    retry = events.finish(task, outcome)
                    if retry:
                        queue.append(retry)
                    continue
                dead = not w.process.is_alive()
                late = (w.task and w.started and w.task.get("timeout")
                        and time.monotonic() > w.started + w.task["timeout"] * 1.2 + 5)
                if not (dead or late):
                    continue
                task = w.task
                w.stop(kill=True)
                code = w.process.exitcode
                pool[i] = _Worker(ctx, threads, params_dict)
                if task is None:
                    continue
                if late:
                    outcome = {"kind": "timeout", "reason": "the pair passed its time limit "
                               "(--pair-timeout) and its worker was stopped"}
                else:
                    outcome = {"kind": "killed", "reason": f"the worker process died "
                               f"({_signal_name(code)}; SIGKILL usually means the system ran "
                               "out of memory: give fewer --workers or a smaller "
                               "memory_budget_mb)"}
                outcome.update(name=task["spec"]["name"], status="failed", stage=w.stage,
                               traceback="", attempt=task["attempt"], seconds=None)
                _keep_what_a_dead_worker_left(Path(task["out"]), task["spec"]["name"],
                                              w.process.pid, outcome["reason"])
                retry = events.finish(task, outcome)
                if retry:
                    queue.append(retry)
    finally:
        for w in pool:
            w.stop(kill=w.task is not None)


def _keep_what_a_dead_worker_left(out: Path, name: str, pid: int, reason: str) -> None:
    """Move a dead worker's temporary pair folder to ``_batch/failed/NAME``, log appended."""
    tmp = out / BATCH_DIR / "tmp"
    for folder in tmp.glob(f"{name}.{pid}.*"):
        with contextlib.suppress(OSError), open(folder / "log.txt", "a",
                                                encoding="utf-8") as fh:
            fh.write(f"{time.strftime('%Y-%m-%dT%H:%M:%S')} stopped: {reason}\n")
        failed = out / BATCH_DIR / "failed"
        failed.mkdir(parents=True, exist_ok=True)
        with contextlib.suppress(OSError):
            _replace_dir(folder, failed / name, out / BATCH_DIR / "trash")
    _clean_tmp(out, name)


def _clean_tmp(out: Path, name: str | None = None) -> None:
    """Remove temporary pair folders (of one pair, or all) that no run will finish."""
    tmp = out / BATCH_DIR / "tmp"
    if not tmp.is_dir():
        return
    for p in tmp.iterdir():
        if name is None or p.name.startswith(f"{name}."):
            shutil.rmtree(p, ignore_errors=True)


# --- a Dask cluster ---------------------------------------------------------------------------

def _dask_convert(task: dict) -> dict:
    """:func:`convert_pair` in a Dask worker: numba threads as the worker's threads."""
    if "numba" not in sys.modules and "NUMBA_NUM_THREADS" not in os.environ:
        with contextlib.suppress(Exception):
            from dask.distributed import get_worker

            os.environ["NUMBA_NUM_THREADS"] = str(max(1, get_worker().state.nthreads))
    os.environ.setdefault("NUMBA_THREADING_LAYER_PRIORITY", "omp tbb workqueue")
    if not _STATE.get("warm"):
        _limit_opencv_threads(int(os.environ.get("NUMBA_NUM_THREADS", "1")))
    return convert_pair(task)


def _connect(address: str):
    """A Dask client of the scheduler at ``address``, or :class:`InputError` saying why not."""
    try:
        from dask.distributed import Client
    except ImportError:
        raise InputError("--cluster needs dask.distributed: pip install 'dask[distributed]'") \
            from None
    try:
        return Client(address, timeout="10s")
    except (OSError, TimeoutError, ValueError) as exc:
        raise InputError(f"--cluster {address}: cannot reach a Dask scheduler there ({exc}); "
                         "check the address and that the scheduler runs") from None


def _run_dask(tasks: list[dict], client, events) -> None:
    """Run ``tasks`` through a Dask ``client`` (the scheduler places them); closes it."""
    from dask.distributed import as_completed

    try:
        futures = {}

        def submit(task):
            fut = client.submit(_dask_convert, task, pure=False,
                                key=f"stereomesh-{task['spec']['name']}-{uuid.uuid4().hex[:8]}")
            futures[fut.key] = task
            events.started(task)
            return fut

        pending = as_completed([submit(t) for t in tasks])
        for fut in pending:
            task = futures.pop(fut.key)
            try:
                outcome = fut.result()
            except Exception as exc:  # a worker lost (KilledWorker) or the task failed outside
                killed = type(exc).__name__ == "KilledWorker"
                outcome = {"name": task["spec"]["name"], "status": "failed",
                           "kind": "killed" if killed else "crash", "stage": None,
                           "reason": f"{type(exc).__name__}: {exc}", "attempt": task["attempt"],
                           "traceback": "".join(traceback.format_exception(exc)),
                           "seconds": None}
            retry = events.finish(task, outcome)
            if retry:
                pending.add(submit(retry))
    finally:
        client.close()


# --- the batch --------------------------------------------------------------------------------

def worker_memory_mb(pixels: int, params: Params) -> float:
    """Peak memory of a warm worker converting pairs of ``pixels`` pixels, MB.

    The libraries loaded, plus the solver's work memory (a reused workspace
    grows to the whole image's need, at most ``memory_budget_mb``; see
    :func:`stereomesh.matching.sgm.memory_bytes`; 256 hypotheses assumed for an
    automatic range), plus the geometry stages' arrays. Measured here on the
    640 x 480 demo pair with 128 hypotheses: 830-940 MB per worker; this gives 836.

    Examples
    --------
    >>> round(worker_memory_mb(640 * 480, Params().with_overrides({"disp_range": "64:192"})))
    836
    """
    from stereomesh.matching.sgm import memory_bytes
    from stereomesh.params import parse_disp_range

    dp = params.disparity
    rng = parse_disp_range(dp.disp_range) if dp.disp_range != "auto" else None
    n_disp = 256 if rng is None else rng[1] - rng[0]
    side = max(1, int(pixels ** 0.5))
    solver = memory_bytes(side, max(1, pixels // side), n_disp, block_rows=side) / 2**20
    return _WORKER_BASE_MB + min(dp.memory_budget_mb, solver) + pixels * _BYTES_PER_PIXEL / 2**20


def default_workers(specs: list[PairSpec], params: Params) -> tuple[int, int]:
    """Worker processes and numba threads each, from the cores and the memory a pair needs.

    The memory of a worker is its base (libraries loaded) plus the solver's
    ``memory_budget_mb`` plus the geometry stages' arrays of the largest pair
    seen from its image header; workers are limited to what 80 % of the
    available memory holds and to the cores.

    Returns
    -------
    int, int
        Workers and threads per worker (together at most the core count).
    """
    cores = os.cpu_count() or 1
    pixels = 0
    with contextlib.suppress(Exception):
        from PIL import Image

        for spec in specs[:20]:
            with Image.open(spec.inputs[0]) as im:
                w, h = im.size
            pixels = max(pixels, w * h // (2 if spec.layout == "side-by-side" else 1))
    need_mb = worker_memory_mb(pixels, params)
    available_mb = None
    with contextlib.suppress(OSError, ValueError):
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemAvailable:"):
                available_mb = int(line.split()[1]) / 1024
    workers = cores
    if available_mb:
        workers = max(1, min(cores, int(0.8 * available_mb // need_mb)))
    return workers, max(1, cores // workers)


class _Events:
    """Book-keeping of a run: attempts, retries, the batch log and the progress bar."""

    def __init__(self, out: Path, total: int, retries: int, bar):
        self.out, self.retries, self.bar = out, retries, bar
        self.outcomes: dict[str, dict] = {}
        self.failed = 0
        self.done = 0
        self.log = open(out / "batch.log", "a", encoding="utf-8")  # noqa: SIM115
        self.total = total

    def write(self, text: str) -> None:
        self.log.write(f"{time.strftime('%Y-%m-%dT%H:%M:%S')} {text}\n")
        self.log.flush()

    def started(self, task: dict) -> None:
        self.write(f"{task['spec']['name']}: attempt {task['attempt']} started")

    def step(self, name: str, stage: str, step: str) -> None:
        self.write(f"{name}: {stage}" + ("" if step == stage.replace("_", " ") else f": {step}"))

    def finish(self, task: dict, outcome: dict) -> dict | None:
        name = task["spec"]["name"]
        if outcome["status"] == "done":
            self.write(f"{name}: done in {outcome['seconds']:.2f} s")
            self.done += 1
        else:
            self.write(f"{name}: attempt {task['attempt']} failed ({outcome['kind']}) at stage "
                       f"{outcome.get('stage')}: {outcome['reason']}")
            if outcome.get("traceback"):
                self.log.write(outcome["traceback"])
            if outcome["kind"] != "input" and task["attempt"] <= self.retries:
                self.write(f"{name}: trying again")
                return {**task, "attempt": task["attempt"] + 1}
            self.failed += 1
            self._set_aside(name)
        self.outcomes[name] = outcome
        if self.bar is not None:
            self.bar.update(1)
            self.bar.set_description_str(f"batch: done {self.done}, failed {self.failed}, "
                                         f"left {self.total - self.done - self.failed}")
        return None

    def _set_aside(self, name: str) -> None:
        """Move an earlier result of a pair that failed now out of ``DIR/NAME``.

        Only pairs whose fingerprint changed are run, so a folder there holds
        the result of other inputs or parameters; it is kept, not deleted.
        """
        stale = self.out / name
        if stale.is_dir():
            dest = self.out / BATCH_DIR / "superseded" / f"{name}.{time.strftime('%Y%m%dT%H%M%S')}"
            dest.parent.mkdir(parents=True, exist_ok=True)
            os.replace(stale, dest)
            self.write(f"{name}: the earlier result (of other inputs or parameters) was moved "
                       f"to {dest}")

    def close(self) -> None:
        self.log.close()


def _terminate_as_interrupt():
    """Make SIGTERM (a job scheduler's stop) act like Ctrl-C; the handler it replaced."""
    import threading

    if threading.current_thread() is not threading.main_thread():
        return None

    def handler(signum, frame):
        raise KeyboardInterrupt

    return signal.signal(signal.SIGTERM, handler)


def run_batch(
    specs: list[PairSpec],
    out_dir: str | Path,
    params: Params,
    *,
    workers: int | None = None,
    threads: int | None = None,
    cluster: str | None = None,
    pair_timeout: float | None = None,
    retries: int = 1,
    progress_bar: bool = False,
    source: str = "",
) -> BatchResult:
    """Convert every pair (or find it finished), then write the summary and contact sheet.

    Parameters
    ----------
    specs : list of PairSpec
        From :func:`stereomesh.io.manifest.find_pairs`.
    out_dir : str or Path
        The batch folder (created; see the module docstring for its layout).
    params : Params
        The batch's parameters; manifest rows override them per pair.
    workers : int, optional
        Local worker processes (default: :func:`default_workers`).
    threads : int, optional
        numba threads of each local worker (default: the cores shared among the
        workers); fewer leave cores to other work on a shared machine.
    cluster : str, optional
        Address of a Dask distributed scheduler; then ``workers`` is unused.
    pair_timeout : float, optional
        Seconds a pair may take in its worker (warm-up excluded).
    retries : int
        Further attempts of a pair whose failure was not its input's fault.
    progress_bar : bool
        Draw one tqdm bar for the batch on stderr.
    source : str
        SOURCE as given, for the summary.

    Returns
    -------
    BatchResult

    Raises
    ------
    InputError
        Parameters of a manifest row out of range, an output folder that
        cannot be created, an unreachable cluster: nothing was run.

    Examples
    --------
    >>> from stereomesh.io.manifest import find_pairs            # doctest: +SKIP
    >>> result = run_batch(find_pairs("scans/"), "out", Params())  # doctest: +SKIP
    >>> result.failed                                              # doctest: +SKIP
    0
    """
    from stereomesh.io.calibration import load_calibration
    from stereomesh.jobs import prepare_out_dir

    if retries < 0:
        raise InputError(f"--retries must be 0 or more, got {retries}")
    if pair_timeout is not None and pair_timeout <= 0:
        raise InputError(f"--pair-timeout must be a positive number of seconds, got {pair_timeout}")
    if workers is not None and workers < 1:
        raise InputError(f"--workers must be 1 or more, got {workers}")
    if threads is not None and threads < 1:
        raise InputError(f"--threads must be 1 or more, got {threads}")
    # Everything that can be told before a pair runs is told now (exit 2, nothing run).
    per_pair = {s.name: pair_params(params, s) for s in specs}
    for calib in sorted({s.calib for s in specs if s.calib is not None}):
        load_calibration(calib)
    client = _connect(cluster) if cluster else None
    try:
        out = prepare_out_dir(out_dir)
    except InputError:
        if client is not None:
            client.close()
        raise
    (out / BATCH_DIR).mkdir(exist_ok=True)
    _clean_tmp(out)
    shutil.rmtree(out / BATCH_DIR / "trash", ignore_errors=True)

    prints, tasks, skipped = {}, [], {}
    for spec in specs:
        prints[spec.name] = fingerprint(spec, per_pair[spec.name])
        old = finished_report(out, spec.name)
        if old and old.get("batch", {}).get("fingerprint", {}).get("key") == \
                prints[spec.name]["key"]:
            skipped[spec.name] = old
            continue
        tasks.append({"spec": spec.to_dict(), "params": per_pair[spec.name].to_dict(),
                      "out": str(out), "fingerprint": prints[spec.name], "attempt": 1,
                      "timeout": pair_timeout})
    bar = None
    if progress_bar and tasks:
        from tqdm import tqdm

        # One bar: the counts in its description, the time left (ETA) at its end.
        bar = tqdm(total=len(tasks), file=sys.stderr, unit="pair",
                   desc=f"batch: done 0, failed 0, left {len(tasks)}",
                   bar_format="{desc} |{bar}| {n}/{total} [{elapsed}<{remaining}]")
    events = _Events(out, len(tasks), retries, bar)
    events.write(f"batch of {len(specs)} pairs from {source or '?'}: {len(skipped)} finished "
                 f"earlier and unchanged, {len(tasks)} to convert"
                 + (f" on {cluster}" if cluster else ""))
    t0 = time.perf_counter()
    interrupted = False
    previous = _terminate_as_interrupt()
    try:
        if tasks:
            if client is not None:
                _run_dask(tasks, client, events)
                client = None
            else:
                n = default_workers(specs, params)[0] if workers is None else workers
                n = min(n, len(tasks))  # the cores of workers with nothing to do go to the rest
                if threads is None:
                    threads = max(1, (os.cpu_count() or 1) // n)
                events.write(f"{n} local worker processes, {threads} numba threads each")
                _run_local(tasks, n, threads, params.to_dict(), events)
    except KeyboardInterrupt:
        interrupted = True
        events.write("interrupted: pairs not finished are left to the next run")
        raise
    finally:
        if client is not None:  # no pair needed the cluster
            client.close()
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)
        if bar is not None:
            bar.close()
        _clean_tmp(out)
        elapsed = time.perf_counter() - t0
        rows = []
        for spec in specs:
            if spec.name in skipped:
                rows.append(summary_row(spec, "skipped", skipped[spec.name],
                                        read_checksums(out / spec.name)))
            elif spec.name in events.outcomes:
                o = events.outcomes[spec.name]
                rows.append(summary_row(spec, o["status"], o.get("report"), o.get("hashes", {}),
                                        o))
            else:
                rows.append(summary_row(spec, "not run", None, {}))
        from stereomesh.io.summary import write_summary

        write_summary(out, rows, {"source": source, "version": __version__,
                                  "seconds": round(elapsed, 3), "interrupted": interrupted,
                                  "cluster": cluster, "caution": CAUTION})
        events.write(f"{events.done} converted, {len(skipped)} skipped, {events.failed} failed "
                     f"in {elapsed:.1f} s")
        events.close()
    return BatchResult(rows, events.done, len(skipped), events.failed)


def _get(d: dict | None, *keys, default=None):
    for k in keys:
        if not isinstance(d, dict) or k not in d:
            return default
        d = d[k]
    return d


def summary_row(spec: PairSpec, status: str, report: dict | None, hashes: dict,
                outcome: dict | None = None) -> dict:
    """One pair's row of the summary: status, key figures, timings, flags, hashes, meta.

    Returns
    -------
    dict
        ``name``, ``status`` (``done``, ``skipped`` (finished in an earlier run),
        ``failed``, ``not run``), ``reason``, ``failed_stage``, ``attempts``,
        ``inputs``, ``scale``, ``density``, ``occluded_fraction``,
        ``rectification_residual_px``, ``points``, ``vertices``, ``faces``,
        ``filled_fraction``, ``seconds``, ``disparity_seconds``,
        ``peak_memory_mb``, ``flags`` (list), ``outputs_sha256`` (dict), the
        ``meta.*`` values.

    Examples
    --------
    >>> row = summary_row(PairSpec("a", [Path("a_L.png"), Path("a_R.png")]), "not run", None, {})
    >>> row["status"], row["flags"]
    ('not run', [])
    """
    stages = _get(report, "stages", default={}) or {}
    # Calibrated rigs record the residual of matches, self-rectified pairs of held-out ones.
    rect = _get(report, "pair", "rectification", default={}) or {}
    residual = _get(rect, "vertical_residual", "median_px", default=_get(rect, "held_out",
                                                                          "median_px"))
    density = _get(stages, "disparity", "density")
    vertices = _get(stages, "repair", "vertices_after",
                    default=_get(stages, "export", "vertices"))
    filled = _get(stages, "repair", "filled_vertices")
    filled_fraction = (filled / vertices) if isinstance(filled, int | float) and vertices else None
    row = {
        "name": spec.name,
        "status": status,
        "reason": (outcome or {}).get("reason", "") if status == "failed" else "",
        "failed_stage": ((outcome or {}).get("stage") or "") if status == "failed" else "",
        "attempts": (outcome or {}).get("attempt", 0 if status != "skipped" else None),
        "inputs": [str(p) for p in spec.inputs] + ([str(spec.calib)] if spec.calib else []),
        "scale": _get(report, "scale") if stages else None,
        "density": density,
        "occluded_fraction": _get(stages, "disparity", "occluded_fraction"),
        "rectification_residual_px": residual if isinstance(residual, int | float) else None,
        "points": _get(stages, "triangulate", "points"),
        "vertices": vertices,
        "faces": _get(stages, "repair", "faces_after", default=_get(stages, "export", "faces")),
        "filled_fraction": filled_fraction,
        "seconds": _get(report, "total_seconds"),
        "disparity_seconds": _get(stages, "disparity", "seconds"),
        "peak_memory_mb": _get(report, "peak_memory_mb"),
        "flags": [],
        "outputs_sha256": dict(hashes),
        **{k: v for k, v in spec.meta.items()},
    }
    if status in ("done", "skipped"):
        flags = row["flags"]
        if isinstance(density, int | float) and density < LOW_DENSITY:
            flags.append(f"low density ({density:.0%})")
        if row["rectification_residual_px"] is not None and \
                row["rectification_residual_px"] > HIGH_RESIDUAL_PX:
            flags.append(f"high rectification residual ({row['rectification_residual_px']:.2f} px)")
        if row["scale"] == "unscaled":
            flags.append("unscaled")
        if filled_fraction is not None and filled_fraction > MANY_FILLED:
            flags.append(f"many filled vertices ({filled_fraction:.0%})")
    return row
