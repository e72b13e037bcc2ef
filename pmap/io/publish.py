"""The output directory as a transaction: check, lock, stage, publish atomically, recover.

A run's outputs are built in a hidden staging directory ``.<name>.partial-<id>`` beside the
output directory ``<name>`` and published in one step once complete.  The rules:

- **One run per directory.** A lock file ``.<name>.lock`` beside the directory is held
  (``fcntl.flock``; the kernel drops it when the process dies) from the up-front check to
  the publish; a second run is refused with :class:`~pmap.errors.OutputExistsError`.
- **Nothing pmap did not write is replaced.** A new directory is published with
  ``renameat2(RENAME_NOREPLACE)`` (portable fallback: ``rename``, which replaces at most an
  empty directory), so a directory that appears while the run works is left alone.  With
  ``overwrite``, an old output is replaced only when every file in it is listed in its
  ``manifest.json`` with the same SHA-256 (see :mod:`pmap.io.manifest`); this is checked
  before the work, again just before the swap and once more on the swapped-out copy.
- **Never without an output.** An old output is swapped for the new one with
  ``renameat2(RENAME_EXCHANGE)``, so there is no moment without either.  Where the system
  has no exchange, the old output is moved to ``.<name>.old-<id>`` first; if the run dies
  between the two renames, the next run restores it.
- **Recovery.** Under the lock, a run restores an orphaned ``.<name>.old-*`` when
  ``<name>`` is missing and deletes leftover ``.<name>.partial-*`` / ``.<name>.old-*``
  folders of interrupted runs, with a :class:`~pmap.errors.PmapWarning` saying so.
- **Write failures are output errors.** A failed write (``OSError``, GDAL ``CPLE_*``,
  pyogrio data-source errors) becomes :class:`~pmap.errors.OutputError` that says "no space
  left on device" when that is the cause, and names the file; the staging directory is
  removed and an old output stays as it was.
- An output path that is a symbolic link is followed: the outputs go into the directory it
  points to, staged beside that directory, and the link is kept.
"""

from __future__ import annotations

import contextlib
import ctypes
import errno
import os
import re
import shutil
import stat
import threading
import uuid
import warnings
import weakref
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field
from pathlib import Path

from pmap.errors import OutputError, OutputExistsError, PmapError, PmapWarning
from pmap.io.manifest import MANIFEST_NAME, read_manifest, sha256_file, write_manifest

try:  # POSIX
    import fcntl
except ImportError:  # pragma: no cover - Windows
    fcntl = None  # type: ignore[assignment]

__all__ = [
    "OutputCheck",
    "OutputTransaction",
    "open_transaction",
    "output_transaction",
    "verify_output",
    "lock_path",
    "resolve_output",
]

#: How many file names a refusal lists before it says "and N more".
_SHOW = 5
#: Bytes a failed GDAL/pyogrio write probes for, to tell a full disk from another failure.
_PROBE_BYTES = 8 << 20

_RENAME_NOREPLACE = 1  # <linux/fs.h>
_RENAME_EXCHANGE = 2
_AT_FDCWD = -100


def _load_renameat2():
    """The C library's ``renameat2`` through ctypes, or None where there is none."""
    if not hasattr(os, "uname") or os.uname().sysname != "Linux":
        return None
    try:
        func = ctypes.CDLL(None, use_errno=True).renameat2
    except (OSError, AttributeError):
        return None
    func.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p,
                     ctypes.c_uint]
    func.restype = ctypes.c_int
    return func


_renameat2 = _load_renameat2()


def _rename2(src: Path, dst: Path, flags: int) -> bool:
    """``renameat2(src, dst, flags)``; False where the system or file system lacks it."""
    if _renameat2 is None:
        return False
    if _renameat2(_AT_FDCWD, os.fsencode(src), _AT_FDCWD, os.fsencode(dst), flags) == 0:
        return True
    err = ctypes.get_errno()
    if err in (errno.ENOSYS, errno.EINVAL, errno.ENOTSUP, errno.EOPNOTSUPP):
        return False
    raise OSError(err, os.strerror(err), str(src), None, str(dst))


