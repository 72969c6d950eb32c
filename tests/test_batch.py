"""The batch runner: discovery, failure isolation, resume after a kill, a real Dask cluster,
the contact sheet in a real headless browser, bad invocations.

Pairs are crops of the demo scene rendered 160 px wide, so a pair takes about a
second in a warm worker; the slow part of each run is starting its workers.
"""

import csv
import hashlib
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from conftest import run_cli
from PIL import Image

from stereomesh.cli import main
from stereomesh.errors import InputError
from stereomesh.io.manifest import discover_folder, read_manifest

WIDTH, HEIGHT = 160, 96  # crops of the 160 x 120 render


@pytest.fixture(scope="module")
def scene(tmp_path_factory):
    """The demo scene at 160 px: images, a calibration of the crops, its parameters."""
    from stereomesh.demo_scene import write_demo_scene

    folder = tmp_path_factory.mktemp("scene")
    paths = write_demo_scene(folder, width=WIDTH)
    calib = json.loads(paths["calib"].read_text())
    calib["image_size"] = [WIDTH, HEIGHT]
    (folder / "crop_calib.json").write_text(json.dumps(calib))
    return {"left": np.array(Image.open(paths["left"])),
            "right": np.array(Image.open(paths["right"])),
            "calib": folder / "crop_calib.json", "params": paths["params"]}


def write_pairs(scene, folder: Path, names, style="_L") -> dict:
    """A crop per name (row offsets differ, so the inputs' hashes do too)."""
    folder.mkdir(parents=True, exist_ok=True)
    suffix = {"_L": ("_L", "_R"), "-left": ("-left", "-right")}[style]
    for i, name in enumerate(names):
        top = (2 * i) % (scene["left"].shape[0] - HEIGHT + 1)
        for side, key in zip(suffix, ("left", "right"), strict=True):
            Image.fromarray(scene[key][top:top + HEIGHT]).save(folder / f"{name}{side}.png")
    return {n: folder / n for n in names}


def batch(*args, timeout=600):
    return run_cli("batch", *args)


def pair_dirs(out: Path) -> list[Path]:
    return sorted(p for p in out.iterdir() if p.is_dir() and p.name != "_batch")


def assert_complete(folder: Path) -> None:
    """A pair folder is finished: report ok and every file matching its checksum list."""
    report = json.loads((folder / "report.json").read_text())
    assert report["status"] == "ok"
    sums = (folder / "checksums.sha256").read_text().splitlines()
    listed = {}
    for line in sums:
        digest, rel = line.split("  ", 1)
        listed[rel] = digest
    for name in ("disparity.pfm", "mesh.ply", "cloud.ply", "report.json",
                 "previews/disparity.png", "previews/mesh.png"):
        assert name in listed, name
    for rel, digest in listed.items():
        assert hashlib.sha256((folder / rel).read_bytes()).hexdigest() == digest, rel


# --- discovery and manifests (in process) --------------------------------------------------------

def test_folder_naming_rules(tmp_path):
    for f in ("a_L.png", "a_R.png", "b-left.JPG", "b-right.JPG", "c_left.tif", "c_right.tif",
              "d.mpo", "calib.json", "notes.txt", ".hidden_L.png"):
        (tmp_path / f).write_bytes(b"x")
    specs = discover_folder(tmp_path, calib=tmp_path / "calib.json")
    assert [(s.name, s.layout, [p.name for p in s.inputs]) for s in specs] == [
        ("a", "pair", ["a_L.png", "a_R.png"]), ("b", "pair", ["b-left.JPG", "b-right.JPG"]),
        ("c", "pair", ["c_left.tif", "c_right.tif"]), ("d", "mpo", ["d.mpo"])]
    assert all(s.calib == tmp_path / "calib.json" for s in specs)
    (tmp_path / "card.png").write_bytes(b"x")
    with pytest.raises(InputError, match="card.png.*--side-by-side"):
        discover_folder(tmp_path)
    assert [s.layout for s in discover_folder(tmp_path, side_by_side=True)
            if s.name == "card"] == ["side-by-side"]


@pytest.mark.parametrize("files, message", [
    (("a_L.png",), r"a_L.png: its right view is missing"),
    (("a_L.png", "a_R.png", "a-left.png", "a-right.png"), "several left views"),
    (("a.mpo", "a_L.png", "a_R.png"), "several inputs make the pair name 'a'"),
    ((), "no stereo pairs found"),
])
def test_folder_problems_are_named(tmp_path, files, message):
    for f in files:
        (tmp_path / f).write_bytes(b"x")
    with pytest.raises(InputError, match=message):
        discover_folder(tmp_path)


