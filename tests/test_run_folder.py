"""The output folder holds one whole run: every output is staged and published at once, so
an error, an interrupt or a kill at any step of the writing phase leaves the earlier run or
the new one, complete; a rerun with fewer models leaves no stale files; the user's files
are never touched; one run at a time; a full disk is a clean failure.

"One whole run" is judged file by file (``_which_run``): the folder equals the earlier run
byte for byte, or every file a run owns is exactly what its results.json implies (the
report and the tables rebuilt from it, analysis.toml from its settings, the posteriors it
lists and no others) and the manifest lists exactly those files.

Outside checks, named beside them: the data are the Grunfeld panel shipped in
statsmodels.datasets; kills are real signals to real ``python -m bayespanel`` processes
(SIGKILL cannot be caught or delayed, signal(7)); a stopped process is read from
``/proc/PID/stat`` (proc(5)); a write beyond the kernel's RLIMIT_FSIZE fails with EFBIG
(setrlimit(2)) as one beyond a full disk fails with ENOSPC; a 2 MB tmpfs is a real full
disk (mounted when the tests run as root).
"""

from __future__ import annotations

import errno
import json
import os
import resource
import shutil
import signal
import subprocess
import sys
import time
import warnings
from contextlib import redirect_stderr, redirect_stdout
from io import StringIO
from pathlib import Path

import pytest

from bayespanel.core import outputs
from bayespanel.app.cli import main
from bayespanel.core.outputs import FAULT_ENV, settle
from bayespanel.report import load_results, render, write_tables

UNIT, TIME = "firm", "year"
F = "invest ~ value + capital"
USER_FILES = {"notes.txt": b"my notes\n", "tables/my_table.csv": b"a,b\n1,2\n",
              "posteriors/mine.nc": b"not ours\n"}


def _args(csv, out, *extra):
    return ["fit", str(csv), "--unit", UNIT, "--time", TIME, "--formula", F,
            "--quiet", "--out", str(out), *extra]


#: the new run: reference fits only (the sampler is not what is tested), fewer models than
#: the earlier run, which had a Bayesian model and two reference fits
NEW = ("--models", "none", "--reference", "random", "--seed", "5")


def _main(argv):
    out, err = StringIO(), StringIO()
    with warnings.catch_warnings(), redirect_stdout(out), redirect_stderr(err):
        warnings.simplefilter("ignore")
        rc = main(argv)
    return rc, out.getvalue(), err.getvalue()


def _snapshot(folder: Path) -> dict:
    """Every file (hidden ones too) -> bytes, but the lock file, which names its last
    holder."""
    return {p.relative_to(folder).as_posix(): p.read_bytes()
            for p in sorted(folder.rglob("*")) if p.is_file()
            and p.relative_to(folder).as_posix() != ".bayespanel/lock"}


def _which_run(folder: Path, old: dict, tmp: Path) -> str:
    """``"old"`` if the folder is the earlier run byte for byte, ``"new"`` if it is one
    whole other run; fails on anything else (a mix, leftovers, a touched user file)."""
    snap = _snapshot(folder)
    left = sorted(k for k in snap if k.startswith(".bayespanel/") and k != ".bayespanel/manifest.json")
    assert not left, f"staging, journal or temporary files left: {left}"
    for rel, data in USER_FILES.items():
        assert snap.get(rel) == data, f"user file {rel} was touched"
    if snap == old:
        return "old"
    res = json.loads(snap["results.json"])
    tables = tmp / f"tables-{len(list(tmp.iterdir()))}"
    write_tables(res, tables)
    expected = {"results.json": None, "analysis.toml": res["settings"]["toml"].encode(),
                "report.html": render(res).encode()}
    expected.update({p.relative_to(tables).as_posix(): p.read_bytes()
                     for p in tables.rglob("*") if p.is_file()})
    expected.update({m["posterior_file"]: None for m in res["models"] if m["posterior_file"]})
    for rel, data in expected.items():
        assert rel in snap, f"{rel} of the run is missing"
        if data is not None:
            assert snap[rel] == data, f"{rel} is not the one results.json implies"
    manifest = json.loads(snap[".bayespanel/manifest.json"])
    assert set(manifest["files"]) == set(expected)
    assert set(snap) == set(expected) | set(USER_FILES) | {".bayespanel/manifest.json"}
    assert res["settings"]["reference"] == ["random"] and res["models"] == []
    return "new"