def _rename_noreplace(src: Path, dst: Path) -> None:
    """Rename ``src`` to ``dst``; raise FileExistsError if ``dst`` exists.

    The fallback without ``RENAME_NOREPLACE`` is a plain rename after a check: POSIX
    ``rename`` of a directory replaces at most an *empty* directory and fails on anything
    else, Windows' fails on anything that exists, so nothing with content is ever lost.
    """
    if _rename2(src, dst, _RENAME_NOREPLACE):
        return
    if os.path.lexists(dst):
        raise FileExistsError(errno.EEXIST, os.strerror(errno.EEXIST), str(dst))
    os.rename(src, dst)


def _exchange(a: Path, b: Path) -> bool:
    """Swap two paths atomically; False where the system cannot (the caller falls back)."""
    return _rename2(a, b, _RENAME_EXCHANGE)


def resolve_output(out_dir: str | Path) -> Path:
    """The real directory the outputs go to: ``out_dir`` with every symbolic link followed."""
    return Path(os.path.realpath(os.fspath(out_dir)))


def lock_path(target: Path) -> Path:
    """The lock file of a (resolved) output directory: ``.<name>.lock`` beside it."""
    return target.parent / f".{target.name}.lock"


# ---------------------------------------------------------------------------------------
# Checking an old output against its manifest


@dataclass(frozen=True)
class OutputCheck:
    """What an existing output directory holds beyond what its manifest vouches for.

    Attributes
    ----------
    manifest : bool
        The directory has a readable pmap ``manifest.json``.
    unknown : list of str
        Relative paths of files (and links) the manifest does not list.
    changed : list of str
        Relative paths of listed files whose size or SHA-256 differs from the manifest.
    """

    manifest: bool
    unknown: list[str] = field(default_factory=list)
    changed: list[str] = field(default_factory=list)

    @property
    def replaceable(self) -> bool:
        """True when replacing the directory loses nothing pmap did not write."""
        return self.manifest and not self.unknown and not self.changed


def _entries(directory: Path) -> Iterator[tuple[str, Path, os.stat_result]]:
    """Every non-directory entry under ``directory`` (links not followed), sorted."""
    for root, dirs, files in os.walk(directory, followlinks=False):
        dirs.sort()
        for name in sorted(files + [d for d in dirs if os.path.islink(os.path.join(root, d))]):
            path = Path(root) / name
            yield path.relative_to(directory).as_posix(), path, os.lstat(path)


def verify_output(directory: str | Path) -> OutputCheck:
    """Compare an output directory with its ``manifest.json``.

    Every file except the manifest must be listed with its size and SHA-256; empty
    subdirectories hold nothing and are ignored; symbolic links and special files count
    as unknown.  A directory without a readable manifest has every file unknown.
    """
    directory = Path(directory)
    try:
        manifest = read_manifest(directory)
    except OutputError:
        manifest = None
    listed = manifest["files"] if manifest is not None else {}
    unknown, changed = [], []
    for rel, path, st in _entries(directory):
        if rel == MANIFEST_NAME and manifest is not None:
            continue
        record = listed.get(rel)
        if record is None or not stat.S_ISREG(st.st_mode):
            unknown.append(rel)
        elif st.st_size != record["bytes"] or sha256_file(path) != record["sha256"]:
            changed.append(rel)
    return OutputCheck(manifest is not None, unknown, changed)


def _listing(check: OutputCheck) -> str:
    """``"N file(s): a (changed since pmap wrote it), b (not written by pmap) and K more"``."""
    items = ([f"{p} (changed since pmap wrote it)" for p in check.changed]
             + [f"{p} (not written by pmap)" for p in check.unknown])
    text = ", ".join(items[:_SHOW])
    if len(items) > _SHOW:
        text += f" and {len(items) - _SHOW} more"
    return f"{len(items)} file(s): {text}"


