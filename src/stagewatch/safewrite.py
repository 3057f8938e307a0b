"""The one way stagewatch writes a file: through symlinks, atomically, never over an input, never a lost update.

``safe_write(path, text, inputs=[...])`` is what every command calls:

* ``-`` writes to standard output;
* a symlinked target is resolved, and the new file is written next to the real one and renamed over it, so a reader
  sees the old file or the new one and the link stays a link;
* a target that exists but is not a regular file (directory, FIFO, device, socket) is refused;
* a target that is one of ``inputs`` (the same file, by device and inode, or the same real path) is refused;
* with ``expected`` (a :class:`Snapshot` taken when the command read the file it now replaces), the content on disk
  is compared with the snapshot under an advisory lock and the write is refused if anyone changed it meanwhile;
* the temporary file is removed on every exit path: errors, Ctrl-C, and SIGTERM or SIGHUP during the write.
"""

from __future__ import annotations

import contextlib
import errno
import fcntl
import hashlib
import os
import signal
import stat
import sys
import tempfile
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Iterable, Iterator

from stagewatch.errors import StagewatchError

STDOUT = "-"
LOCK_TIMEOUT_S = 30.0


@dataclass(frozen=True)
class Snapshot:
    """What a file held when a command read it: its real path and the SHA-256 of its bytes (None: absent)."""

    path: str
    digest: str | None

    @classmethod
    def take(cls, path: str | os.PathLike[str]) -> "Snapshot":
        real = os.path.realpath(path)
        try:
            with open(real, "rb") as handle:
                return cls(real, hashlib.sha256(handle.read()).hexdigest())
        except FileNotFoundError:
            return cls(real, None)
        except OSError as exc:
            raise StagewatchError(f"cannot read this file: {exc.strerror}", file=str(path)) from None


def _kind(mode: int) -> str:
    for test, name in ((stat.S_ISDIR, "a directory"), (stat.S_ISFIFO, "a named pipe (FIFO)"),
                       (stat.S_ISCHR, "a character device"), (stat.S_ISBLK, "a block device"),
                       (stat.S_ISSOCK, "a socket")):
        if test(mode):
            return name
    return "not a regular file"


def resolve_target(path: str | os.PathLike[str], inputs: Iterable[str | os.PathLike[str]] = ()) -> Path:
    """The real file a write to ``path`` lands on, after every check that needs no writing.

    Raises StagewatchError when the target is not a regular file or is one of ``inputs``.
    """
    shown = str(path)
    real = Path(os.path.realpath(path))
    try:
        st: os.stat_result | None = os.stat(real)
    except FileNotFoundError:
        st = None
    except OSError as exc:
        raise StagewatchError(f"cannot write here: {exc.strerror}", file=shown) from None
    if st is not None and not stat.S_ISREG(st.st_mode):
        what = _kind(st.st_mode)
        hint = "a file name is needed here" if stat.S_ISDIR(st.st_mode) else (
            "stagewatch writes regular files only; use '-o -' for standard output where the command offers it")
        raise StagewatchError(f"this is {what}; {hint}", file=shown, expected="a path to a regular file")
    for source in inputs:
        if source is None or str(source) == STDOUT:
            continue
        if _same_file(real, st, source):
            raise StagewatchError(f"this is also an input of this command ({source}); writing here would replace "
                                  "it", file=shown, expected="an output path different from every input")
    return real


def _same_file(real: Path, st: os.stat_result | None, source: str | os.PathLike[str]) -> bool:
    if Path(os.path.realpath(source)) == real:
        return True
    if st is None:
        return False
    try:
        other = os.stat(source)
    except OSError:
        return False
    return (other.st_dev, other.st_ino) == (st.st_dev, st.st_ino)


