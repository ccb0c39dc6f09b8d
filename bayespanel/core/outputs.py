"""One output folder, one complete run: staging, an atomic publish, a lock and recovery.

A run (``bayespanel fit``, :func:`bayespanel.app.runner.run` with ``out=``) and a rebuilt
report (``bayespanel report``) never write straight into their folder. They write every
file into a private staging folder inside it, and only when all files are written do they
publish them, in a way that a failure, an interrupt or a kill at any moment leaves the
folder holding either the earlier run or the new one, each complete:

``OUT/.bayespanel/`` holds the state of the folder (hidden; everything else in ``OUT`` is
the run's files and whatever the user keeps there):

``lock``
    An OS lock (``flock``) held for the whole run, so a second run into the same folder is
    refused at once, naming the first (the file says which process, host, start time and
    command). The kernel releases the lock when its process ends, even by SIGKILL, so a
    lock left by a killed run is stale by construction and the next run takes it.
``manifest.json``
    The files of the published run, each with its size and modification time.
``stage-ID/``
    The new run's files while they are written, laid out as they will be in ``OUT``.
``publish.json``
    The journal of a publish in progress: the new manifest, the files to move from the
    staging folder and the earlier run's files the new run does not produce. Writing it (a temporary file, fsync,
    then a rename) is the commit point. Before it exists the earlier run is the published
    one and the staging folder is discarded; once it exists the new run is, and the moves
    that remain are finished ("rolled forward").

Publishing: write the journal (commit); move each staged file over its target with
:func:`os.replace` (atomic on POSIX), ``results.json`` last; remove the earlier run's files
the new run does not produce (unless the user changed them since: their size or
modification time differs from the manifest); rename the journal to ``manifest.json``;
remove the staging folder. Ctrl-C and SIGTERM are held back for these steps and delivered
after them. A SIGKILL between any two of them leaves the journal, and the next bayespanel
command that reads or writes the folder (``fit``, ``report``, ``fit --config
OUT/analysis.toml``, :func:`bayespanel.report.load_results`, ``Posterior.load``) finishes
the publish first: every step is idempotent, so the recovery is the same whatever step
the kill interrupted. Files that are not in a manifest (the user's) are never moved,
changed or removed.

Test seam: ``BAYESPANEL_TEST_PUBLISH_FAULT=STEP[@SIGNAL]`` makes the process send itself
``SIGNAL`` (default ``KILL``; ``INT``, ``TERM``, ``STOP``, ...) when the publish reaches
``STEP``, one of :data:`STEPS` or ``moved:<relative path>``. It exists for
tests/test_run_folder.py and is documented in DEVELOPERS.md.
"""

from __future__ import annotations

import errno
import json
import os
import secrets
import shutil
import signal
import socket
import sys
import threading
import time
from contextlib import contextmanager
from datetime import datetime, timezone
from pathlib import Path

from .errors import FolderInUseError, OutputError, SpecificationError

__all__ = ["RunFolder", "settle", "settle_for", "published_files", "write_atomic",
           "cannot_write", "STATE_DIR", "STEPS", "FAULT_ENV"]

STATE_DIR = ".bayespanel"
FAULT_ENV = "BAYESPANEL_TEST_PUBLISH_FAULT"
#: the publish steps a test can stop at (besides ``moved:<path>`` after each move)
STEPS = ("locked", "staged", "committed", "removed", "recorded", "cleaned")
#: what a run owns in its folder (the scope of a report rebuilt with ``bayespanel report``)
REPORT_SCOPE = ("report.html", "tables/")
_FORMAT = 1
_NO_SPACE = {errno.ENOSPC, errno.EDQUOT, errno.EFBIG}
#: seconds a run waits for a lock held by another command before refusing (readers hold
#: it for the few milliseconds a recovery takes)
LOCK_WAIT = 2.0
#: seconds a reader waits for a publish in progress in another process
PUBLISH_WAIT = 60.0


