"""The worker protocol, without the editor: a real ``stereomesh worker`` process.

Also drives it through the add-on's client module (standard library only), which
is loaded from its file since the add-on package itself imports bpy.
"""

import importlib.util
import json
import os
import signal
import subprocess
import sys
import threading
import time

import numpy as np
import pytest
from conftest import DEMO, REPO

from stereomesh import __version__
from stereomesh.io.pfm import read_pfm
from stereomesh.io.ply import read_cloud_ply, read_mesh_ply, write_exchange_cloud_ply
from stereomesh.params import schema

PAIR = {"inputs": [str(DEMO / "left.png"), str(DEMO / "right.png")],
        "calib": str(DEMO / "calib.json")}
FAST = {"disp_range": "64:192"}  # the demo's disparities lie in [72.6, 128.4] px


class Worker:
    """A worker subprocess with a reader thread, as the add-on runs it."""

    def __init__(self):
        env = {k: v for k, v in os.environ.items() if not k.startswith("PYTHON")}
        self.proc = subprocess.Popen([sys.executable, "-m", "stereomesh", "worker"],
                                     stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                                     stderr=subprocess.DEVNULL, text=True, bufsize=1, env=env)
        self.messages = []
        self._cv = threading.Condition()
        threading.Thread(target=self._read, daemon=True).start()

    def _read(self):
        for line in self.proc.stdout:
            with self._cv:
                self.messages.append(json.loads(line))  # every stdout line is JSON
                self._cv.notify_all()

    def send(self, **msg):
        self.proc.stdin.write(json.dumps(msg) + "\n")
        self.proc.stdin.flush()

    def wait_for(self, pred, timeout=300):
        t_end = time.monotonic() + timeout
        with self._cv:
            while True:
                for m in self.messages:
                    if pred(m):
                        return m
                left = t_end - time.monotonic()
                assert left > 0, f"no such message; got {self.messages[-5:]}"
                self._cv.wait(left)

    def answer(self, rid, timeout=300):
        return self.wait_for(lambda m: m.get("id") == rid and m["type"] in ("result", "error"),
                             timeout)

    def request(self, rid, action, args=None, params=None):
        self.send(id=rid, action=action, args=args or {}, params=params or {})
        return self.answer(rid)


@pytest.fixture(scope="module")
def worker():
    w = Worker()
    yield w
    if w.proc.poll() is None:
        w.send(action="shutdown")
        w.proc.wait(30)


def test_handshake_then_warm_up_with_its_reason(worker):
    hello = worker.wait_for(lambda m: m["type"] == "hello")
    assert worker.messages[0] is hello
    assert hello["protocol"] == 1 and hello["version"] == __version__
    note = worker.wait_for(lambda m: m["type"] == "progress" and m["id"] is None)
    assert "kernels" in note["message"]
    worker.wait_for(lambda m: m["type"] == "ready")


def test_schema_action_is_the_core_schema(worker):
    assert worker.request("s", "schema")["schema"] == json.loads(json.dumps(schema()))


def test_bad_requests_are_input_errors_naming_the_fix(worker, tmp_path):
    err = worker.request(1, "mesh_from_pair", {"inputs": [str(tmp_path / "nope.png")],
                                               "out_dir": str(tmp_path)})
    assert err["kind"] == "input" and "nope.png" in err["message"]
    err = worker.request(2, "disparity", {**PAIR, "out_dir": str(tmp_path)}, {"p2": -5})
    assert err["kind"] == "input" and "p2" in err["message"]
    err = worker.request(3, "teleport")
    assert err["kind"] == "input" and "unknown action" in err["message"]
    worker.send(id=4, action="fill_holes", args={"mesh": str(DEMO / "left.png"),
                                                 "out_dir": str(tmp_path)})
    err = worker.answer(4)
    assert err["kind"] == "input" and "left.png" in err["message"]
    worker.proc.stdin.write("this is not json\n")
    worker.proc.stdin.flush()
    worker.wait_for(lambda m: m["type"] == "error" and "unreadable" in m["message"])