def _refusal(shown: str, check: OutputCheck, when: str = "") -> OutputExistsError:
    """The refusal to replace a directory whose files a manifest does not all vouch for."""
    if check.manifest:
        reason = "holds files pmap did not write or that changed since"
    else:
        reason = ("has no pmap manifest.json, so it is not a pmap output (or one written "
                  "before pmap kept manifests)")
    return OutputExistsError(
        f"output directory {shown}{when} {reason}: {_listing(check)}; --overwrite replaces "
        "only a pmap output whose manifest.json lists every file unchanged: move those "
        f"files out of {shown} or choose another directory"
    )


# ---------------------------------------------------------------------------------------
# The lock


class _Held(Exception):
    """The lock file is locked by someone else."""


@dataclass
class _LockState:
    """What a transaction owns; kept apart from it so a finaliser can release it."""

    lock: Path
    fd: int | None = None
    owner: threading.Thread = field(default_factory=threading.current_thread)
    staging: Path | None = None
    created: list[Path] = field(default_factory=list)  # parents made for the output
    published: bool = False


#: Locks this process holds, by lock path: flock treats two descriptors of one process
#: as two owners, so a lock left by an abandoned transaction must be found here.
_HELD: dict[str, _LockState] = {}
_HELD_GUARD = threading.RLock()


def _acquire(state: _LockState) -> None:
    key = str(state.lock)
    with _HELD_GUARD:
        other = _HELD.get(key)
        if other is not None:
            if other.owner is not threading.current_thread() and other.owner.is_alive():
                raise _Held(f"another thread of this process (pid {os.getpid()})")
            # Left by an earlier run in this thread that failed before publishing.
            _release(other)
        while True:
            fd = os.open(state.lock, os.O_RDWR | os.O_CREAT, 0o644)
            try:
                _lock_fd(fd)
            except _Held:
                holder = _read_holder(fd)
                os.close(fd)
                raise _Held(holder) from None
            except BaseException:
                os.close(fd)
                raise
            # The holder before us may have removed the file as it let go; retry then.
            try:
                same = os.path.samestat(os.fstat(fd), os.stat(state.lock))
            except FileNotFoundError:
                same = False
            if same:
                break
            os.close(fd)
        with contextlib.suppress(OSError):  # the holder's pid, for messages; may fail if full
            os.ftruncate(fd, 0)
            os.write(fd, f"{os.getpid()}\n".encode())
        state.fd = fd
        _HELD[key] = state


def _lock_fd(fd: int) -> None:
    if fcntl is not None:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except (BlockingIOError, PermissionError):
            raise _Held("") from None
        return
    import msvcrt  # pragma: no cover - Windows

    try:  # pragma: no cover - Windows
        msvcrt.locking(fd, msvcrt.LK_NBLCK, 1)
    except OSError:  # pragma: no cover - Windows
        raise _Held("") from None


def _read_holder(fd: int) -> str:
    with contextlib.suppress(OSError, ValueError, AttributeError):
        pid = int(os.pread(fd, 32, 0).decode().strip() or "0")
        if pid:
            return f"pid {pid}"
    return ""


def _release(state: _LockState) -> None:
    """Remove the staging directory (unless published), unused new parents, and the lock."""
    if state.staging is not None and not state.published:
        shutil.rmtree(state.staging, ignore_errors=True)
    state.staging = None
    if state.fd is not None:
        with _HELD_GUARD:
            if _HELD.get(str(state.lock)) is state:
                del _HELD[str(state.lock)]
        if fcntl is not None:  # remove while still holding it: a waiter re-checks the inode
            with contextlib.suppress(OSError):
                os.unlink(state.lock)
        os.close(state.fd)
        state.fd = None
        if fcntl is None:  # pragma: no cover - Windows cannot remove an open file
            with contextlib.suppress(OSError):
                os.unlink(state.lock)
    if not state.published:
        for parent in reversed(state.created):  # deepest first; only if still empty
            with contextlib.suppress(OSError):
                parent.rmdir()
    state.created = []


# ---------------------------------------------------------------------------------------
# The transaction