def test_manifest_columns(tmp_path):
    for f in ("l.png", "r.png", "c.json", "x.mpo", "shared.json"):
        (tmp_path / f).write_bytes(b"x")
    (tmp_path / "m.csv").write_text(
        "name,left,right,calib,layout,p2,meta.accession,swap\n"
        "one,l.png,r.png,c.json,,120,A-1,\n"
        "two,x.mpo,,,,,A-2,yes\n")
    one, two = read_manifest(tmp_path / "m.csv", calib=tmp_path / "shared.json")
    assert one.inputs == [tmp_path / "l.png", tmp_path / "r.png"]
    assert one.calib == tmp_path / "c.json" and one.overrides == {"p2": "120"}
    assert one.meta == {"meta.accession": "A-1"} and not one.swap
    assert two.layout == "mpo" and two.swap and two.calib == tmp_path / "shared.json"
    assert two.overrides == {}


@pytest.mark.parametrize("text, message", [
    ("name,left,right,colour\na,l.png,r.png,x\n", "column 'colour'"),
    ("name,left,right\na,l.png,r.png\na,l.png,r.png\n", "also on line 2"),
    ("name,left,right\na,l.png,missing.png\n", "missing.png is not a file"),
    ("name,left,right\na,l.png,notes.txt\n", "not an image file"),
    ("name,left,right\n../a,l.png,r.png\n", "cannot be an output folder name"),
    ("left,right\nl.png,r.png\n", "no 'name' column"),
    ("name,left,right\n", "lists no pairs"),
])
def test_manifest_problems_are_named(tmp_path, text, message):
    for f in ("l.png", "r.png", "notes.txt"):
        (tmp_path / f).write_bytes(b"x")
    (tmp_path / "m.csv").write_text(text)
    with pytest.raises(InputError, match=message):
        read_manifest(tmp_path / "m.csv")


def test_bad_invocations_exit_2_naming_the_file(scene, tmp_path, capsys):
    src = tmp_path / "src"
    write_pairs(scene, src, ["a"])
    (tmp_path / "bad.json").write_text("{not json")
    (tmp_path / "file").write_text("x")
    (tmp_path / "m.csv").write_text("name,left,right,p2\na,src/a_L.png,src/a_R.png,-5\n")
    cases = [
        ([str(tmp_path / "empty_does_not_exist")], "no such folder"),
        ([str(src), "--calib", str(tmp_path / "bad.json")], "bad.json"),
        ([str(src), "--calib", str(scene["calib"]), "--out", str(tmp_path / "file" / "o")],
         "cannot be created"),
        ([str(tmp_path / "m.csv"), "--calib", str(scene["calib"])], "p2"),
        ([str(src), "--workers", "0"], "--workers"),
        ([str(src), "--threads", "0"], "--threads"),
        # Nothing listens on the discard port of this machine: no scheduler to reach.
        ([str(src), "--calib", str(scene["calib"]), "--cluster", "tcp://127.0.0.1:9"],
         "cannot reach a Dask scheduler"),
    ]
    (tmp_path / "empty").mkdir()
    cases.append(([str(tmp_path / "empty")], "no stereo pairs found"))
    for argv, message in cases:
        if "--out" not in argv:
            argv = [*argv, "--out", str(tmp_path / "out")]
        code = main(["batch", *argv, "--quiet"])
        err = capsys.readouterr().err
        assert code == 2, (argv, err)
        assert message in err, (argv, err)
        assert len(err.strip().splitlines()) == 1, err
    assert not (tmp_path / "out").exists() or not pair_dirs(tmp_path / "out")


# --- runs of the real command --------------------------------------------------------------------

@pytest.fixture(scope="module")
def broken_batch(scene, tmp_path_factory):
    """Six pairs from a manifest, two broken: a corrupt image and a pair that cannot be
    rectified (no calibration, textureless images: no feature matches)."""
    root = tmp_path_factory.mktemp("broken")
    write_pairs(scene, root / "img", ["p1", "p2", "p3", "p4"])
    (root / "img" / "corrupt_L.png").write_bytes(b"\x89PNG\r\n\x1a\n truncated")
    shutil.copy(root / "img" / "p1_R.png", root / "img" / "corrupt_R.png")
    flat = np.full((HEIGHT, WIDTH, 3), 128, np.uint8)
    Image.fromarray(flat).save(root / "img" / "flat_L.png")
    Image.fromarray(flat).save(root / "img" / "flat_R.png")
    calib = scene["calib"]
    rows = [["name", "left", "right", "calib", "layout", "meta.accession", "speckle_size"]]
    for i, name in enumerate(["p1", "p2", "p3", "corrupt", "flat", "p4"]):
        rows.append([name, f"img/{name}_L.png", f"img/{name}_R.png",
                     "" if name == "flat" else str(calib), "", f"ACC-{i:03d}",
                     "50" if name == "p4" else ""])
    with open(root / "manifest.csv", "w", newline="") as fh:
        csv.writer(fh).writerows(rows)
    out = root / "out"
    code, stdout, stderr = batch(root / "manifest.csv", "--out", out, "--config",
                                 scene["params"], "--workers", "2", "--retries", "2")
    return {"out": out, "code": code, "stdout": stdout, "stderr": stderr, "root": root}