def test_disparity_writes_maps_and_previews(worker, tmp_path):
    res = worker.request(10, "disparity", {**PAIR, "out_dir": str(tmp_path)}, FAST)
    assert res["type"] == "result", res
    disp = read_pfm(res["files"]["disparity"])
    conf = read_pfm(res["files"]["confidence"])
    assert disp.shape == conf.shape == (480, 640)
    assert np.all(conf[np.isnan(disp)] == 0)
    progress = [m for m in worker.messages if m.get("id") == 10 and m["type"] == "progress"]
    assert progress and all(0 <= m["fraction"] <= 1 for m in progress)
    assert (res["d_min"], res["n_disp"]) == (64, 128)
    assert res["rig"]["focal_px"] == 700.0 and res["scale"] == "metric"


def test_cloud_clean_surface_fill_chain(worker, tmp_path):
    res = worker.request(20, "cloud_from_pair", {**PAIR, "clean": False,
                                                 "out_dir": str(tmp_path / "a")}, FAST)
    cloud = read_cloud_ply(res["files"]["cloud"])
    assert cloud.pixels is not None and len(cloud) > 150_000
    # Keep the top half of the image only, as an editor user deleting points would.
    half = cloud.subset(cloud.pixels[:, 1] < 240)
    write_exchange_cloud_ply(tmp_path / "half.ply", half)
    res = worker.request(21, "clean_cloud", {"cloud": str(tmp_path / "half.ply"),
                                             "out_dir": str(tmp_path / "b")})
    cleaned = read_cloud_ply(res["files"]["cloud"])
    assert 0.5 * len(half) < len(cleaned) <= len(half)
    assert cleaned.pixels[:, 1].max() < 240
    res = worker.request(22, "surface_from_cloud", {
        "cloud": res["files"]["cloud"], "calib": json.loads((DEMO / "calib.json").read_text()),
        "repair": False, "out_dir": str(tmp_path / "c")})
    assert res["figures"]["surface"]["method"] == "grid"
    mesh = read_mesh_ply(res["files"]["mesh"])
    assert len(mesh.faces) > 0.8 * len(cleaned)
    res = worker.request(23, "fill_holes", {"mesh": res["files"]["mesh"],
                                            "out_dir": str(tmp_path / "d")})
    filled = read_mesh_ply(res["files"]["mesh"])
    assert res["figures"]["repair"]["holes_filled"] >= 1 and filled.filled.sum() > 0


def test_surface_without_pixels_is_poisson(worker, tmp_path):
    res = worker.request(25, "cloud_from_pair", {**PAIR, "out_dir": str(tmp_path / "a")}, FAST)
    cloud = read_cloud_ply(res["files"]["cloud"])
    # A cloud from elsewhere has no pixels: the worker falls back to screened Poisson.
    cloud = cloud.subset(np.arange(0, len(cloud), 8))
    cloud.pixels = None
    write_exchange_cloud_ply(tmp_path / "plain.ply", cloud)
    res = worker.request(26, "surface_from_cloud", {"cloud": str(tmp_path / "plain.ply"),
                                                    "repair": False,
                                                    "out_dir": str(tmp_path / "b")},
                         {"poisson_depth": 7})
    assert res["type"] == "result", res
    assert res["figures"]["surface"]["method"] == "poisson"
    assert len(read_mesh_ply(res["files"]["mesh"]).faces) > 1000


def test_cancel_stops_a_running_action_and_the_worker_goes_on(worker, tmp_path):
    worker.send(id=30, action="mesh_from_pair", args={**PAIR, "out_dir": str(tmp_path)},
                params=FAST)
    worker.wait_for(lambda m: m.get("id") == 30 and m["type"] == "progress")
    worker.send(action="cancel", id=30)
    err = worker.answer(30)
    assert err["type"] == "error" and err["kind"] == "cancelled"
    assert worker.request(31, "schema")["type"] == "result"


def test_stdout_carries_protocol_only(worker):
    # Every line parsed as JSON by the reader; a stray print would have raised there.
    assert all("type" in m for m in worker.messages)