@contextlib.contextmanager
def _signals_raise() -> Iterator[None]:
    """While a temporary file exists, SIGTERM and SIGHUP raise (so ``finally`` removes it) instead of killing."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def handler(signum: int, _frame: object) -> None:
        raise KeyboardInterrupt(f"signal {signum}")

    previous = {}
    for sig in (signal.SIGTERM, signal.SIGHUP):
        try:
            previous[sig] = signal.signal(sig, handler)
        except (ValueError, OSError):  # pragma: no cover - not settable here
            pass
    try:
        yield
    finally:
        for sig, old in previous.items():
            signal.signal(sig, old)


@contextlib.contextmanager
def locked(path: str | os.PathLike[str], timeout: float = LOCK_TIMEOUT_S) -> Iterator[None]:
    """An advisory lock (``fcntl.flock``) for replacing the file at ``path``.

    The lock is taken on the directory that holds the real file: the file itself is replaced by a rename on every
    write (a lock on its old inode would not keep a second writer out), and a lock file beside it would litter the
    repository the plan lives in. Every stagewatch command that replaces a file it read takes this lock around
    "check that it has not changed, then rename", so two of them cannot interleave.
    """
    directory = Path(os.path.realpath(path)).parent
    try:
        fd = os.open(directory, os.O_RDONLY)
    except OSError:  # an unreadable directory: the content check below still guards the write
        yield
        return
    try:
        deadline = time.monotonic() + timeout
        while True:
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
                break
            except OSError as exc:
                if exc.errno not in (errno.EAGAIN, errno.EACCES, errno.EWOULDBLOCK):
                    break  # locks unsupported here (some network file systems): rely on the content check
                if time.monotonic() > deadline:
                    raise StagewatchError(f"another stagewatch command has held the lock on {directory} for "
                                          f"{timeout:g} s; nothing was written", file=str(path)) from None
                time.sleep(0.05)
        yield
    finally:
        os.close(fd)  # closing releases the lock


def _check_unchanged(real: Path, shown: str, expected: Snapshot) -> None:
    now = Snapshot.take(real)
    if now.digest != expected.digest:
        change = "was created" if expected.digest is None else (
            "was removed" if now.digest is None else "changed")
        raise StagewatchError(f"this file {change} after stagewatch read it (another command or an editor saved "
                              "it meanwhile); nothing was written, so no one's changes are lost",
                              file=shown, expected="run the command again on the current file")


def safe_write(path: str | os.PathLike[str], text: str, *, inputs: Iterable[str | os.PathLike[str]] = (),
               expected: Snapshot | None = None) -> Path | None:
    """Write ``text`` to ``path`` safely (see the module docstring); returns the real path written, or None for
    standard output.

    >>> safe_write("-", "hello\\n")  # doctest: +SKIP
    """
    if str(path) == STDOUT:
        sys.stdout.write(text)
        sys.stdout.flush()
        return None
    real = _write(path, text, inputs, expected)
    _sync_directories([real.parent])
    return real


def _write(path: str | os.PathLike[str], text: str, inputs: Iterable[str | os.PathLike[str]],
           expected: Snapshot | None, sweep: bool = True) -> Path:
    """The atomic replace of one file, without the directory sync (the caller does it once per directory)."""
    shown = str(path)
    real = resolve_target(path, inputs)
    try:
        real.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise StagewatchError(f"cannot create the directory {real.parent}: {exc.strerror}", file=shown) from None
    data = text.encode("utf-8")
    with contextlib.ExitStack() as stack:
        if expected is not None:
            stack.enter_context(locked(real))
            _check_unchanged(real, shown, expected)
        stack.enter_context(_signals_raise())
        _replace(real, shown, data, sweep)
    return real


def _sync_directories(directories: Iterable[Path]) -> None:
    """One fsync per directory after the renames into it: the new names (and, on journalling file systems, the
    data the renames committed) reach the disk together, instead of one fsync per file before its rename."""
    for directory in dict.fromkeys(directories):
        try:
            fd = os.open(directory, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
        except OSError:  # a directory that cannot be opened for reading cannot be synced either
            continue
        try:
            with contextlib.suppress(OSError):  # some file systems refuse fsync on a directory
                os.fsync(fd)
        finally:
            os.close(fd)


STALE_TEMP_S = 3600.0  # a temporary file this old was left by a write killed with SIGKILL


def _sweep(targets: Iterable[Path]) -> None:
    """Remove temporary files that a killed write of these same targets left behind (SIGKILL cannot be caught);
    each directory is listed once, however many of its files are written."""
    now = time.time()
    by_directory: dict[Path, set[str]] = {}
    for real in targets:
        by_directory.setdefault(real.parent, set()).add(real.name)
    for directory, names in by_directory.items():
        with contextlib.suppress(OSError):
            for entry in os.scandir(directory):
                if not (entry.name.startswith(".") and entry.name.endswith(".tmp")):
                    continue
                if entry.name[1:].rsplit(".", 2)[0] not in names:
                    continue
                with contextlib.suppress(OSError):
                    if (now - entry.stat(follow_symlinks=False).st_mtime > STALE_TEMP_S
                            and entry.is_file(follow_symlinks=False)):
                        os.unlink(entry.path)


def _replace(real: Path, shown: str, data: bytes, sweep: bool = True) -> None:
    if sweep:
        _sweep([real])
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{real.name}.", suffix=".tmp", dir=real.parent)
    except OSError as exc:
        raise StagewatchError(f"cannot write here: {exc.strerror}", file=shown) from None
    try:
        try:
            with os.fdopen(fd, "wb") as handle:
                handle.write(data)
            try:
                mode = os.stat(real).st_mode & 0o777
            except FileNotFoundError:
                umask = os.umask(0)
                os.umask(umask)
                mode = 0o666 & ~umask
            os.chmod(tmp, mode)
            resolve_target(real)  # it may have become a FIFO or a directory while we wrote
            os.replace(tmp, real)
        except OSError as exc:
            raise StagewatchError(f"cannot write here: {exc.strerror}", file=shown) from None
    finally:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)


def safe_write_all(files: dict[Path, str], *, inputs: Iterable[str | os.PathLike[str]] = ()) -> None:
    """Write several files (an export): every target is checked before the first one is written."""
    sources = list(inputs)
    targets = [resolve_target(path, sources) for path in files]
    if len(set(targets)) != len(targets):  # two outputs through symlinks onto one file
        raise StagewatchError("two of the files to write are the same file (through a symbolic link)",
                              file=str(next(iter(files))).rsplit("/", 1)[0])
    _sweep(targets)
    written = [_write(path, text, sources, None, sweep=False) for path, text in files.items()]
    _sync_directories(real.parent for real in written)