def _step(name: str) -> None:
    """A named point of the publish (the test seam, see the module docstring)."""
    spec = os.environ.get(FAULT_ENV)
    if not spec:
        return
    step, _, sig = spec.partition("@")
    if step == name:
        os.kill(os.getpid(), getattr(signal, f"SIG{sig or 'KILL'}"))


# ---------------------------------------------------------------------- one file
def write_atomic(path, data: bytes | str) -> Path:
    """Write ``data`` to ``path`` through a temporary file, fsync and an atomic rename.

    The file keeps the permissions of the one it replaces, or gets those of the umask. A
    write that does not fit in the free space of the file system is refused before it
    starts (``OSError`` ENOSPC); an interrupted or failed write leaves no temporary file.
    """
    import tempfile

    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    if isinstance(data, str):
        data = data.encode("utf-8")
    try:
        free = shutil.disk_usage(path.parent).free
    except OSError:
        free = None
    if free is not None and len(data) > free:
        raise OSError(errno.ENOSPC, f"{os.strerror(errno.ENOSPC)} ({len(data)} bytes to "
                      f"write, {free} free)", str(path))
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.chmod(tmp, _file_mode(path))  # mkstemp makes 0600; keep the usual permissions
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    return path


def _file_mode(path: Path) -> int:
    """The replaced file's permissions, or those a new file gets under the umask."""
    try:
        return path.stat().st_mode & 0o777
    except FileNotFoundError:
        umask = os.umask(0)
        os.umask(umask)
        return 0o666 & ~umask


# ---------------------------------------------------------------------- the lock
_HELD: set[int] = set()


def _close_in_child():  # a forked child (sampler workers) must not keep the lock alive
    for fd in list(_HELD):
        try:
            os.close(fd)
        except OSError:
            pass
    _HELD.clear()


if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=_close_in_child)


def _command_line() -> str:
    """This process's command line as a user typed it (``bayespanel fit ...``)."""
    import shlex

    prog = Path(sys.argv[0]).name if sys.argv and sys.argv[0] else "python"
    if prog in ("__main__.py", "bayespanel", "-m", "-c"):
        prog = "bayespanel"
    return shlex.join([prog, *sys.argv[1:]])[:300]


def _describe_holder(info: dict) -> str:
    if not info:
        return "another bayespanel process"
    return (f"process {info.get('pid')} on {info.get('host')}, started "
            f"{info.get('started')}" + (f" ({info['command']})" if info.get("command") else ""))


class _Lock:
    """``OUT/.bayespanel/lock``: an exclusive ``flock`` with the holder described inside."""

    def __init__(self, state: Path, command: str | None = None):
        self.path = state / "lock"
        self.command = command or _command_line()
        self.fd = None

    def acquire(self, wait: float = 0.0) -> "_Lock":
        import fcntl

        deadline = time.monotonic() + wait
        while True:
            try:
                fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o666)
            except OSError as exc:  # a read-only folder, no permission
                raise OutputError(f"cannot write into {str(self.path.parent.parent)!r}: "
                                  f"{exc.strerror or exc}") from None
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except OSError as exc:
                os.close(fd)
                if exc.errno not in (errno.EWOULDBLOCK, errno.EAGAIN, errno.EACCES):
                    raise OutputError(f"cannot lock {str(self.path)!r} ({exc.strerror}); the "
                                      "folder's file system does not support locks: write "
                                      "the run to a local folder") from None
                if time.monotonic() >= deadline:
                    raise FolderInUseError(
                        f"output folder {str(self.path.parent.parent)!r} is in use by "
                        f"{_describe_holder(self.holder())}; wait for it to finish or "
                        "choose another --out") from None
                time.sleep(0.05)
                continue
            try:  # the lock file may have been removed and re-created meanwhile
                if os.fstat(fd).st_ino == os.stat(self.path).st_ino:
                    break
            except FileNotFoundError:
                pass
            os.close(fd)
        self.fd = fd
        _HELD.add(fd)
        info = {"pid": os.getpid(), "host": socket.gethostname(),
                "started": datetime.now(timezone.utc).replace(microsecond=0).isoformat(),
                "command": self.command}
        os.ftruncate(fd, 0)
        os.pwrite(fd, (json.dumps(info) + "\n").encode(), 0)
        return self

    def holder(self) -> dict:
        try:
            return json.loads(self.path.read_text("utf-8") or "{}")
        except (OSError, ValueError):
            return {}

    def release(self, remove: bool = False) -> None:
        if self.fd is None:
            return
        if remove:
            self.path.unlink(missing_ok=True)
        else:
            os.ftruncate(self.fd, 0)
        _HELD.discard(self.fd)
        os.close(self.fd)  # closing the last descriptor releases the flock
        self.fd = None