def _load_client():
    spec = importlib.util.spec_from_file_location(
        "stereomesh_addon_client", REPO / "stereomesh" / "addon" / "client.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_client_reports_a_crash_and_starts_a_new_worker(tmp_path, monkeypatch):
    client = _load_client()
    monkeypatch.setenv("PYTHONSOMETHING", "host-only")
    assert "PYTHONSOMETHING" not in client.clean_environment()
    first = client.get_client(sys.executable)
    job = first.submit("mesh_from_pair", {**PAIR, "out_dir": str(tmp_path)}, FAST)
    seen = []

    def kill_on_progress(fraction, message):
        seen.append(message)
        if fraction > 0 and first.alive():
            os.kill(first.pid, signal.SIGKILL)

    with pytest.raises(client.WorkerError) as info:
        job.wait(on_progress=kill_on_progress, timeout=300)
    assert info.value.kind == "crash" and "stopped unexpectedly" in str(info.value)
    assert any("kernels" in m for m in seen)  # the warm-up's reason reached the host
    second = client.get_client(sys.executable)
    assert second is not first and second.alive()
    assert second.submit("schema", {}).wait(timeout=120)["schema"]
    client.shutdown()
    assert second.proc.poll() is not None


def test_client_cancel_ends_a_worker_that_does_not_stop_in_time(tmp_path):
    client = _load_client()
    first = client.get_client(sys.executable)
    first.submit("schema", {}).wait(timeout=120)  # past the warm-up
    # A cloud big enough that the outlier filter runs well past the grace period.
    job = first.submit("cloud_from_pair", {**PAIR, "out_dir": str(tmp_path)}, FAST)
    t = time.monotonic()

    def cancel_once_running(fraction, message):
        if fraction > 0:
            job.cancel(grace=0.0)

    with pytest.raises(client.WorkerError) as info:
        job.wait(on_progress=cancel_once_running, timeout=300)
    assert info.value.kind == "cancelled"
    assert time.monotonic() - t < 60
    second = client.get_client(sys.executable)
    assert second.submit("schema", {}).wait(timeout=120)["schema"]
    client.shutdown()


def _load_addon_plyio():
    spec = importlib.util.spec_from_file_location(
        "stereomesh_addon_plyio", REPO / "stereomesh" / "addon" / "plyio.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_addon_ply_files_and_core_ply_files_agree(tmp_path):
    from stereomesh.geometry.data import PointCloud, TriMesh
    from stereomesh.io.ply import write_mesh_ply

    plyio = _load_addon_plyio()
    rng = np.random.default_rng(0)
    n = 50
    fields = {"x": rng.random(n, np.float32), "y": rng.random(n, np.float32),
              "z": rng.random(n, np.float32) + 1,
              "red": rng.integers(0, 256, n).astype(np.uint8),
              "green": rng.integers(0, 256, n).astype(np.uint8),
              "blue": rng.integers(0, 256, n).astype(np.uint8),
              "confidence": rng.random(n, np.float32), "sigma_z": rng.random(n, np.float32),
              "filled": (rng.random(n) < 0.2).astype(np.uint8),
              "col": rng.integers(0, 640, n).astype(np.int32),
              "row": rng.integers(0, 480, n).astype(np.int32)}
    faces = rng.integers(0, n, (30, 3)).astype(np.int32)
    plyio.write_ply(tmp_path / "from_addon.ply", fields, faces)
    mesh = read_mesh_ply(tmp_path / "from_addon.ply")
    assert np.array_equal(mesh.faces, faces) and np.array_equal(mesh.filled, fields["filled"])
    assert np.array_equal(mesh.colors[:, 1], fields["green"])
    cloud = read_cloud_ply(tmp_path / "from_addon.ply")
    assert np.array_equal(cloud.pixels, np.stack([fields["col"], fields["row"]], 1))
    assert np.allclose(cloud.points[:, 2], fields["z"])

    write_mesh_ply(tmp_path / "from_core.ply", TriMesh(
        cloud.points, faces, cloud.colors, cloud.confidence, cloud.sigma_z, fields["filled"]))
    back = plyio.read_ply(tmp_path / "from_core.ply")
    assert np.array_equal(back["faces"], faces)
    assert np.allclose(back["sigma_z"], fields["sigma_z"])
    write_exchange_cloud_ply(tmp_path / "cloud.ply", PointCloud(
        cloud.points, cloud.colors, cloud.confidence, cloud.sigma_z, pixels=cloud.pixels))
    back = plyio.read_ply(tmp_path / "cloud.ply")
    assert "faces" not in back and np.array_equal(back["row"], fields["row"])