def test_broken_pairs_recorded_others_complete_exit_3(broken_batch):
    out = broken_batch["out"]
    assert broken_batch["code"] == 3, broken_batch["stderr"]
    assert broken_batch["stderr"].strip().splitlines()[-1].startswith(
        "stereomesh batch: 2 of 6 pairs failed")
    assert [p.name for p in pair_dirs(out)] == ["p1", "p2", "p3", "p4"]
    for folder in pair_dirs(out):
        assert_complete(folder)
    summary = json.loads((out / "summary.json").read_text())
    rows = {r["name"]: r for r in summary["pairs"]}
    assert [r["name"] for r in summary["pairs"]] == ["p1", "p2", "p3", "corrupt", "flat", "p4"]
    assert {n for n, r in rows.items() if r["status"] == "failed"} == {"corrupt", "flat"}
    assert "not a readable image" in rows["corrupt"]["reason"]
    assert rows["corrupt"]["failed_stage"] == "read"
    assert "cannot be rectified" in rows["flat"]["reason"]
    # Bad input is not tried again, whatever --retries says.
    assert rows["corrupt"]["attempts"] == 1 and rows["flat"]["attempts"] == 1
    assert "Traceback" in (out / "_batch" / "failed" / "corrupt" / "log.txt").read_text()
    assert "Traceback" in (out / "batch.log").read_text()
    # meta.* columns unchanged into the report and the summary; overrides per pair.
    report = json.loads((out / "p2" / "report.json").read_text())
    assert report["meta"] == {"meta.accession": "ACC-001"}
    assert rows["flat"]["meta.accession"] == "ACC-004"
    assert report["params"]["disparity"]["disp_range"] == "0:64"
    assert json.loads((out / "p4" / "report.json").read_text())[
        "params"]["disparity"]["speckle_size"] == 50
    assert report["outputs"]["mesh"] == str(out / "p2" / "mesh.ply")
    # Warm workers: two processes converted the six pairs, each warmed up once.
    batches = [json.loads((out / n / "report.json").read_text())["batch"]
               for n in ("p1", "p2", "p3", "p4")]
    pids = [b["worker"]["pid"] for b in batches]
    assert len(set(pids)) <= 2 and max(pids.count(p) for p in pids) >= 2
    assert sum(b["worker_warm_up_seconds"] > 0 for b in batches) <= 2
    assert max(b["worker_pairs_before"] for b in batches) >= 1
    assert "defer to licensed surveyors" in summary["run"]["caution"]
    with open(out / "summary.csv", newline="") as fh:
        table = list(csv.DictReader(fh))
    assert [r["status"] for r in table] == ["done", "done", "done", "failed", "failed", "done"]
    assert table[0]["meta.accession"] == "ACC-000"
    # SHA256SUMS checked by coreutils' sha256sum, an outside reference.
    if shutil.which("sha256sum"):
        check = subprocess.run(["sha256sum", "--check", "--quiet", "SHA256SUMS"], cwd=out,
                               capture_output=True, text=True)
        assert check.returncode == 0, check.stdout + check.stderr
    assert len((out / "SHA256SUMS").read_text().splitlines()) >= 4 * 12
    assert not any((out / "_batch" / "tmp").iterdir())


def _chromium():
    for name in ("chromium", "chromium-browser"):
        if shutil.which(name):
            return shutil.which(name)
    return None