@pytest.fixture(scope="module")
def grunfeld_csv(tmp_path_factory, grunfeld):
    path = tmp_path_factory.mktemp("folder_data") / "grunfeld.csv"
    grunfeld.to_csv(path, index=False)
    return path


@pytest.fixture(scope="module")
def old_run(grunfeld_csv, tmp_path_factory):
    """An earlier run (one Bayesian model, two reference fits) plus the user's files."""
    out = tmp_path_factory.mktemp("old") / "run"
    rc, _, err = _main(_args(grunfeld_csv, out, "--models", "pooled", "--reference",
                             "random,within", "--draws", "30", "--tune", "30", "--chains", "2",
                             "--ppc-draws", "10", "--sampler", "pymc", "--seed", "3"))
    assert rc == 0, err
    for rel, data in USER_FILES.items():
        (out / rel).parent.mkdir(exist_ok=True)
        (out / rel).write_bytes(data)
    assert (out / "posteriors/pooled.nc").is_file() and (out / "tables/diagnostics.md").is_file()
    return out, _snapshot(out)


@pytest.fixture
def folder(old_run, tmp_path):
    out = tmp_path / "run"
    shutil.copytree(old_run[0], out, copy_function=shutil.copy2)
    return out


def _subprocess(argv, fault=None, **kw):
    env = dict(os.environ)
    env.pop(FAULT_ENV, None)
    if fault:
        env[FAULT_ENV] = fault
    return subprocess.Popen([sys.executable, "-m", "bayespanel", *argv], env=env,
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True, **kw)


# ---------------------------------------------------------------------- a whole rerun
def test_a_rerun_with_fewer_models_leaves_no_stale_file_and_no_user_file_touched(
        folder, old_run, grunfeld_csv, tmp_path):
    rc, _, err = _main(_args(grunfeld_csv, folder, *NEW))
    assert rc == 0, err
    # the earlier run's posterior and its diagnostics tables are gone, the user's stay
    assert not (folder / "posteriors/pooled.nc").exists()
    assert not (folder / "tables/diagnostics.md").exists()
    assert _which_run(folder, old_run[1], tmp_path) == "new"


def test_a_folder_written_before_manifests_is_cleaned_by_name(folder, old_run, grunfeld_csv,
                                                               tmp_path):
    shutil.rmtree(folder / ".bayespanel")  # as the earlier version left its folders
    (folder / "posteriors/.pooled.nc.partial").write_bytes(b"half")
    (folder / ".results.json.x1y2.tmp").write_bytes(b"half")
    rc, _, err = _main(_args(grunfeld_csv, folder, *NEW))
    assert rc == 0, err
    assert _which_run(folder, old_run[1], tmp_path) == "new"


# ---------------------------------------------------------------------- kills and interrupts
@pytest.mark.parametrize("step, expect", [
    ("staged", "old"),                          # everything written, nothing committed
    ("committed", "new"),                       # the journal is the commit point
    ("moved:tables/coefficients.csv", "new"),   # some files moved, old results.json
    ("recorded", "new"),                        # manifest written, staging not removed
])  # every other step: test_a_failure_at_any_step_leaves_one_whole_run
def test_a_kill_at_any_publish_step_leaves_one_whole_run(folder, old_run, grunfeld_csv, tmp_path,
                                                         step, expect):
    proc = _subprocess(_args(grunfeld_csv, folder, *NEW), fault=f"{step}@KILL")
    _, err = proc.communicate(timeout=300)
    assert proc.returncode == -signal.SIGKILL, err
    if expect == "new" and step != "recorded":
        # before recovery the folder is marked: the journal names the run being published
        assert (folder / ".bayespanel/publish.json").is_file()
        # a reader of the analysis file (fit --config OUT/analysis.toml) finishes the publish
        # first and so reads the new run's settings, the ones results.json describes
        from bayespanel.app.runner import load_settings

        assert load_settings(folder / "analysis.toml").reference == ("random",)
    load_results(folder)  # a reader: recovery is deterministic, whatever step was cut
    assert _which_run(folder, old_run[1], tmp_path) == expect