class OutputTransaction:
    """An output directory being written by one run; see the module docstring.

    Made by :func:`open_transaction` (or :func:`output_transaction`), which checks the
    directory and takes the lock.  :attr:`staging` is the directory to write into;
    :meth:`publish` puts it in place, :meth:`abort` throws it away.  Either releases the
    lock; so does closing the transaction, leaving its ``with`` block, or the transaction
    being garbage-collected or the process ending.
    """

    def __init__(self, out_dir: Path, target: Path, overwrite: bool, state: _LockState):
        self.out_dir = out_dir
        self.target = target
        self.overwrite = overwrite
        self._state = state
        self._found = "absent"  # what the output path held when the run began
        self._finalizer = weakref.finalize(self, _release, state)

    @property
    def shown(self) -> str:
        """The output path as the user gave it (and where it points, if a link)."""
        if Path(os.path.abspath(self.out_dir)) != self.target:
            return f"{self.out_dir} (-> {self.target})"
        return str(self.out_dir)

    @property
    def open(self) -> bool:
        """True until the transaction is published or aborted."""
        return self._state.fd is not None

    @property
    def staging(self) -> Path:
        """The hidden directory to write the outputs into, made on first use."""
        if not self.open:
            raise OutputError(f"the output transaction of {self.shown} is closed; start a "
                              "new run")
        if self._state.staging is None:
            path = self.target.parent / f".{self.target.name}.partial-{uuid.uuid4().hex[:8]}"
            try:
                path.mkdir()
            except OSError as exc:
                raise self._as_output_error(exc) from exc
            self._state.staging = path
        return self._state.staging

    def publish(self) -> None:
        """Put the complete staging directory in place of the output directory.

        The staging directory must match its ``manifest.json`` (one with just
        ``pmap_version`` is written if the writer wrote none).  The output directory is
        checked again under the lock: a directory that appeared, or an old output that
        gained or changed files since the run began, is left untouched and the run is
        refused.

        Raises
        ------
        OutputExistsError
            The output directory may not be replaced (the new outputs are discarded).
        OutputError
            The outputs cannot be moved into place.
        """
        staging = self.staging
        try:
            if not (staging / MANIFEST_NAME).exists():
                from pmap._version import __version__

                write_manifest(staging, {"pmap_version": __version__})
            own = verify_output(staging)
            if not own.replaceable:
                raise OutputError(f"pmap wrote files into {self.shown} after its manifest: "
                                  f"{_listing(own)}; this is a bug in pmap, please report it")
            self._swap_in(staging)
        except BaseException as exc:
            self.fail(exc)
            raise
        finally:
            self.close()

    def _swap_in(self, staging: Path) -> None:
        when = (" (which appeared while pmap was running)" if self._found == "absent"
                else " (changed while pmap was running)")
        state = self._target_state(when)
        if state == "absent":
            try:
                _rename_noreplace(staging, self.target)
            except OSError as exc:
                if exc.errno not in (errno.EEXIST, errno.ENOTEMPTY, errno.ENOTDIR):
                    raise
                state = self._target_state(" (which appeared while pmap was publishing)")
                if state == "absent":  # gone again: give up rather than loop
                    raise OutputError(f"cannot publish the outputs to {self.shown}: the "
                                      "directory keeps changing; try again") from exc
            else:
                self._state.published = True
                return
        when = " (changed while pmap was publishing)"
        if _exchange(staging, self.target):
            # The previous output now sits at the staging name: check it once more.
            try:
                check = verify_output(staging) if state == "replace" else _empty_check(staging)
            except BaseException:
                self._swap_back(staging)
                raise
            if not check.replaceable:  # someone wrote into it just now: put it back
                self._swap_back(staging)
                raise _refusal(self.shown, check, when)
            self._state.published = True
            self._remove_old(staging)
            return
        # No atomic exchange here: move the old output aside, then the new one in.
        old = self.target.parent / f".{self.target.name}.old-{uuid.uuid4().hex[:8]}"
        os.rename(self.target, old)
        try:
            check = verify_output(old) if state == "replace" else _empty_check(old)
            if not check.replaceable:
                raise _refusal(self.shown, check, when)
            os.rename(staging, self.target)
        except BaseException:
            if not os.path.lexists(self.target):
                os.rename(old, self.target)
            raise
        self._state.published = True
        self._remove_old(old)

    def _swap_back(self, staging: Path) -> None:
        """Undo an exchange: the previous output back in place, the new one at ``staging``."""
        try:
            _exchange(staging, self.target)
        except BaseException as exc:
            self._state.published = True  # never delete the staging path: it holds the old output
            raise OutputError(f"cannot put the previous output of {self.shown} back ({exc}): "
                              f"it is in {staging}; move it back by hand") from exc

    def _remove_old(self, old: Path) -> None:
        shutil.rmtree(old, ignore_errors=True)
        if os.path.lexists(old):
            warnings.warn(f"the previous output of {self.shown} could not be removed from "
                          f"{old}; the next run removes it", PmapWarning, stacklevel=4)

    def _target_state(self, when: str = "") -> str:
        """``"absent"``, ``"empty"`` or ``"replace"``; raise if the target may not be replaced.

        ``when`` (e.g. ``" (changed while pmap was running)"``) follows the path in messages.
        """
        try:
            st = os.lstat(self.target)
        except FileNotFoundError:
            return "absent"
        if not stat.S_ISDIR(st.st_mode):
            raise OutputExistsError(f"output path {self.shown}{when} exists and is not a "
                                    "directory; choose another path")
        if _empty_check(self.target).replaceable:
            return "empty"
        if not self.overwrite:
            raise OutputExistsError(
                f"output directory {self.shown}{when} exists and is not empty; choose another "
                "directory or pass --overwrite (overwrite=True) to replace a previous pmap output"
            )
        check = verify_output(self.target)
        if not check.replaceable:
            raise _refusal(self.shown, check, when)
        return "replace"

    def abort(self) -> None:
        """Throw the staging directory away and release the lock (nothing is published)."""
        self.close()

    def close(self) -> None:
        """Release the lock; the staging directory is removed unless it was published."""
        self._finalizer()

    def fail(self, exc: BaseException) -> None:
        """Clean up after ``exc`` ended the writing; raise it as OutputError if it was a write.

        Call from an ``except`` block and re-raise afterwards: when ``exc`` is a failed write
        (an ``OSError``, a GDAL ``CPLE_*`` error from rasterio, a pyogrio data-source or
        layer error) this raises :class:`~pmap.errors.OutputError` itself, chained to
        ``exc``, saying "no space left on device" when that is the cause.
        """
        error = self._as_output_error(exc)
        self.abort()
        if error is not None:
            raise error from exc

    def _as_output_error(self, exc: BaseException) -> OutputError | None:
        if isinstance(exc, PmapError) or not _is_write_failure(exc):
            return None
        staging = self._state.staging
        no_space = _says_no_space(exc)
        if not no_space and (exc.errno if isinstance(exc, OSError) else None) not in _OS_ERRNOS:
            no_space = _disk_is_full(staging or self.target.parent)
        where = _failed_file(exc, staging)
        cause = detail = _cause_text(exc)
        if no_space:
            cause = "no space left on device"
            if not any(word in detail.lower() for word in ("no space left", "quota exceeded")):
                cause += f" ({detail})"  # what the library said, e.g. GDAL's message
        return OutputError(
            f"cannot write the outputs to {self.shown}: {cause}"
            + (f" (writing {where})" if where else "")
            + ("; free some space or choose another directory" if no_space else
               "; check the directory's permissions and the disk, or choose another directory")
            + (f"; nothing was left at {self.out_dir}" if self._found == "absent" else
               f"; {self.out_dir} was left as it was")
        )

    def __enter__(self) -> OutputTransaction:
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        if exc is None:
            if self.open:
                self.publish()
            return
        self.fail(exc)

    def __repr__(self) -> str:
        return f"OutputTransaction({self.shown!r}, open={self.open})"