def test_contact_sheet_shows_every_pair_in_headless_chromium(broken_batch, tmp_path):
    out = broken_batch["out"]
    page = (out / "index.html").read_text()
    # Offline: nothing is fetched from anywhere but beside the page.
    assert "http://" not in page and "https://" not in page and "//" not in page.replace(
        "://", "")
    assert "defer to licensed surveyors" in page
    browser = _chromium()
    if browser is None:
        pytest.skip("chromium is not installed (scripts/ensure_system_libs.sh installs it with "
                    "apt-get when run as root); 'apt-get install chromium' to run this test")
    # Debian's Chromium, headless, no sandbox (tests run as root), the page's own load
    # handler counting the thumbnails that decoded.
    proc = subprocess.run(
        [browser, "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
         f"--user-data-dir={tmp_path / 'profile'}", "--allow-file-access-from-files",
         "--virtual-time-budget=10000", "--dump-dom", (out / "index.html").as_uri()],
        capture_output=True, text=True, timeout=120)
    dom = proc.stdout
    assert "<section" in dom, proc.stderr[-2000:]
    for name in ("p1", "p2", "p3", "p4", "corrupt", "flat"):
        assert f'data-pair="{name}"' in dom, name
    assert dom.count('data-status="failed"') == 2
    assert 'data-images="8"' in dom  # disparity and mesh thumbnails of the 4 finished pairs
    assert 'data-images-loaded="8"' in dom, "a thumbnail did not load"


def test_kill_mid_run_then_resume_redoes_nothing_finished(scene, tmp_path):
    names = ["k1", "k2", "k3", "k4"]
    write_pairs(scene, tmp_path / "src", names, style="-left")
    out = tmp_path / "out"
    args = [sys.executable, "-m", "stereomesh", "batch", str(tmp_path / "src"), "--out",
            str(out), "--calib", str(scene["calib"]), "--config", str(scene["params"]),
            "--workers", "1", "--quiet"]
    # Its own session, so that the kill reaches the workers too, as a killed job's would.
    proc = subprocess.Popen(args, start_new_session=True, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE)
    deadline = time.monotonic() + 300
    while time.monotonic() < deadline and proc.poll() is None:
        if out.is_dir() and len(pair_dirs(out)) >= 1:
            break
        time.sleep(0.02)
    assert proc.poll() is None, proc.communicate()
    os.killpg(proc.pid, signal.SIGKILL)
    proc.communicate()
    first = pair_dirs(out)
    assert 1 <= len(first) < len(names)
    for folder in first:  # whatever exists under a pair's name is finished
        assert_complete(folder)
    stamps = {p.name: (p / "report.json").stat().st_mtime_ns for p in first}

    code, stdout, stderr = batch(*args[4:])
    assert code == 0, stderr
    assert [p.name for p in pair_dirs(out)] == names
    for folder in pair_dirs(out):
        assert_complete(folder)
    for name, stamp in stamps.items():
        assert (out / name / "report.json").stat().st_mtime_ns == stamp, name
    rows = {r["name"]: r for r in json.loads((out / "summary.json").read_text())["pairs"]}
    assert {n for n, r in rows.items() if r["status"] == "skipped"} == set(stamps)
    assert {n for n, r in rows.items() if r["status"] == "done"} == set(names) - set(stamps)
    assert not any((out / "_batch" / "tmp").iterdir())

    # A changed input is redone, the rest skipped; the log says how many of each. An input
    # that changed into a broken one fails, and its earlier result leaves DIR/NAME.
    img = np.array(Image.open(tmp_path / "src" / "k4-left.png"))
    img[0, 0] ^= 1
    Image.fromarray(img).save(tmp_path / "src" / "k4-left.png")
    (tmp_path / "src" / "k3-left.png").write_bytes(b"broken")
    stamps = {n: (out / n / "report.json").stat().st_mtime_ns for n in names}
    code, stdout, stderr = batch(*args[4:])
    assert code == 3, stderr
    assert [p.name for p in pair_dirs(out)] == ["k1", "k2", "k4"]
    changed = {n for n in ("k1", "k2", "k4")
               if (out / n / "report.json").stat().st_mtime_ns != stamps[n]}
    assert changed == {"k4"}
    assert "2 finished earlier and unchanged, 2 to convert" in (out / "batch.log").read_text()
    assert [p.name.split(".")[0] for p in (out / "_batch" / "superseded").iterdir()] == ["k3"]


