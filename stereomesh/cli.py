"""The ``stereomesh`` command line: thin, over :mod:`stereomesh.pipeline`.

Exit codes: 0 success, 1 internal error, 2 bad input or usage, 3 (batch) some pairs failed.
"""

from __future__ import annotations

import argparse
import contextlib
import os
import subprocess
import sys
from pathlib import Path

from stereomesh import __version__
from stereomesh.errors import InputError

EXIT_OK, EXIT_INTERNAL, EXIT_BAD_INPUT, EXIT_SOME_FAILED = 0, 1, 2, 3


def _progress_bar(quiet: bool):
    """A progress callback drawing a bar on a terminal; silent otherwise."""
    if quiet or not sys.stderr.isatty():
        return (lambda step, frac: None), (lambda: None)
    from tqdm import tqdm

    bar = tqdm(total=100, file=sys.stderr, leave=False, bar_format="{l_bar}{bar}| {elapsed}")

    def update(step: str, frac: float) -> None:
        bar.set_description_str(step)
        bar.update(max(0, int(round(frac * 100)) - bar.n))

    return update, bar.close


def _say_if_compiling(quiet: bool) -> bool:
    """Tell the user why the first run after an install is slow; True when it is."""
    from stereomesh.matching.disparity import kernels_cached

    if kernels_cached():
        return False
    if not quiet:
        print("stereomesh: compiling the matching kernels, once per install "
              "(a minute or two on a 2-core machine)...", file=sys.stderr, flush=True)
    return True


@contextlib.contextmanager
def _first_run(quiet: bool, stop_after: str = "repair"):
    """On the first run after an install, say why it is slow and compile in two processes.

    numba compiles one kernel at a time. While this process compiles the
    solver, a second one (one thread, no output) compiles the kernels of the
    later stages on a tiny pair, and the cache they share serves both; on two
    cores that roughly halves the wait. It is stopped when the command ends.
    Yields the helper process, or None when the kernels are already cached.
    """
    helper = None
    if _say_if_compiling(quiet):
        code = f"from stereomesh.pipeline import warm_up_stages; warm_up_stages({stop_after!r})"
        env = dict(os.environ, NUMBA_NUM_THREADS="1")
        try:
            helper = subprocess.Popen([sys.executable, "-c", code], env=env,
                                      stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                                      stderr=subprocess.DEVNULL)
        except OSError:  # no second process: this one compiles everything, as before
            helper = None
    try:
        yield helper
    finally:
        if helper is not None and helper.poll() is None:
            helper.terminate()
            try:
                helper.wait(timeout=10)
            except subprocess.TimeoutExpired:
                helper.kill()


def _params(args, sections):
    from stereomesh.params import Params, cli_overrides, load_config, load_preset

    # Schema defaults < preset < config file < flags typed on the command line.
    base = load_preset(args.preset) if getattr(args, "preset", None) else Params()
    if getattr(args, "config", None):
        base = load_config(args.config, base)
    return base.with_overrides(cli_overrides(args, sections), source="command line")


def _preset_argument(parser) -> None:
    from stereomesh.params import preset_names

    parser.add_argument(
        "--preset", choices=preset_names(),
        help="parameters for a kind of job: facade (open, honest surfaces for survey), "
             "catalogue (closed objects), archive (robust unattended conversion); "
             "--config and flags override it")


def _input_arguments(p) -> None:
    """Flags saying how the input files hold the two views."""
    from stereomesh.io.inputs import READERS

    p.add_argument("--layout", choices=sorted(READERS), default=None,
                   help="how the views are stored (default: two files, or mpo for one .mpo)")
    p.add_argument("--swap", action="store_true",
                   help="the first view is the right one (cross-eyed order)")