# ---------------------------------------------------------------------- manifests
def _read_json(path: Path):
    try:
        return json.loads(path.read_text("utf-8"))
    except FileNotFoundError:
        return None
    except (OSError, ValueError, RecursionError) as exc:
        raise OutputError(f"{str(path)!r} is damaged ({exc}); remove the folder "
                          f"{str(path.parent)!r} to start the output folder afresh") from None


def _inside(out: Path, rel) -> Path | None:
    """``out / rel`` if ``rel`` names a file inside ``out`` (outside the state folder),
    else None. Manifests and journals come from the folder, which may have been shared
    or edited: a name with ``..``, an absolute name or a path through a symbolic link
    that leaves the folder is never moved or removed."""
    from pathlib import PurePosixPath

    if not isinstance(rel, str) or not rel or rel.startswith("/") or "\\" in rel:
        return None
    parts = PurePosixPath(rel).parts
    if any(p in ("..", ".") for p in parts) or parts[0] == STATE_DIR:
        return None
    path = out / rel
    try:
        root, parent = out.resolve(), path.parent.resolve()
    except OSError:
        return None
    return path if parent == root or root in parent.parents else None


def _record(path: Path) -> dict:
    st = path.stat()
    return {"size": st.st_size, "mtime_ns": st.st_mtime_ns}


def published_files(out) -> dict:
    """The published run's files in ``out``: relative path -> record (``None`` for a
    folder written before manifests existed, where the files are recognised by name)."""
    out = Path(out)
    manifest = _read_json(out / STATE_DIR / "manifest.json")
    if isinstance(manifest, dict) and isinstance(manifest.get("files"), dict):
        return {rel: rec if isinstance(rec, dict) else {}
                for rel, rec in manifest["files"].items() if _inside(out, rel) is not None}
    return _legacy_files(out)


def _legacy_files(out: Path) -> dict:
    """A folder written by an earlier version (no manifest): its results.json, analysis.toml,
    report.html, the posteriors its results.json lists, the tables written as .md, .tex and
    .csv triplets and the hidden partial files of an interrupted write."""
    if not (out / "results.json").is_file():
        return {}
    files = {name: None for name in ("results.json", "analysis.toml", "report.html")
             if (out / name).is_file()}
    try:
        models = json.loads((out / "results.json").read_text("utf-8")).get("models") or []
        for m in models:
            rel = m.get("posterior_file") if isinstance(m, dict) else None
            if isinstance(rel, str) and rel.startswith("posteriors/") \
                    and _inside(out, rel) is not None and (out / rel).is_file():
                files[rel] = None
    except (OSError, ValueError, RecursionError, AttributeError):
        pass
    tables = out / "tables"
    if tables.is_dir():
        stems = {}
        for p in tables.iterdir():
            if p.is_file() and p.suffix in (".md", ".tex", ".csv"):
                stems.setdefault(p.stem, set()).add(p.suffix)
        for stem, suffixes in stems.items():
            if suffixes == {".md", ".tex", ".csv"}:
                files.update({f"tables/{stem}{s}": None for s in sorted(suffixes)})
    for folder in (out, out / "posteriors", tables):
        if folder.is_dir():
            for p in folder.iterdir():
                name = p.name
                if p.is_file() and name.startswith(".") and (
                        name.endswith(".nc.partial") or name.endswith(".tmp")):
                    files[str(p.relative_to(out))] = None
    return files