def _empty_check(directory: Path) -> OutputCheck:
    """An :class:`OutputCheck` that is replaceable only when ``directory`` holds no file."""
    return OutputCheck(True, [rel for rel, _, _ in _entries(directory)])


# ---------------------------------------------------------------------------------------
# Write failures


#: OS error numbers that say exactly what went wrong (no disk probe needed).
_OS_ERRNOS = {errno.EACCES, errno.EPERM, errno.EROFS, errno.ENOENT, errno.ENOTDIR,
              errno.EISDIR, errno.ENAMETOOLONG, errno.EEXIST}
_NO_SPACE_ERRNOS = {errno.ENOSPC, getattr(errno, "EDQUOT", errno.ENOSPC)}
_NO_SPACE_WORDS = ("no space left", "disk quota", "disk full", "not enough space",
                   "free disk space")


def _chain(exc: BaseException) -> Iterator[BaseException]:
    seen = 0
    while exc is not None and seen < 8:
        yield exc
        exc = exc.__cause__ or exc.__context__
        seen += 1


def _is_write_failure(exc: BaseException) -> bool:
    """An error of the file system or of a writing library (GDAL through rasterio, pyogrio)."""
    if isinstance(exc, OSError):
        return True
    kind, module = type(exc).__name__, type(exc).__module__
    if module.startswith("rasterio") and kind.startswith("CPLE_"):
        return True
    return module.startswith("pyogrio") and kind in (
        "DataSourceError", "DataLayerError", "FeatureError", "FieldError")