@pytest.mark.parametrize("step, expect", [("staged", "old"), ("moved:report.html", "new")])
def test_ctrl_c_in_the_writing_phase(folder, old_run, grunfeld_csv, tmp_path, step, expect):
    """Before the commit Ctrl-C discards the staging folder; from the commit on it is held
    back until the publish is done. Either way the process itself leaves one whole run
    (no recovery needed) and exits 1."""
    proc = _subprocess(_args(grunfeld_csv, folder, *NEW), fault=f"{step}@INT")
    _, err = proc.communicate(timeout=300)
    assert proc.returncode == 1 and "bayespanel: interrupted" in err, err
    assert "Traceback" not in err
    assert _which_run(folder, old_run[1], tmp_path) == expect


@pytest.mark.parametrize("step, expect", [
    ("locked", "old"), ("staged", "old"), ("committed", "new"),
    ("moved:tables/comparison.md", "new"), ("moved:results.json", "new"), ("removed", "new"),
    ("recorded", "new"), ("cleaned", "new")])
def test_a_failure_at_any_step_leaves_one_whole_run(folder, old_run, grunfeld_csv, tmp_path,
                                                    monkeypatch, step, expect):
    def fail(name):
        if name == step:
            raise RuntimeError(f"injected failure at {name}")

    monkeypatch.setattr(outputs, "_step", fail)
    rc, _, err = _main(_args(grunfeld_csv, folder, *NEW))
    assert rc == 1 and "injected failure" in err, err
    monkeypatch.undo()
    settle(folder)
    assert _which_run(folder, old_run[1], tmp_path) == expect


def test_an_error_while_rendering_the_report_leaves_the_earlier_run(folder, old_run,
                                                                    grunfeld_csv, tmp_path,
                                                                    monkeypatch):
    import bayespanel.report as report

    def broken(results, folder):
        (Path(folder) / "tables").mkdir(exist_ok=True)
        (Path(folder) / "tables/coefficients.md").write_text("half a table")
        raise ValueError("the report could not be rendered")

    monkeypatch.setattr(report, "write_report", broken)
    rc, _, err = _main(_args(grunfeld_csv, folder, *NEW))
    assert rc == 1 and "could not be rendered" in err
    assert _snapshot(folder) == old_run[1]  # as it was, without any recovery


# ---------------------------------------------------------------------- one run at a time
def _wait_stopped(pid):
    """Until /proc/PID/stat says the process is stopped (state T, proc(5))."""
    for _ in range(6000):
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
        if state == "T":
            return
        time.sleep(0.05)
    raise AssertionError("the first run never reached its lock")


def test_a_second_run_into_a_busy_folder_is_refused_naming_the_first(folder, old_run,
                                                                     grunfeld_csv, tmp_path):
    first = _subprocess(_args(grunfeld_csv, folder, *NEW), fault="locked@STOP")
    try:
        _wait_stopped(first.pid)
        rc, _, err = _main(_args(grunfeld_csv, folder, *NEW))
        assert rc == 2, err
        assert f"is in use by process {first.pid} on {os.uname().nodename}" in err
        assert "fit" in err and "choose another --out" in err
        assert _snapshot(folder) == old_run[1]  # the refused run wrote nothing
    finally:
        os.kill(first.pid, signal.SIGCONT)
        _, ferr = first.communicate(timeout=300)
    assert first.returncode == 0, ferr
    assert _which_run(folder, old_run[1], tmp_path) == "new"
    rc, _, err = _main(_args(grunfeld_csv, folder, *NEW))  # free again
    assert rc == 0, err


def test_the_lock_of_a_killed_run_is_stale_and_taken_over(folder, old_run, grunfeld_csv,
                                                          tmp_path):
    proc = _subprocess(_args(grunfeld_csv, folder, *NEW), fault="locked@KILL")
    proc.communicate(timeout=300)
    assert proc.returncode == -signal.SIGKILL
    holder = json.loads((folder / ".bayespanel/lock").read_text())
    assert holder["pid"] == proc.pid  # the file still names the dead process...
    rc, _, err = _main(_args(grunfeld_csv, folder, *NEW))
    assert rc == 0, err  # ...but the OS lock died with it
    assert _which_run(folder, old_run[1], tmp_path) == "new"


