"""A job: read a stereo input, reconstruct it in memory, write the folder and its report.

The command line, the batch runner and the editor's worker all run jobs, so
reading, failure handling and the report are done the same way everywhere.
When a stage fails, the outputs of the stages before it are still written and
the report says ``"status": "failed"`` with the stage named.
"""

from __future__ import annotations

import contextlib
from collections.abc import Sequence
from pathlib import Path

from stereomesh.errors import InputError
from stereomesh.params import Params
from stereomesh.pipeline import STAGES, Progress, StageFailed, reconstruct


def prepare_out_dir(out_dir: str | Path) -> Path:
    """Create the output folder, or raise :class:`InputError` saying why it cannot be."""
    out_dir = Path(out_dir)
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"{out_dir}: the output folder cannot be created ({exc.strerror}); "
                         "choose another --out") from None
    if not out_dir.is_dir():
        raise InputError(f"{out_dir}: exists and is not a folder; choose another --out")
    return out_dir


def read_while_warming(inputs, calib, params: Params, *, layout="pair", swap=False):
    """Read the pair and hash its files in a thread while the disparity kernels load.

    Loading compiled kernels holds the interpreter for a few tenths of a second
    in a fresh process; decoding images and hashing do not need it.

    Returns
    -------
    StereoPair, list of dict
        The pair and the input records for the report.
    """
    from concurrent.futures import ThreadPoolExecutor

    from stereomesh.io.inputs import read_stereo_input
    from stereomesh.matching.disparity import warm_up
    from stereomesh.report import input_records

    def read():
        pair = read_stereo_input(inputs, calib, layout=layout, swap=swap)
        return pair, input_records(pair.sources)

    with ThreadPoolExecutor(1) as pool:
        future = pool.submit(read)
        try:
            warm_up(params.disparity)
        finally:
            pair, records = future.result()
    return pair, records


def _yield_cores() -> None:
    """Lower the calling thread's scheduling priority to the lowest (Linux only).

    The file writer runs beside the geometry stages, whose kernels use every
    core; at equal priority it takes a core from one kernel thread and the
    whole parallel loop waits for that thread. At nice 19 it runs in the
    kernels' serial stretches and after them instead (one-shot run at 1.4 MP:
    3.02 s against 3.14 s median of 10, the cloud filter 0.47 s against 0.61 s).
    On Linux the nice value belongs to the thread (``setpriority(2)`` with the
    thread id); elsewhere nothing is changed.
    """
    import os
    import sys
    import threading

    if sys.platform.startswith("linux"):
        with contextlib.suppress(OSError):
            os.setpriority(os.PRIO_PROCESS, threading.get_native_id(), 19)


def run_job(
    inputs: Sequence[str | Path],
    calib: str | Path | None,
    out_dir: str | Path,
    params: Params,
    *,
    command: str = "run",
    stop_after: str = "repair",
    previews: bool = True,
    progress: Progress | None = None,
    workspace=None,
    layout: str = "pair",
    swap: bool = False,
) -> dict:
    """Read, reconstruct up to ``stop_after``, write outputs and ``report.json``.

    Returns
    -------
    dict
        The report as written.

    Raises
    ------
    InputError
        Bad input (the report, when the folder exists, says failed).
    Exception
        The cause of a failed stage, after the partial outputs are written.
    """
    from concurrent.futures import ThreadPoolExecutor

    from stereomesh.io.outputs import write_cloud_file, write_disparity_files, write_outputs
    from stereomesh.report import Report

    out_dir = prepare_out_dir(out_dir)
    if stop_after not in STAGES:
        raise ValueError(f"stop_after must be one of {STAGES}")
    pair, records = read_while_warming(inputs, calib, params, layout=layout, swap=swap)
    report = Report(command, params, records)
    # The disparity files and their previews, then the cleaned cloud, are written by
    # a second thread while the later stages run: PNG encoding and file writes
    # release the interpreter, and the geometry has single-threaded stretches to fill.
    early = {}

    def stage_done(stage, partial):
        if stage == stop_after:
            return
        if stage == "disparity":
            early["disparity"] = writer.submit(write_disparity_files, out_dir, partial, report,
                                               previews=previews)
        elif stage == "filter_cloud":
            early["cloud"] = writer.submit(write_cloud_file, out_dir, partial, report)

    def written(part):
        # A failed early write is simply redone (and fails visibly) by write_outputs.
        try:
            return early[part].result() if part in early else None
        except Exception:
            return None

    with ThreadPoolExecutor(1, thread_name_prefix="stereomesh-writer",
                            initializer=_yield_cores) as writer:
        try:
            result = reconstruct(pair, params, workspace=workspace, progress=progress,
                                 stop_after=stop_after, on_stage=stage_done)
        except StageFailed as failed:
            cause = failed.__cause__ or failed
            report.add_reconstruction(failed.partial)
            report.fail(failed.stage, cause)
            try:
                write_outputs(out_dir, failed.partial, report, previews=previews,
                              disparity_written=written("disparity"),
                              cloud_written=written("cloud"))
            finally:
                report.finish(out_dir / "report.json", status="failed")
            raise cause from None
        report.add_reconstruction(result)
        try:
            write_outputs(out_dir, result, report, previews=previews,
                          disparity_written=written("disparity"),
                          cloud_written=written("cloud"))
        except Exception as exc:
            report.fail("export", exc)
            report.finish(out_dir / "report.json", status="failed")
            raise
    return report.finish(out_dir / "report.json")