def test_killed_worker_and_timeout_are_recorded_and_retried(scene, tmp_path):
    write_pairs(scene, tmp_path / "src", ["w1", "w2"])
    out = tmp_path / "out"
    args = ["batch", str(tmp_path / "src"), "--out", str(out), "--calib", str(scene["calib"]),
            "--config", str(scene["params"]), "--workers", "1", "--retries", "1", "--quiet"]
    proc = subprocess.Popen([sys.executable, "-m", "stereomesh", *args],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    killed = None
    deadline = time.monotonic() + 300
    while killed is None and time.monotonic() < deadline and proc.poll() is None:
        tmp = out / "_batch" / "tmp"
        for p in (tmp.iterdir() if tmp.is_dir() else []):
            if p.name.startswith("w1."):  # NAME.PID.TOKEN: the worker converting w1
                killed = int(p.name.split(".")[1])
                os.kill(killed, signal.SIGKILL)
                break
        time.sleep(0.005)
    _, stderr = proc.communicate(timeout=300)
    assert killed is not None
    assert proc.returncode == 0, stderr
    rows = {r["name"]: r for r in json.loads((out / "summary.json").read_text())["pairs"]}
    assert rows["w1"]["status"] == "done" and rows["w1"]["attempts"] == 2
    assert "SIGKILL" in (out / "batch.log").read_text()
    assert not (out / "_batch" / "failed" / "w1").exists()  # the retry succeeded
    assert json.loads((out / "w1" / "report.json").read_text())["batch"]["worker"]["pid"] != killed

    # A time limit no pair can meet: recorded as a timeout, tried once more, exit 3.
    code, _, stderr = run_cli("batch", tmp_path / "src", "--out", tmp_path / "out2", "--calib",
                              scene["calib"], "--config", scene["params"], "--workers", "1",
                              "--pair-timeout", "0.001", "--retries", "1", "--quiet")
    assert code == 3, stderr
    assert stderr.strip().splitlines()[-1].startswith("stereomesh batch: 2 of 2 pairs failed")
    rows = {r["name"]: r for r in
            json.loads((tmp_path / "out2" / "summary.json").read_text())["pairs"]}
    assert all(r["attempts"] == 2 and "time limit" in r["reason"] for r in rows.values())
    assert (tmp_path / "out2" / "_batch" / "failed" / "w1" / "report.json").is_file()


def test_local_dask_cluster_gives_the_results_of_one_worker(scene, tmp_path):
    distributed = pytest.importorskip("dask.distributed")
    names = ["d1", "d2", "d3"]
    write_pairs(scene, tmp_path / "src", names)
    common = [tmp_path / "src", "--calib", scene["calib"], "--config", scene["params"],
              "--quiet"]
    code, _, stderr = batch(*common, "--out", tmp_path / "one", "--workers", "1",
                            "--threads", "1")
    assert code == 0, stderr
    assert json.loads((tmp_path / "one" / "d1" / "report.json").read_text()
                      )["batch"]["worker"]["numba_threads"] == 1
    # A real scheduler and two worker processes of one thread each on this machine.
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None,
                                  env={"NUMBA_NUM_THREADS": "1"}) as cluster:
        code, _, stderr = batch(*common, "--out", tmp_path / "dask", "--cluster",
                                cluster.scheduler_address)
    assert code == 0, stderr
    for name in names:
        one, other = tmp_path / "one" / name, tmp_path / "dask" / name
        assert (one / "disparity.pfm").read_bytes() == (other / "disparity.pfm").read_bytes()
        assert (one / "occlusion.png").read_bytes() == (other / "occlusion.png").read_bytes()
        a, b = (json.loads((d / "report.json").read_text()) for d in (one, other))

        def figures(report):
            return {stage: {k: v for k, v in figs.items() if "seconds" not in k}
                    for stage, figs in report["stages"].items()
                    if stage not in ("export", "previews")}

        assert figures(a) == figures(b)
        assert a["batch"]["fingerprint"] == b["batch"]["fingerprint"]


def test_summary_flags_pairs_that_need_a_look():
    from stereomesh.batch import summary_row
    from stereomesh.io.manifest import PairSpec

    spec = PairSpec("a", [Path("a_L.png"), Path("a_R.png")])
    report = {"scale": "unscaled", "total_seconds": 3.0,
              "pair": {"rectification": {"held_out": {"median_px": 1.6}}},
              "stages": {"disparity": {"density": 0.31, "seconds": 0.2},
                         "repair": {"filled_vertices": 80, "vertices_after": 1000,
                                    "faces_after": 1900}}}
    row = summary_row(spec, "done", report, {})
    assert row["flags"] == ["low density (31%)", "high rectification residual (1.60 px)",
                            "unscaled", "many filled vertices (8%)"]
    good = {"scale": "metric", "pair": {"rectification": {"vertical_residual":
                                                          {"median_px": 0.2}}},
            "stages": {"disparity": {"density": 0.8},
                       "repair": {"filled_vertices": 10, "vertices_after": 1000}}}
    assert summary_row(spec, "done", good, {})["flags"] == []