def _order(rels) -> list:
    """Publish order: posteriors, tables, analysis.toml, report.html, results.json last."""
    rank = {"analysis.toml": 2, "report.html": 3, "results.json": 4}
    return sorted(rels, key=lambda r: (rank.get(r, 1 if r.startswith("tables/") else 0), r))


def _fsync_dir(path: Path) -> None:
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def _unchanged(path: Path, rec) -> bool:
    """Is ``path`` still the file the manifest recorded (so ours to remove)?"""
    try:
        st = path.lstat()
    except FileNotFoundError:
        return False
    if not path.is_file():
        return False
    return rec is None or (st.st_size == rec.get("size") and st.st_mtime_ns == rec.get("mtime_ns"))


def _check_journal(out: Path, journal) -> None:
    """Refuse a journal that is not one we wrote (damaged, or names files outside)."""
    import re

    ok = (isinstance(journal, dict) and {"stage", "files", "moves"} <= set(journal)
          and isinstance(journal["stage"], str)
          and re.fullmatch(r"stage-[0-9]+-[0-9a-f]+", journal["stage"]) is not None
          and isinstance(journal["moves"], list) and isinstance(journal.get("remove", {}), dict)
          and all(_inside(out, rel) is not None for rel in journal["moves"])
          and all(_inside(out, rel) is not None for rel in journal.get("remove", {})))
    if not ok:
        state = out / STATE_DIR
        raise OutputError(f"{str(state / 'publish.json')!r} is damaged or not bayespanel's; "
                          f"nothing was changed: remove {str(state)!r} to start the output "
                          "folder afresh")


def _roll_forward(out: Path, journal: dict) -> None:
    """Finish a committed publish; idempotent, so a kill at any step is recovered by
    running it again."""
    _check_journal(out, journal)
    state = out / STATE_DIR
    stage = state / journal["stage"]
    for rel in journal["moves"]:
        src, dst = stage / rel, out / rel
        if src.exists():
            dst.parent.mkdir(parents=True, exist_ok=True)
            os.replace(src, dst)
            _step(f"moved:{rel}")
        elif not dst.is_file():
            raise OutputError(f"the publish of the run in {str(out)!r} cannot finish: "
                              f"{rel} is neither staged nor in place (was "
                              f"{str(state)!r} edited?)")
    for rel, rec in journal.get("remove", {}).items():
        p = out / rel
        if _inside(out, rel) is not None and _unchanged(p, rec if isinstance(rec, dict)
                                                        or rec is None else {}):
            p.unlink()
        parent = p.parent
        while parent != out and parent.is_dir() and not any(parent.iterdir()):
            parent.rmdir()
            parent = parent.parent
    _step("removed")
    _fsync_dir(out)
    os.replace(state / "publish.json", state / "manifest.json")
    _fsync_dir(state)
    _step("recorded")
    shutil.rmtree(stage, ignore_errors=True)
    _step("cleaned")


def _recover(out: Path) -> None:
    """With the lock held: finish a committed publish, discard uncommitted staging."""
    state = out / STATE_DIR
    journal = _read_json(state / "publish.json")
    if journal is not None:
        _roll_forward(out, journal)
    for p in state.iterdir():
        if p.name.startswith("stage-") and p.is_dir():
            shutil.rmtree(p, ignore_errors=True)
        elif p.name.startswith(".") and p.name.endswith(".tmp"):
            p.unlink(missing_ok=True)


def _needs_recovery(state: Path) -> bool:
    try:
        return any(p.name == "publish.json" or p.name.startswith("stage-")
                   or p.name.endswith(".tmp") for p in state.iterdir())
    except OSError:
        return False


