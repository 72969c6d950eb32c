"""``stereomesh worker``: the editor plugin's engine, speaking JSON lines on stdin/stdout.

One process serves every action of an editor session, so the compiled kernels
load once and the semi-global matching work memory is reused. Stdout carries
the protocol only (one JSON object per line); logs go to stderr.

Protocol (version :data:`PROTOCOL`)
-----------------------------------
Worker to host:

- ``{"type": "hello", "protocol": 1, "version": "0.1.0", "pid": 123, "python": "3.11.7",
  "actions": [...]}`` first, as soon as the core's light modules are imported (the
  kernels and the geometry libraries load after it, during the warm-up);
- ``{"type": "progress", "id": ID, "step": str, "fraction": float, "message": str}``;
  ``id`` is ``null`` for the warm-up, whose message says whether the kernels are
  being compiled for the first time (over a minute on two cores) or loaded;
- ``{"type": "ready", "id": null, "seconds": s}`` when the warm-up ends;
- ``{"type": "result", "id": ID, "files": {key: path}, "figures": {...},
  "warnings": [...], "scale": "metric"|"unscaled", "seconds": s, ...}``;
- ``{"type": "error", "id": ID, "kind": "input"|"internal"|"cancelled",
  "message": str, "stage": str|null}``.

Host to worker: ``{"id": ID, "action": NAME, "args": {...}, "params": {...}}`` with
``params`` flat schema overrides (:meth:`stereomesh.params.Params.with_overrides`)
and ``args.out_dir`` the folder the result files go to; ``{"action": "cancel",
"id": ID}`` at any time (read by a thread, so it stops a running action at its
next progress report); ``{"action": "shutdown"}``. Closing stdin ends the worker
after the requests already sent; a host that died is noticed at the next write.

Actions, their ``args`` (besides ``out_dir``) and the ``files`` of their result:

=====================  ======================================  ===========================
action                 args                                    files
=====================  ======================================  ===========================
``mesh_from_pair``     ``inputs`` (paths), ``calib``,          ``mesh`` (+ ``cloud`` with
                       ``layout``, ``swap``, ``with_cloud``    ``with_cloud``)
``disparity``          as above                                ``disparity``, ``confidence``
                                                               (PFM), ``occlusion``,
                                                               ``disparity_view``,
                                                               ``confidence_view`` (PNG)
``cloud_from_pair``    as above, ``clean`` (default true)      ``cloud``
``clean_cloud``        ``cloud`` (PLY)                         ``cloud``
``surface_from_cloud`` ``cloud`` (PLY), ``calib`` (rig dict    ``mesh``
                       or null), ``repair`` (default true)
``fill_holes``         ``mesh`` (PLY)                          ``mesh``
``schema``             none; the result has ``schema``         none
=====================  ======================================  ===========================

Pair results also carry ``rig`` (the rectified calibration), ``scale`` and
``warnings``. Clouds travel with ``col``/``row`` pixel properties
(:func:`stereomesh.io.ply.write_exchange_cloud_ply`).
"""

from __future__ import annotations

import json
import os
import queue
import sys
import threading
import time
import traceback
from pathlib import Path

from stereomesh import __version__
from stereomesh.errors import Cancelled, InputError
from stereomesh.io.inputs import read_stereo_input
from stereomesh.pipeline import (
    StageFailed,
    clean_cloud,
    reconstruct,
    repair_surface,
    surface_from_cloud,
)

PROTOCOL = 1

ACTIONS = ("mesh_from_pair", "disparity", "cloud_from_pair", "clean_cloud",
           "surface_from_cloud", "fill_holes", "schema", "shutdown")


# --------------------------------------------------------------------------------------
# The protocol
# --------------------------------------------------------------------------------------


class _Channel:
    """Writes protocol messages to the real stdout, one line each, from any thread."""

    def __init__(self, stream):
        self._stream = stream
        self._lock = threading.Lock()

    def send(self, **message) -> None:
        line = json.dumps(_jsonable(message), allow_nan=False)
        with self._lock:
            try:
                self._stream.write(line + "\n")
                self._stream.flush()
            except OSError:  # the host is gone: nobody can read results, stop working
                os._exit(3)