def _says_no_space(exc: BaseException) -> bool:
    for e in _chain(exc):
        if isinstance(e, OSError) and e.errno in _NO_SPACE_ERRNOS:
            return True
        if any(word in str(e).lower() for word in _NO_SPACE_WORDS):
            return True
    return False


def _disk_is_full(directory: Path) -> bool:
    """Whether ``_PROBE_BYTES`` more can be written in ``directory`` (GDAL hides ENOSPC)."""
    probe = directory / f".pmap-space-probe-{uuid.uuid4().hex[:8]}"
    try:
        fd = os.open(probe, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    except OSError as exc:
        return exc.errno in _NO_SPACE_ERRNOS
    try:
        if hasattr(os, "posix_fallocate"):
            os.posix_fallocate(fd, 0, _PROBE_BYTES)
        else:  # pragma: no cover - no posix_fallocate
            block = b"\0" * (1 << 20)
            for _ in range(_PROBE_BYTES // len(block)):
                os.write(fd, block)
        os.fsync(fd)
    except OSError as exc:
        return exc.errno in _NO_SPACE_ERRNOS
    finally:
        os.close(fd)
        with contextlib.suppress(OSError):
            os.unlink(probe)
    return False


def _failed_file(exc: BaseException, staging: Path | None) -> str:
    """The output file a write failed on, relative to the output directory, if known."""
    if staging is None:
        return ""
    root = str(staging)
    for e in _chain(exc):
        names = [getattr(e, "filename2", None), getattr(e, "filename", None)]
        names += re.findall(re.escape(root) + r"[^\s:'\"(),]*", str(e))
        for name in names:
            if name is None:
                continue
            name = os.fspath(name)
            if name.startswith(root + os.sep):
                # The writers build each file under a hidden temporary name (and folder):
                # show the name it was to have.
                parts = Path(name).relative_to(staging).parts
                real = [p for p in parts[:-1] if not p.startswith(".")]
                real.append(re.sub(r"^\.(.+?)\.[^.]+\.tmp(\.[^.]+)?$", r"\1", parts[-1]))
                return "/".join(real)
    return ""


def _cause_text(exc: BaseException) -> str:
    if isinstance(exc, OSError) and exc.strerror:
        return exc.strerror[:1].lower() + exc.strerror[1:]
    return " ".join(str(exc).split())[:300] or type(exc).__name__


# ---------------------------------------------------------------------------------------
# Opening


def _recover(target: Path, shown: str) -> None:
    """Under the lock: restore an orphaned old output, remove leftovers of dead runs."""
    pattern = re.compile(rf"^\.{re.escape(target.name)}\.(partial|old)-[0-9a-f]{{8}}$")
    try:
        names = os.listdir(target.parent)
    except OSError:
        return
    left = [target.parent / n for n in names if pattern.match(n)]
    left = [p for p in left if stat.S_ISDIR(os.lstat(p).st_mode)]
    olds = sorted((p for p in left if ".old-" in p.name), key=lambda p: os.lstat(p).st_mtime,
                  reverse=True)
    if olds and not os.path.lexists(target):
        os.rename(olds[0], target)
        left.remove(olds[0])
        warnings.warn(f"{shown}: restored the previous output from {olds[0].name}, where an "
                      "interrupted run had left it", PmapWarning, stacklevel=4)
    removed = []
    for path in left:
        if ".old-" in path.name and not verify_output(path).replaceable:
            warnings.warn(f"{shown}: kept {path.name}, a previous output an interrupted run "
                          "left, because it holds files pmap did not write; move them out and "
                          "delete it", PmapWarning, stacklevel=4)
            continue
        shutil.rmtree(path, ignore_errors=True)
        removed.append(path.name)
    if removed:
        warnings.warn(f"{shown}: removed {len(removed)} folder(s) left by interrupted runs: "
                      f"{', '.join(sorted(removed))}", PmapWarning, stacklevel=4)


def open_transaction(
    out_dir: str | Path, overwrite: bool = False, inputs: Iterable[str | Path] = ()
) -> OutputTransaction:
    """Check an output directory, lock it and recover after interrupted runs.

    Parameters
    ----------
    out_dir : path
        The output directory (a symbolic link is followed).  Missing parents are made;
        they are removed again if the run publishes nothing.
    overwrite : bool
        Allow replacing a previous pmap output (only files its manifest vouches for).
    inputs : paths
        The run's input files; a directory that holds one is never an output directory.

    Returns
    -------
    OutputTransaction
        Holding the lock until it is published, aborted or closed.

    Raises
    ------
    OutputExistsError
        Another run holds the directory, or it exists and may not be replaced.
    OutputError
        The directory cannot be created or written.
    """
    out_dir = Path(out_dir)
    target = resolve_output(out_dir)
    if os.path.exists(target) and not os.path.isdir(target):
        raise OutputExistsError(f"output path {out_dir} exists and is not a directory; "
                                "choose another path")
    for path in inputs:
        real = resolve_output(path)
        if target == real or target in real.parents:
            raise OutputExistsError(
                f"output directory {out_dir} holds the input {path}; write the outputs elsewhere"
            )
    existing = target.parent
    while not existing.exists():
        existing = existing.parent
    if not existing.is_dir() or not os.access(existing, os.W_OK | os.X_OK):
        raise OutputError(f"cannot create the output directory {out_dir}: {existing} is not a "
                          "writable directory")
    state = _LockState(lock_path(target))
    missing = []
    parent = target.parent
    while parent != existing:
        missing.append(parent)
        parent = parent.parent
    try:
        for parent in reversed(missing):
            parent.mkdir()
            state.created.append(parent)
        _acquire(state)
    except _Held as held:
        _release(state)
        who = f" ({held})" if str(held) else ""
        raise OutputExistsError(
            f"another pmap run{who} holds the output directory {out_dir} (lock "
            f"{state.lock.name}); wait for it to finish or choose another directory"
        ) from None
    except OSError as exc:
        _release(state)
        raise OutputError(f"cannot create the output directory {out_dir}: {exc}") from exc
    transaction = OutputTransaction(out_dir, target, overwrite, state)
    try:
        _recover(target, transaction.shown)
        transaction._found = transaction._target_state()
    except BaseException:
        transaction.close()
        raise
    return transaction


@contextlib.contextmanager
def output_transaction(
    out_dir: str | Path, overwrite: bool = False, inputs: Iterable[str | Path] = ()
) -> Iterator[Path]:
    """``with output_transaction(out, overwrite, inputs) as staging:`` write, then publish.

    Checks and locks as :func:`open_transaction`, yields the staging directory, publishes
    it when the block ends normally and throws it away when it raises (a failed write is
    raised as :class:`~pmap.errors.OutputError`).
    """
    with open_transaction(out_dir, overwrite, inputs) as transaction:
        yield transaction.staging