def settle(out, wait: float = PUBLISH_WAIT) -> None:
    """Bring ``out`` to one complete run before it is read.

    Finishes a publish a killed process left half done and removes abandoned staging
    folders. A publish in progress in a live process is waited for (it takes
    milliseconds), at most ``wait`` seconds. A folder that is not ours, or holds nothing
    to recover, is left alone; a read-only folder is read as it is unless a publish must
    be finished, which is then an :class:`~bayespanel.core.errors.OutputError`.
    """
    out = Path(out)
    state = out / STATE_DIR
    if not state.is_dir() or not _needs_recovery(state):
        return
    journal = state / "publish.json"
    deadline = time.monotonic() + wait
    while True:
        try:
            lock = _Lock(state, command="recovery").acquire()
        except FolderInUseError:
            if not journal.exists():
                return  # a live run is still writing its staging folder: nothing published
            if time.monotonic() >= deadline:
                raise
            time.sleep(0.05)
            continue
        except (OutputError, OSError):  # read-only folder or no locks
            if journal.exists():
                raise OutputError(f"{str(out)!r} holds a publish a killed run left "
                                  "unfinished and cannot be written here; run any "
                                  "bayespanel command on it where it is writable") from None
            return
        try:
            _recover(out)
        finally:
            lock.release()
        return


def settle_for(path) -> None:
    """:func:`settle` the run folder a file belongs to (``OUT/analysis.toml``,
    ``OUT/results.json``, ``OUT/posteriors/NAME.nc``), if it is one."""
    path = Path(path)
    for folder in (path.parent, path.parent.parent):
        if (folder / STATE_DIR).is_dir():
            settle(folder)
            return