# ---------------------------------------------------------------------- a full disk
@pytest.mark.parametrize("target", ["report.html", "coefficients.tex", "results.json",
                                    "publish.json"])
def test_a_full_disk_fails_cleanly_and_keeps_the_earlier_run(folder, old_run, grunfeld_csv,
                                                             monkeypatch, target):
    real = os.fdopen

    class Full:
        def __init__(self, fh):
            self.fh = fh

        def __enter__(self):
            return self

        def __exit__(self, *exc):
            self.fh.close()

        def write(self, data):
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

        def __getattr__(self, name):
            return getattr(self.fh, name)

    def fdopen(fd, *a, **k):
        fh = real(fd, *a, **k)
        name = os.readlink(f"/proc/self/fd/{fd}")
        return Full(fh) if Path(name).name.startswith(f".{target}.") else fh

    monkeypatch.setattr(os, "fdopen", fdopen)
    rc, _, err = _main(_args(grunfeld_csv, folder, *NEW))
    assert rc == 1, err
    assert "No space left on device" in err and "the folder is as it was" in err
    assert "Traceback" not in err
    assert _snapshot(folder) == old_run[1]  # no staging, no temporary file, old run intact


def test_a_full_disk_while_saving_a_posterior_stops_the_run(folder, old_run, grunfeld_csv,
                                                          monkeypatch):
    """Not recorded as one failed model with the run going on: the outputs cannot be
    written, so the run stops and the folder keeps the earlier run. (The failed write's
    traceback once pinned xarray's in-memory file and crashed the interpreter when the
    garbage collector met it; ``gc.collect`` here would meet it again.)"""
    import gc

    real = os.fdopen

    def fdopen(fd, *a, **k):
        if Path(os.readlink(f"/proc/self/fd/{fd}")).name.startswith(".pooled.nc."):
            os.close(fd)
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return real(fd, *a, **k)

    monkeypatch.setattr(os, "fdopen", fdopen)
    rc, _, err = _main(_args(grunfeld_csv, folder, "--models", "pooled", "--reference",
                             "random", "--draws", "30", "--tune", "30", "--chains", "2",
                             "--ppc-draws", "10", "--sampler", "pymc", "--seed", "4"))
    gc.collect()
    assert rc == 1, err
    assert "No space left on device" in err and "did not finish" not in err
    assert _snapshot(folder) == old_run[1]