def _build_parser() -> argparse.ArgumentParser:
    from stereomesh.params import SECTIONS, add_cli_arguments

    parser = argparse.ArgumentParser(
        prog="stereomesh",
        description="Stereo image pairs to coloured, metric meshes with a provenance report.",
    )
    parser.add_argument("--version", action="version", version=f"stereomesh {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    def common(p):
        p.add_argument("--out", required=True, type=Path, help="output folder")
        p.add_argument("--quiet", action="store_true", help="no summary line, no progress bar")

    p = sub.add_parser("disparity", help="disparity, confidence and occlusion maps of a pair")
    p.add_argument("left", type=Path, help="left image")
    p.add_argument("right", type=Path, help="right image")
    p.add_argument("--calib", type=Path, required=True, help="calibration JSON")
    p.add_argument("--config", type=Path, help="TOML file of parameters")
    _preset_argument(p)
    p.add_argument("--previews", action="store_true",
                   help="also write preview PNGs (rectified pair, disparity, confidence, classes)")
    common(p)
    add_cli_arguments(p.add_argument_group("disparity parameters"), ("disparity",))

    p = sub.add_parser("run", help="the whole pipeline: pair in, mesh and report out")
    p.add_argument("inputs", nargs="+", type=Path,
                   help="LEFT RIGHT image files, one MPO file, or one side-by-side scan")
    p.add_argument("--calib", type=Path,
                   help="calibration (JSON, rectified or full form, or OpenCV YAML/XML)")
    _input_arguments(p)
    p.add_argument("--config", type=Path, help="TOML file of parameters")
    _preset_argument(p)
    common(p)
    for section in SECTIONS:
        add_cli_arguments(p.add_argument_group(f"{section} parameters"), (section,))

    p = sub.add_parser("batch", help="many pairs from a folder or a CSV manifest, resumable")
    p.add_argument("source", type=Path,
                   help="folder of pairs (NAME_L/NAME_R, NAME-left/NAME-right, NAME.mpo) or a "
                        ".csv manifest (name,left,right,calib,layout, parameter and meta.* "
                        "columns)")
    p.add_argument("--calib", type=Path, help="calibration shared by the pairs (a manifest's "
                                              "calib column wins)")
    p.add_argument("--config", type=Path, help="TOML file of parameters for every pair")
    _preset_argument(p)
    p.add_argument("--side-by-side", action="store_true",
                   help="image files of the folder not named as a view are side-by-side scans")
    p.add_argument("--swap", action="store_true", help="every pair's first view is the right one")
    p.add_argument("--workers", type=int, default=None,
                   help="local worker processes (default: from the cores and the memory a "
                        "pair needs)")
    p.add_argument("--threads", type=int, default=None, metavar="N",
                   help="numba threads of each local worker (default: the cores shared "
                        "among the workers)")
    p.add_argument("--cluster", metavar="ADDRESS",
                   help="a Dask distributed scheduler, e.g. tcp://host:8786, instead of local "
                        "workers")
    p.add_argument("--pair-timeout", type=float, default=None, metavar="S",
                   help="seconds a pair may take before it is stopped and recorded as failed")
    p.add_argument("--retries", type=int, default=1, metavar="K",
                   help="tries again a pair whose worker died, timed out or crashed, at most "
                        "K times (default 1); bad input is not tried again")
    common(p)
    for section in SECTIONS:
        add_cli_arguments(p.add_argument_group(f"{section} parameters"), (section,))

    p = sub.add_parser("demo", help="render the demo scene's pair and run the pipeline on it")
    common(p)

    p = sub.add_parser("worker", help="serve the editor plugin: JSON lines on stdin/stdout")
    p.add_argument("--no-warm-up", action="store_true",
                   help="do not load the kernels right after the handshake")

    p = sub.add_parser("calibrate", help="chessboard image pairs to a stereo calibration JSON")
    p.add_argument("--pattern", required=True, help="inner corners COLSxROWS, e.g. 9x6")
    p.add_argument("--square", required=True, type=float, help="side of a square, metres")
    p.add_argument("--left", required=True, help="quoted glob of the left images")
    p.add_argument("--right", required=True, help="quoted glob of the right images")
    common(p)
    return parser


def _summary(report: dict, kind: str) -> str:
    st = report["stages"]
    disp = st.get("disparity", {})
    parts = [f"{kind}: density {disp.get('density', 0):.1%}",
             f"occluded {disp.get('occluded_fraction', 0):.1%}"]
    if "repair" in st:
        parts.append(f"{st['repair'].get('faces_after', 0)} faces")
    parts.append(f"{report.get('total_seconds', 0):.1f} s")
    return ", ".join(parts)


def _cmd_disparity(args) -> int:
    from stereomesh.jobs import run_job

    params = _params(args, ("disparity",))
    progress, close = _progress_bar(args.quiet)
    try:
        with _first_run(args.quiet, "disparity"):
            report = run_job([args.left, args.right], args.calib, args.out, params,
                             command="disparity", stop_after="disparity",
                             previews=args.previews, progress=progress)
    finally:
        close()
    if not args.quiet:
        print(_summary(report, "disparity") + f" -> {args.out / 'disparity.pfm'}")
    return EXIT_OK


def _cmd_run(args) -> int:
    from stereomesh.jobs import run_job
    from stereomesh.params import SECTIONS

    params = _params(args, tuple(SECTIONS))
    progress, close = _progress_bar(args.quiet)
    try:
        with _first_run(args.quiet):
            report = run_job(args.inputs, args.calib, args.out, params, progress=progress,
                             layout=args.layout, swap=args.swap)
    finally:
        close()
    if not args.quiet:
        print(_summary(report, "run") + f" -> {report['outputs']['mesh']}")
    return EXIT_OK


def _cmd_batch(args) -> int:
    from stereomesh.batch import run_batch
    from stereomesh.io.manifest import find_pairs
    from stereomesh.params import SECTIONS

    params = _params(args, tuple(SECTIONS))
    specs = find_pairs(args.source, calib=args.calib, side_by_side=args.side_by_side,
                       swap=args.swap)
    if not args.cluster:
        _say_if_compiling(args.quiet)
    result = run_batch(specs, args.out, params, workers=args.workers, threads=args.threads,
                       cluster=args.cluster,
                       pair_timeout=args.pair_timeout, retries=args.retries,
                       progress_bar=not args.quiet and sys.stderr.isatty(),
                       source=str(args.source))
    line = (f"batch: {len(specs)} pairs, {result.done} converted, {result.skipped} finished "
            f"earlier, {result.failed} failed -> {args.out / 'index.html'}")
    if result.failed:
        print(line, file=sys.stderr)
        print(f"stereomesh batch: {result.failed} of {len(specs)} pairs failed "
              f"(reasons in {args.out / 'summary.csv'})", file=sys.stderr)
        return EXIT_SOME_FAILED
    if not args.quiet:
        print(line)
    return EXIT_OK


def _cmd_calibrate(args) -> int:
    from stereomesh.io.chessboard import calibrate_from_files

    report = calibrate_from_files(args.left, args.right, args.pattern, args.square, args.out)
    if not args.quiet:
        print(f"calibrate: {report['pairs_used']} pairs, RMS {report['rms_px']:.3f} px, "
              f"baseline {report['baseline_m']:.4f} m, {len(report['not_found'])} without "
              f"the board -> {report['outputs']['calibration']}")
    return EXIT_OK


def demo_inputs(out_dir: Path) -> Path:
    """The folder holding the demo pair: the repo's ``demo_data/`` or a fresh render."""
    from stereomesh.demo_scene import DEMO_FILES, write_demo_scene

    repo_data = Path(__file__).resolve().parent.parent / "demo_data"
    if all((repo_data / n).is_file() for n in DEMO_FILES):
        return repo_data
    target = out_dir / "input"
    write_demo_scene(target)
    return target


def _cmd_demo(args) -> int:
    from stereomesh.jobs import prepare_out_dir, run_job
    from stereomesh.params import load_config

    prepare_out_dir(args.out)
    data = demo_inputs(args.out)
    # The scene's own parameters (its disparity range) come with the scene.
    params = load_config(data / "params.toml")
    progress, close = _progress_bar(args.quiet)
    try:
        with _first_run(args.quiet):
            report = run_job([data / "left.png", data / "right.png"], data / "calib.json",
                             args.out, params, command="demo", progress=progress)
    finally:
        close()
    if not args.quiet:
        mesh = Path(report["outputs"]["mesh"]).resolve()
        print(_summary(report, "demo"))
        print(f"mesh: {mesh}")
    return EXIT_OK


def _cmd_worker(args) -> int:
    from stereomesh.worker import main as worker_main

    return worker_main(["--no-warm-up"] if args.no_warm_up else [])


def configure_process() -> None:
    """Process-wide settings of a command (never made on ``import stereomesh``).

    The disparity kernels start one parallel region per image row; OpenMP
    starts one in about a microsecond, numba's fallback work queue in about a
    hundred, so OpenMP is preferred (a user's own setting wins). Then numpy
    is asked for small pages (:func:`_prefer_small_pages`) and numba's array
    maths is loaded without its BLAS probe (:func:`_load_numba_without_blas_probe`).
    """
    import os

    os.environ.setdefault("NUMBA_THREADING_LAYER_PRIORITY", "omp tbb workqueue")
    _prefer_small_pages()
    _load_numba_without_blas_probe()


def _load_numba_without_blas_probe() -> None:
    """Load numba's numpy array maths with its one-time BLAS check answered "none".

    The first kernel call of a process loads numba's implementations, and the
    array-maths module checks once for a BLAS by importing
    ``scipy.linalg.cython_blas``: 0.25-0.3 s of every command on this
    project's reference VM, spent on scipy for something no stereomesh kernel
    uses (the check only picks a BLAS inner product for ``np.correlate`` and
    ``np.convolve``; the plain loop serves otherwise). A ``None`` entry in
    ``sys.modules`` makes that one import fail, as Python's import system
    documents, for the duration of loading; numba's linear algebra still
    imports scipy itself if a kernel ever asks for it.
    """
    import sys

    probe = "scipy.linalg.cython_blas"
    if "numba.np.arraymath" in sys.modules or probe in sys.modules:
        return
    sys.modules[probe] = None
    try:
        import numba.np.arraymath  # noqa: F401
    finally:
        if probe in sys.modules and sys.modules[probe] is None:
            del sys.modules[probe]


def _prefer_small_pages() -> None:
    """Ask numpy for ordinary 4 KB pages in this one-shot process.

    numpy advises the kernel to back arrays of 4 MB and more with 2 MB pages.
    A command touches most of its memory once, and on virtual machines a
    fresh huge page can cost far more than the small pages it replaces
    (measured on this project's reference VM: 2.3 s per GB against 0.4 s).
    Library callers that reuse their arrays keep numpy's default; an explicit
    ``NUMPY_MADVISE_HUGEPAGE`` wins over both.
    """
    import os

    if "NUMPY_MADVISE_HUGEPAGE" in os.environ:
        return
    try:
        from numpy._core.multiarray import _set_madvise_hugepage
    except ImportError:  # numpy moved or dropped the switch: keep its default
        return
    _set_madvise_hugepage(False)


def main(argv: list[str] | None = None) -> int:
    parser = _build_parser()
    args = parser.parse_args(argv)
    configure_process()
    commands = {"disparity": _cmd_disparity, "run": _cmd_run, "demo": _cmd_demo,
                "worker": _cmd_worker, "calibrate": _cmd_calibrate, "batch": _cmd_batch}
    try:
        return commands[args.command](args)
    except InputError as exc:
        print(f"stereomesh {args.command}: error: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print(f"stereomesh {args.command}: interrupted", file=sys.stderr)
        return EXIT_INTERNAL
    except Exception as exc:  # the last line must say what went wrong, not only a trace
        import traceback

        traceback.print_exc()
        print(f"stereomesh {args.command}: internal error: {type(exc).__name__}: {exc}",
              file=sys.stderr)
        return EXIT_INTERNAL


def entry() -> int:
    """The console command: :func:`main`, then a quick exit.

    The interpreter's last garbage collection walks every object the JIT
    compiler loaded, about a quarter of a second after a disparity run;
    freezing them first skips that walk (nothing of ours needs collecting
    at exit). In-process callers use :func:`main`.
    """
    import gc

    code = main()
    gc.freeze()
    return code


if __name__ == "__main__":
    raise SystemExit(entry())