# ---------------------------------------------------------------------- signals
@contextmanager
def _held_signals():
    """Hold back Ctrl-C and SIGTERM for the publish; deliver them after it."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    got = []
    old = {}
    for sig in (signal.SIGINT, signal.SIGTERM):
        try:
            old[sig] = signal.signal(sig, lambda s, f: got.append(s))
        except (ValueError, OSError):
            pass
    try:
        yield
    finally:
        for sig, handler in old.items():
            signal.signal(sig, handler)
        for sig in got:
            os.kill(os.getpid(), sig)


# ---------------------------------------------------------------------- a run's folder
class RunFolder:
    """The output folder of one run or rebuilt report, as a context manager.

    ``__enter__`` refuses ``out`` if it is a file, creates it, takes the lock (refusing a
    folder another run holds, naming it), recovers what an earlier killed run left and
    makes :attr:`stage`, where every output is written. :meth:`publish` makes the staged
    files the folder's run. ``__exit__`` without a publish (an error, an interrupt)
    discards the staging folder, so the earlier run stays as it was; a folder the run
    created is removed again. Running out of disk space is an
    :class:`~bayespanel.core.errors.OutputError` naming the folder.

    Parameters
    ----------
    out : path
    command : str, optional
        Names this run in the lock file (default: the command line).
    scope : tuple of str, optional
        The earlier run's files the new one replaces: every file (default) or only those
        whose path equals or starts with an entry (``REPORT_SCOPE`` for a rebuilt report).
    """

    def __init__(self, out, command: str | None = None, scope: tuple | None = None):
        self.out = Path(out)
        self.state = self.out / STATE_DIR
        self.command = command
        self.scope = scope
        self.stage = None
        self._lock = None
        self._created = False
        self._published = False

    def __enter__(self) -> "RunFolder":
        out = self.out
        if out.exists() and not out.is_dir():
            raise SpecificationError(f"--out {str(out)!r} is a file, not a folder; give a "
                                     "folder name (it is created if needed)")
        try:
            self._created = not out.exists()
            out.mkdir(parents=True, exist_ok=True)
            self.state.mkdir(exist_ok=True)
        except FileExistsError:
            raise SpecificationError(f"--out {str(out)!r}: a part of the path is a file, "
                                     "not a folder") from None
        except OSError as exc:
            raise OutputError(f"cannot create the output folder {str(out)!r}: "
                              f"{exc.strerror or exc}") from None
        self._lock = _Lock(self.state, self.command).acquire(wait=LOCK_WAIT)
        try:
            _step("locked")
            _recover(out)
            self.stage = self.state / f"stage-{os.getpid()}-{secrets.token_hex(4)}"
            self.stage.mkdir()
        except BaseException:
            self._abandon()
            raise
        return self

    def _in_scope(self, rel: str) -> bool:
        return self.scope is None or any(rel == s or (s.endswith("/") and rel.startswith(s))
                                         for s in self.scope)

    def publish(self) -> dict:
        """Make the staged files the folder's run (see the module docstring); returns the
        manifest."""
        out, stage = self.out, self.stage
        files = _order(str(p.relative_to(stage)) for p in stage.rglob("*") if p.is_file())
        for rel in files:
            dst = out / rel
            if _inside(out, rel) is None:
                raise OutputError(f"cannot publish {rel} in {str(out)!r}: its folder is a "
                                  "link that leads out of the output folder")
            if dst.exists() and not dst.is_file():
                raise OutputError(f"cannot publish {rel} in {str(out)!r}: a folder of that "
                                  "name is in the way")
        old = published_files(out)
        kept, remove = {}, {}
        for rel, rec in old.items():
            if rel in files:
                continue
            if self._in_scope(rel) or Path(rel).name.startswith("."):
                remove[rel] = rec
            elif (out / rel).is_file():  # outside a rebuilt report's scope: stays the run's
                kept[rel] = rec if rec is not None else _record(out / rel)
        manifest = {"format": _FORMAT, "written_by": "bayespanel",
                    "created": datetime.now(timezone.utc).replace(microsecond=0).isoformat(),
                    "command": self._lock.command if self._lock else None,
                    "files": {**kept, **{rel: _record(stage / rel) for rel in files}}}
        journal = {**manifest, "moves": files, "stage": stage.name, "remove": remove}
        _step("staged")
        with _held_signals():
            try:
                write_atomic(self.state / "publish.json", json.dumps(journal, indent=1) + "\n")
            except OSError as exc:
                raise _output_error(exc, out) from None
            _fsync_dir(self.state)
            self._published = True  # committed: from here the new run is the folder's
            _step("committed")
            try:
                _roll_forward(out, journal)
            except OSError as exc:
                raise OutputError(
                    f"the new run in {str(out)!r} is committed but could not be put in "
                    f"place ({exc.strerror or exc}); the next bayespanel command on the "
                    "folder finishes it") from None
        return manifest

    def _abandon(self) -> None:
        """Discard the staging folder; undo a folder this run created; release the lock."""
        if self.stage is not None and not self._published:
            shutil.rmtree(self.stage, ignore_errors=True)
        remove = False
        if not self._published and not (self.state / "manifest.json").exists() \
                and not (self.state / "publish.json").exists():
            remove = True  # nothing was ever published here: leave no state behind
        if self._lock is not None:
            if remove:
                for p in self.state.iterdir():
                    if p.name != "lock":
                        shutil.rmtree(p, ignore_errors=True) if p.is_dir() else p.unlink()
            self._lock.release(remove=remove)
            self._lock = None
        if remove:
            try:
                self.state.rmdir()
                if self._created:
                    self.out.rmdir()
            except OSError:
                pass

    def __exit__(self, exc_type, exc, tb):
        self._abandon()
        if cannot_write(exc) and not isinstance(exc, OutputError):
            raise _output_error(exc, self.out) from None
        return False


def cannot_write(exc: BaseException) -> bool:
    """Is ``exc`` a failure to write the outputs (a full disk, a quota, a size limit)?
    Such a failure stops the whole run rather than one fit."""
    return isinstance(exc, OutputError) or (isinstance(exc, OSError)
                                            and exc.errno in _NO_SPACE)


def _output_error(exc: OSError, out: Path) -> OutputError:
    where = f" ({exc.filename})" if getattr(exc, "filename", None) else ""
    return OutputError(f"cannot write the outputs into {str(out)!r}: "
                       f"{exc.strerror or exc}{where}; the folder is as it was before the run")