def test_a_posterior_on_a_full_disk_leaves_no_file_and_no_hdf5_noise(old_run, tmp_path):
    """The file-size limit makes the write fail for real (EFBIG), in a fresh process: the
    posterior is made in memory, so HDF5 never sees the failure and prints nothing."""
    script = ("import errno, sys\n"
              "from bayespanel.bayes.posterior import Posterior\n"
              "post = Posterior.load(sys.argv[1])\n"
              "try:\n"
              "    post.save(sys.argv[2])\n"
              "except OSError as exc:\n"
              "    print(errno.errorcode[exc.errno])\n")
    size = (old_run[0] / "posteriors/pooled.nc").stat().st_size

    def limit():
        resource.setrlimit(resource.RLIMIT_FSIZE, (size // 2, size // 2))

    proc = subprocess.run([sys.executable, "-c", script, str(old_run[0] / "posteriors/pooled.nc"),
                           str(tmp_path / "copy.nc")], capture_output=True, text=True,
                          preexec_fn=limit, timeout=300)
    assert proc.stdout.strip() == "EFBIG", proc.stderr
    assert proc.stderr == ""
    assert list(tmp_path.iterdir()) == []


def test_a_run_beyond_the_file_size_limit_exits_one_and_keeps_the_earlier_run(
        folder, old_run, grunfeld_csv):
    def limit():  # report.html is larger than this; the tables are smaller
        resource.setrlimit(resource.RLIMIT_FSIZE, (20_000, 20_000))

    proc = _subprocess(_args(grunfeld_csv, folder, *NEW), preexec_fn=limit)
    _, err = proc.communicate(timeout=300)
    assert proc.returncode == 1, err
    assert "File too large" in err and "Traceback" not in err
    assert _snapshot(folder) == old_run[1]


def test_a_real_full_disk(old_run, grunfeld_csv, tmp_path):
    """A 2 MB tmpfs filled by a user's file: the run fails with ENOSPC, cleanly."""
    mnt = tmp_path / "small"
    mnt.mkdir()
    mount = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=2m", "tmpfs", str(mnt)],
                           capture_output=True)
    if mount.returncode != 0:
        pytest.skip("mounting a tmpfs needs root")
    try:
        out = mnt / "run"
        shutil.copytree(old_run[0], out, copy_function=shutil.copy2)
        free = shutil.disk_usage(mnt).free
        (out / "filler.bin").write_bytes(b"\0" * (free - 60_000))  # the user's file
        before = _snapshot(out)
        proc = _subprocess(_args(grunfeld_csv, out, *NEW))
        _, err = proc.communicate(timeout=300)
        assert proc.returncode == 1, err
        assert "No space left on device" in err and "Traceback" not in err
        assert _snapshot(out) == before
    finally:
        subprocess.run(["umount", str(mnt)], check=True)


# ---------------------------------------------------------------------- report into a folder
def test_report_rebuilds_in_place_and_keeps_the_run(folder, old_run, tmp_path):
    rc, _, err = _main(["report", str(folder)])
    assert rc == 0, err
    assert _snapshot(folder).keys() == old_run[1].keys()
    for rel, data in old_run[1].items():  # the page is a pure function of results.json
        if rel != ".bayespanel/manifest.json":
            assert _snapshot(folder)[rel] == data, rel
    manifest = json.loads((folder / ".bayespanel/manifest.json").read_text())
    assert "posteriors/pooled.nc" in manifest["files"]


def test_report_into_another_runs_folder_is_refused(folder, old_run, grunfeld_csv, tmp_path):
    other = tmp_path / "other"
    rc, _, err = _main(_args(grunfeld_csv, other, *NEW))
    assert rc == 0, err
    before = _snapshot(other)
    rc, _, err = _main(["report", str(folder), "--out", str(other)])
    assert rc == 2 and "holds the outputs of another run" in err
    assert _snapshot(other) == before


# ---------------------------------------------------------------------- a shared folder
def test_a_crafted_manifest_or_journal_never_touches_files_outside(folder, old_run, grunfeld_csv,
                                                                   tmp_path):
    """A results folder from someone else may carry any manifest or journal: names with
    '..', absolute names and paths through a link that leaves the folder are not ours."""
    outside = tmp_path / "outside.txt"
    outside.write_text("keep me\n")
    (tmp_path / "elsewhere").mkdir()
    (tmp_path / "elsewhere/x.md").write_text("keep me too\n")
    (folder / "tables/linked").symlink_to(tmp_path / "elsewhere")
    manifest = json.loads((folder / ".bayespanel/manifest.json").read_text())
    st = outside.stat()
    for rel in ("../outside.txt", str(outside), "tables/linked/x.md"):
        manifest["files"][rel] = {"size": st.st_size, "mtime_ns": st.st_mtime_ns}
    (folder / ".bayespanel/manifest.json").write_text(json.dumps(manifest))
    rc, _, err = _main(_args(grunfeld_csv, folder, *NEW))  # a rerun removes stale files
    assert rc == 0, err
    assert outside.read_text() == "keep me\n"
    assert (tmp_path / "elsewhere/x.md").read_text() == "keep me too\n"
    # a journal naming a file outside is refused before anything is moved or removed
    journal = {"stage": "stage-1-ab", "files": {}, "moves": [],
               "remove": {"../outside.txt": None}}
    (folder / ".bayespanel/publish.json").write_text(json.dumps(journal))
    rc, _, err = _main(["report", str(folder)])
    assert rc == 1 and "damaged or not bayespanel's" in err
    assert outside.read_text() == "keep me\n"