def _jsonable(obj):
    import math

    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [_jsonable(v) for v in obj]
    if hasattr(obj, "item") and not isinstance(obj, str | bytes):
        try:
            obj = obj.item()
        except (TypeError, ValueError):
            return str(obj)
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    if isinstance(obj, Path):
        return str(obj)
    if obj is None or isinstance(obj, bool | int | float | str):
        return obj
    return str(obj)


class Worker:
    """Serves requests read from ``stdin`` until shutdown or end of input.

    Parameters
    ----------
    stdin, stdout : text streams
        The protocol streams (stdout must be the real one: :func:`main` points
        ``sys.stdout`` at stderr so stray prints cannot corrupt the protocol).
    warm : bool
        Load (or compile) the kernels right after the handshake.
    """

    def __init__(self, stdin, stdout, warm: bool = True):
        self._stdin = stdin
        self._out = _Channel(stdout)
        self._requests: queue.Queue = queue.Queue()
        self._cancelled: set = set()
        self._lock = threading.Lock()
        self._warm = warm
        self._workspace = None

    # reading -------------------------------------------------------------------------
    def _read_loop(self) -> None:
        for line in self._stdin:
            line = line.strip()
            if not line:
                continue
            try:
                msg = json.loads(line)
                if not isinstance(msg, dict):
                    raise ValueError("not an object")
            except ValueError as exc:
                self._out.send(type="error", id=None, kind="input", stage=None,
                               message=f"unreadable request line ({exc}): {line[:200]}")
                continue
            if msg.get("action") == "cancel":
                with self._lock:
                    self._cancelled.add(msg.get("id"))
                continue
            self._requests.put(msg)
        # End of input: serve what was asked, then leave. A host that died also closes
        # our stdout, and the next write ends the process (see _Channel.send).
        self._requests.put({"action": "shutdown", "id": None})

    def _is_cancelled(self, rid) -> bool:
        with self._lock:
            return rid in self._cancelled

    # serving -------------------------------------------------------------------------
    def serve(self) -> int:
        """Handshake, warm-up, then one request at a time; returns the exit code."""
        import platform

        self._out.send(type="hello", protocol=PROTOCOL, version=__version__, pid=os.getpid(),
                       python=platform.python_version(), actions=list(ACTIONS))
        threading.Thread(target=self._read_loop, name="stdin-reader", daemon=True).start()
        if self._warm:
            self._warm_up()
        while True:
            msg = self._requests.get()
            action = msg.get("action")
            if action == "shutdown":
                return 0
            self._handle(msg)

    def _warm_up(self) -> None:
        t = time.perf_counter()
        from stereomesh.matching.disparity import kernels_cached

        if kernels_cached():
            note = "loading the compiled kernels"
        else:
            note = ("compiling the kernels for the first time: this takes over a minute on a "
                    "two-core machine and happens once per install")
        self._out.send(type="progress", id=None, step="warm-up", fraction=0.0, message=note)
        try:
            import numpy as np

            from stereomesh.params import Params
            from stereomesh.pipeline import StereoPair
            from stereomesh.rectify import RectifiedRig

            # A tiny pair through the worker's own workspace up to the cleaned cloud: the
            # disparity and cloud kernels a request selects are then compiled or loaded,
            # and the geometry libraries imported, before one arrives.
            right = np.random.default_rng(0).integers(0, 255, (48, 96, 3), dtype=np.uint8)
            pair = StereoPair(np.roll(right, 8, axis=1), right,
                              RectifiedRig(focal_px=100.0, cx=48.0, cy=24.0, baseline=0.1))
            reconstruct(pair, Params().with_overrides({"disp_range": "0:32"}),
                        workspace=self._workspace_for(), stop_after="filter_cloud")
            self._out.send(type="progress", id=None, step="warm-up", fraction=0.8,
                           message="loading the geometry libraries")
            import open3d  # noqa: F401  (first import takes seconds; pay it before a request)
            import pymeshlab  # noqa: F401
        except Exception as exc:  # a broken install shows up in the first request's error
            print(f"warm-up failed: {exc!r}", file=sys.stderr)
        self._out.send(type="ready", id=None, seconds=round(time.perf_counter() - t, 3))

    def _handle(self, msg: dict) -> None:
        rid = msg.get("id")
        action = msg.get("action")
        t = time.perf_counter()
        stage = None
        try:
            if action not in ACTIONS:
                raise InputError(f"unknown action {action!r}; known: {', '.join(ACTIONS)}")
            handler = getattr(self, f"_do_{action}")

            def progress(step: str, fraction: float) -> None:
                if self._is_cancelled(rid):
                    raise Cancelled(f"request {rid} cancelled")
                self._out.send(type="progress", id=rid, step=step,
                               fraction=round(float(fraction), 4), message=step)

            args = msg.get("args") or {}
            params = self._params(msg.get("params") or {})
            out = handler(args, params, progress)
            out.setdefault("files", {})
            out.setdefault("figures", {})
            out.setdefault("warnings", [])
            self._out.send(type="result", id=rid, seconds=round(time.perf_counter() - t, 3),
                           **out)
        except Cancelled:
            self._out.send(type="error", id=rid, kind="cancelled", stage=stage,
                           message="cancelled")
        except InputError as exc:
            self._out.send(type="error", id=rid, kind="input", stage=stage, message=str(exc))
        except StageFailed as exc:
            cause = exc.__cause__
            if isinstance(cause, Cancelled):
                self._out.send(type="error", id=rid, kind="cancelled", stage=exc.stage,
                               message="cancelled")
            elif isinstance(cause, InputError):
                self._out.send(type="error", id=rid, kind="input", stage=exc.stage,
                               message=str(cause))
            else:
                traceback.print_exception(cause, file=sys.stderr)
                self._out.send(type="error", id=rid, kind="internal", stage=exc.stage,
                               message=f"stage {exc.stage} failed: {type(cause).__name__}: "
                               f"{cause}")
        except Exception as exc:
            traceback.print_exc(file=sys.stderr)
            self._out.send(type="error", id=rid, kind="internal", stage=stage,
                           message=f"{type(exc).__name__}: {exc}")
        finally:
            with self._lock:
                self._cancelled.discard(rid)

    @staticmethod
    def _params(overrides: dict):
        from stereomesh.params import Params

        if not isinstance(overrides, dict):
            raise InputError("params must be an object of {name: value}")
        return Params().with_overrides(overrides, source="plugin parameter")

    def _workspace_for(self):
        if self._workspace is None:
            from stereomesh.matching.sgm import Workspace

            self._workspace = Workspace()
        return self._workspace

    # actions -------------------------------------------------------------------------
    @staticmethod
    def _out_dir(args: dict) -> Path:
        out = args.get("out_dir")
        if not out:
            raise InputError("the request names no out_dir for its result files")
        out = Path(out)
        out.mkdir(parents=True, exist_ok=True)
        return out

    @staticmethod
    def _path(args: dict, key: str) -> Path:
        value = args.get(key)
        if not value:
            raise InputError(f"the request gives no {key!r} file")
        path = Path(value)
        if not path.is_file():
            raise InputError(f"{path}: file not found; pick an existing {key} file")
        return path

    def _pair(self, args: dict):
        inputs = [p for p in (args.get("inputs") or []) if p]
        if not inputs:
            raise InputError("no input images given; pick the left and the right image")
        for p in inputs:
            if not Path(p).is_file():
                raise InputError(f"{p}: image file not found; pick an existing image")
        calib = args.get("calib") or None
        if calib is not None and not Path(calib).is_file():
            raise InputError(f"{calib}: calibration file not found; pick the pair's JSON")
        return read_stereo_input([Path(p) for p in inputs], Path(calib) if calib else None,
                                 layout=args.get("layout", "pair"),
                                 swap=bool(args.get("swap", False)))

    @staticmethod
    def _scale(args: dict) -> str:
        """The scale of geometry sent by the host: unscaled only if its rig says so."""
        rig = args.get("calib") or {}
        return "unscaled" if rig.get("units") == "unscaled" else "metric"

    @staticmethod
    def _pair_info(rec) -> dict:
        rig = rec.pair.rig
        return {"rig": rig.to_dict(), "scale": rec.scale,
                "warnings": list(rec.warnings), "figures": _plain_figures(rec.figures)}

    def _run(self, args, params, progress, stop_after):
        pair = self._pair(args)
        return reconstruct(pair, params, workspace=self._workspace_for(), progress=progress,
                           stop_after=stop_after)

    def _do_mesh_from_pair(self, args, params, progress) -> dict:
        from stereomesh.io.ply import write_mesh_ply

        out = self._out_dir(args)
        rec = self._run(args, params, progress, "repair")
        write_mesh_ply(out / "mesh.ply", rec.mesh, scale=rec.scale)
        files = {"mesh": str(out / "mesh.ply")}
        if args.get("with_cloud"):
            from stereomesh.io.ply import write_exchange_cloud_ply

            write_exchange_cloud_ply(out / "cloud.ply", rec.cloud, scale=rec.scale)
            files["cloud"] = str(out / "cloud.ply")
        return {"files": files, **self._pair_info(rec)}

    def _do_disparity(self, args, params, progress) -> dict:
        from stereomesh.io.images import write_png
        from stereomesh.io.pfm import write_pfm

        out = self._out_dir(args)
        rec = self._run(args, params, progress, "disparity")
        res = rec.disparity
        write_pfm(out / "disparity.pfm", res.disparity)
        write_pfm(out / "confidence.pfm", res.confidence)
        write_png(out / "occlusion.png", res.classes)
        disp_view, conf_view = _preview_images(res.disparity, res.confidence, res.d_min,
                                               res.n_disp)
        write_png(out / "disparity_view.png", disp_view)
        write_png(out / "confidence_view.png", conf_view)
        files = {k: str(out / n) for k, n in (
            ("disparity", "disparity.pfm"), ("confidence", "confidence.pfm"),
            ("occlusion", "occlusion.png"), ("disparity_view", "disparity_view.png"),
            ("confidence_view", "confidence_view.png"))}
        return {"files": files, "d_min": res.d_min, "n_disp": res.n_disp,
                **self._pair_info(rec)}

    def _do_cloud_from_pair(self, args, params, progress) -> dict:
        from stereomesh.io.ply import write_exchange_cloud_ply

        out = self._out_dir(args)
        stop = "filter_cloud" if args.get("clean", True) else "triangulate"
        rec = self._run(args, params, progress, stop)
        write_exchange_cloud_ply(out / "cloud.ply", rec.cloud, scale=rec.scale)
        return {"files": {"cloud": str(out / "cloud.ply")}, **self._pair_info(rec)}

    def _do_clean_cloud(self, args, params, progress) -> dict:
        from stereomesh.io.ply import read_cloud_ply, write_exchange_cloud_ply

        out = self._out_dir(args)
        cloud = read_cloud_ply(self._path(args, "cloud"))
        progress("clean cloud", 0.1)
        cloud, figs = clean_cloud(cloud, params)
        write_exchange_cloud_ply(out / "cloud.ply", cloud, scale=self._scale(args))
        return {"files": {"cloud": str(out / "cloud.ply")},
                "figures": _plain_figures({"filter_cloud": figs})}

    def _do_surface_from_cloud(self, args, params, progress) -> dict:
        from stereomesh.io.calibration import rig_from_dict
        from stereomesh.io.ply import read_cloud_ply, write_mesh_ply

        out = self._out_dir(args)
        cloud = read_cloud_ply(self._path(args, "cloud"))
        if len(cloud) < 3:
            raise InputError(f"{args['cloud']}: the cloud has {len(cloud)} points; a surface "
                             "needs at least 3")
        rig = rig_from_dict(args["calib"], "the cloud's calibration") if args.get("calib") \
            else None
        warnings = []
        if params.surface.surface == "grid" and (cloud.pixels is None or rig is None):
            # An object from elsewhere (or stripped of its pixels) can still get a surface.
            params = params.with_overrides({"surface": "poisson"})
            warnings.append("the cloud's points carry no pixels (or no calibration): "
                            "screened Poisson was used instead of the depth grid")
        progress("surface", 0.1)
        mesh, figures = surface_from_cloud(cloud, params, rig)
        figures = {"surface": figures}
        if args.get("repair", True):
            progress("repair", 0.6)
            mesh, figures["repair"] = repair_surface(mesh, params)
        write_mesh_ply(out / "mesh.ply", mesh, scale=self._scale(args))
        return {"files": {"mesh": str(out / "mesh.ply")}, "figures": _plain_figures(figures),
                "warnings": warnings}

    def _do_fill_holes(self, args, params, progress) -> dict:
        from stereomesh.io.ply import read_mesh_ply, write_mesh_ply

        out = self._out_dir(args)
        path = self._path(args, "mesh")
        mesh = read_mesh_ply(path)
        if len(mesh.faces) == 0:
            raise InputError(f"{path}: the mesh has no faces; select a mesh, not a point cloud")
        progress("repair", 0.1)
        mesh, figs = repair_surface(mesh, params)
        write_mesh_ply(out / "mesh.ply", mesh, scale=self._scale(args))
        return {"files": {"mesh": str(out / "mesh.ply")},
                "figures": _plain_figures({"repair": figs})}

    def _do_schema(self, args, params, progress) -> dict:
        from stereomesh.params import schema

        return {"schema": schema()}


def _plain_figures(figures: dict) -> dict:
    """Figures without the bulky per-step timings, rounded for the host."""
    out = {}
    for stage, figs in figures.items():
        out[stage] = {k: (round(v, 4) if isinstance(v, float) else v)
                      for k, v in figs.items() if k not in ("step_seconds",)}
    return out


def _preview_images(disparity, confidence, d_min: int, n_disp: int):
    """8-bit views of the disparity (search range stretched, rejected black) and confidence.

    The editor cannot read PFM, so the maps also travel as PNG; the PFM files
    keep the values.
    """
    import numpy as np

    span = max(n_disp - 1, 1)
    valid = np.isfinite(disparity)
    disp = np.zeros(disparity.shape, np.uint8)
    scaled = (np.where(valid, disparity, d_min) - d_min) / span
    disp[valid] = np.clip(1 + scaled[valid] * 254, 1, 255).astype(np.uint8)
    conf = np.clip(np.nan_to_num(confidence) * 255 + 0.5, 0, 255).astype(np.uint8)
    return disp, conf


def main(argv: list[str] | None = None) -> int:
    """Run the worker on the process's stdin and stdout.

    Parameters
    ----------
    argv : list of str, optional
        ``--no-warm-up`` skips loading the kernels after the handshake.

    Returns
    -------
    int
        The exit code (0 after a shutdown request or the end of input).
    """
    argv = list(sys.argv[1:] if argv is None else argv)
    # Anything a library prints (Python or C++ writing to file descriptor 1) would corrupt
    # the protocol: keep a private copy of stdout for it and point descriptor 1 at stderr.
    sys.stdout.flush()
    protocol_out = os.fdopen(os.dup(1), "w", encoding="utf-8", buffering=1)
    os.dup2(2, 1)
    saved = sys.stdout
    sys.stdout = sys.stderr
    try:
        return Worker(sys.stdin, protocol_out, warm="--no-warm-up" not in argv).serve()
    finally:
        sys.stdout = saved
        protocol_out.flush()
