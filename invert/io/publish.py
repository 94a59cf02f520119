"""An output folder: one run at a time, and the finished set of outputs published at once.

:class:`OutputLock` makes a run the only writer of its output folder: a lock file
``OUT/.rim-invert.lock`` holding the owner's pid and host, created with
``O_CREAT | O_EXCL`` (atomic: of two runs exactly one creates it). A second run refuses with
one line naming the folder and the pid; a lock left by a run that died (its pid no longer alive
on this host) is taken over with a note. The lock file also carries an ``flock`` of its holder,
so that two runs taking over the same stale lock cannot both win.

:func:`publish` writes nothing into the output folder itself: the caller fills a staging folder
made by :func:`staging_folder` beside it (same parent, so the same file system) with the
complete set (frames, query, summary.json), and :func:`publish` swaps the two folders with one
``renameat2(RENAME_EXCHANGE)`` (Linux), so that at every instant ``OUT`` holds either the
complete old set or the complete new set. Where the exchange is not available (not Linux)
the swap falls back to two renames, with a short window in which ``OUT`` is missing. Staging
folders of killed runs are removed at the start of the next run on
the same folder (:func:`clean_stale_staging`; only names of this module's pattern, and only
while the lock is held).

Used by ``rim-invert batch`` (:mod:`invert.batch.runner`) and by ``fit``, ``demo`` and
``advise`` (:func:`invert.report.files.staged_output`), each with its own ``command`` name in
the staging folders. The output folder may hold only what the tool writes (:data:`OWN_NAMES`,
:data:`FIT_NAMES`): a folder with other files is refused at the start, since the swap replaces
the folder as a whole.
"""

from __future__ import annotations

import ctypes
import errno
import os
import re
import shutil
import socket
from pathlib import Path

from ..errors import InputError

__all__ = ["LOCK_NAME", "OWN_NAMES", "FIT_NAMES", "OutputLock", "staging_folder", "publish",
           "clean_stale_staging", "check_own_folder", "check_output_path", "discard_work"]

#: Lock file inside the output folder.
LOCK_NAME = ".rim-invert.lock"
#: Names batch writes into its output folder (anything else there is refused).
OWN_NAMES = frozenset({"frames.csv", "frames.parquet", "query.csv", "query.parquet",
                       "results.nc", "report.html", "summary.json", ".batch-work", LOCK_NAME})
#: Names fit, demo and advise write into their output folder (figures are ``*.png``).
FIT_NAMES = frozenset({"summary.json", "boundary.csv", "query.csv", "field.csv", "report.html",
                       "sensors.csv", "posterior.nc", "candidates.csv", "repair.csv",
                       "advice.json", LOCK_NAME})
#: Temporary files of the atomic writers (invert.io.writers): ``.NAME.tmp-PID``.
_OWN_TMP = re.compile(r"^\.(frames|query|summary)\.\w+\.tmp-\d+$")
_STAGING = ".{name}.{command}-staging-"
#: Staging folders of fit before it published by folder exchange (cleaned like the others).
_LEGACY_FIT_STAGING = ".{name}.staging-"
_RENAME_EXCHANGE = 2   # linux/fs.h
_AT_FDCWD = -100       # linux/fcntl.h


def _alive(pid):
    """Whether process ``pid`` exists on this host (signal 0 checks without sending)."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # it exists, owned by someone else
        return True
    return True


class OutputLock:
    """Exclusive use of an output folder by one run (a context manager).

    Parameters
    ----------
    out : str or Path
        The output folder (created when missing).

    Attributes
    ----------
    note : str or None
        Set when a stale lock (of a run that died) was taken over; the run reports it.

    Raises
    ------
    InputError
        When another live run holds the folder (``OUT: another batch run (pid N on HOST) is
        writing into this folder ...``).
    """

    def __init__(self, out):
        self.out = Path(out)
        self.path = self.out / LOCK_NAME
        self.note = None
        self._fd = None
        self._text = f"{os.getpid()} {socket.gethostname()}\n"

    def __enter__(self):
        self.acquire()
        return self

    def __exit__(self, *exc):
        self.release()

    def _busy(self, pid, host):
        who = f"pid {pid} on {host}" if pid is not None else "a run starting now"
        return InputError(str(self.out), f"another rim-invert run ({who}) is writing into "
                          f"this folder; wait for it to finish or choose another --out")

    def acquire(self):
        """Create the lock file, or take over a stale one; raise when the folder is busy."""
        import fcntl

        try:
            self.out.mkdir(parents=True, exist_ok=True)
        except OSError as exc:  # under a file, read-only parent, ...
            raise InputError(str(self.out), f"the output folder cannot be created "
                             f"({exc.strerror or exc.__class__.__name__})") from None
        for _ in range(5):
            try:
                fd = os.open(self.path, os.O_CREAT | os.O_EXCL | os.O_RDWR, 0o644)
            except FileExistsError:
                if self._take_over():
                    return
                continue
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except OSError:  # another run judged it stale in the instant before: it won
                os.close(fd)
                pid, host = self._read()
                raise self._busy(pid, host) from None
            os.write(fd, self._text.encode())
            self._fd = fd
            return
        pid, host = self._read()
        raise self._busy(pid, host)

    def _read(self):
        try:
            parts = self.path.read_text().split()
            return int(parts[0]), parts[1]
        except (OSError, ValueError, IndexError):
            return None, None

    def _take_over(self):
        """Take over the existing lock file if its owner is gone; True when taken."""
        import fcntl

        try:
            fd = os.open(self.path, os.O_RDWR)
        except FileNotFoundError:
            return False  # released meanwhile: try to create it again
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            os.close(fd)
            pid, host = self._read()
            raise self._busy(pid, host) from None
        try:
            if os.fstat(fd).st_ino != os.stat(self.path).st_ino:
                os.close(fd)
                return False  # replaced meanwhile
        except FileNotFoundError:
            os.close(fd)
            return False
        pid, host = self._read()
        here = socket.gethostname()
        if pid is not None and (host != here or _alive(pid)):
            os.close(fd)
            raise self._busy(pid, host)
        # the owner died (pid gone on this host), or died while creating the file (empty)
        os.ftruncate(fd, 0)
        os.pwrite(fd, self._text.encode(), 0)
        self._fd = fd
        self.note = (f"{self.out}: took over the lock of an earlier run (pid {pid} on {host}) "
                     f"that is no longer running" if pid is not None else
                     f"{self.out}: took over an empty lock file of an earlier run")
        return True

    def release(self):
        """Remove the lock file (when it is still this run's) and drop the flock."""
        if self._fd is None:
            return
        try:
            pid, host = self._read()
            if pid == os.getpid() and host == socket.gethostname():
                os.remove(self.path)
        except FileNotFoundError:
            pass
        finally:
            os.close(self._fd)
            self._fd = None


def check_own_folder(out, command="batch"):
    """Refuse an output folder holding files ``command`` did not write (the swap replaces it).

    ``command`` is ``"batch"`` (names :data:`OWN_NAMES`) or ``"fit"`` (fit, demo and advise:
    :data:`FIT_NAMES` and figures ``*.png``).

    Raises
    ------
    InputError
        Naming the folder and one foreign entry; also when ``out`` exists but is a file.
    """
    out = Path(out)
    if out.exists() and not out.is_dir():
        raise InputError(str(out), "is a file, not a folder: give a folder for the outputs")
    if not out.is_dir():
        return

    def own(name):
        if command == "batch":
            return name in OWN_NAMES or _OWN_TMP.match(name)
        return name in FIT_NAMES or (name.endswith(".png") and "/" not in name)

    foreign = sorted(p.name for p in out.iterdir() if not own(p.name))
    if foreign:
        what = "batch" if command == "batch" else "rim-invert fit, demo or advise"
        raise InputError(str(out), f"holds files that {what} did not write (e.g. "
                         f"'{foreign[0]}'); the finished outputs replace the folder as a "
                         f"whole: give a new or empty folder, or one written by {what}")


def staging_folder(out, command="batch"):
    """Make a new staging folder beside ``out`` (same parent, so the same file system)."""
    import tempfile

    out = Path(out)
    prefix = _STAGING.format(name=out.name, command=command) + f"{os.getpid()}-"
    return Path(tempfile.mkdtemp(prefix=prefix, dir=out.parent))


def _exchange(a, b):
    """Swap two paths atomically (Linux ``renameat2(RENAME_EXCHANGE)``); False if unsupported."""
    try:
        fn = ctypes.CDLL(None, use_errno=True).renameat2
    except (AttributeError, OSError):
        return False
    r = fn(_AT_FDCWD, os.fsencode(a), _AT_FDCWD, os.fsencode(b), _RENAME_EXCHANGE)
    if r == 0:
        return True
    err = ctypes.get_errno()
    if err in (errno.ENOSYS, errno.EINVAL, errno.ENOTSUP, errno.EOPNOTSUPP):
        return False
    raise OSError(err, os.strerror(err), str(a))


def publish(stage, out, lock=None):
    """Swap the complete new set in ``stage`` in as ``out``; delete the old set.

    Parameters
    ----------
    stage : Path
        Staging folder from :func:`staging_folder`, holding the complete new set.
    out : Path
        The output folder (it holds the run's lock file and working folder).
    lock : OutputLock, optional
        The run's lock: a copy of it goes into ``stage`` first, so that the folder is locked
        at every instant, before and after the swap.
    """
    stage, out = Path(stage), Path(out)
    if lock is not None and lock.path.exists():
        shutil.copyfile(lock.path, stage / LOCK_NAME)
    if out.exists():
        if not _exchange(stage, out):
            # two renames (a short window without `out`)
            old = Path(str(stage) + "-old")
            os.rename(out, old)
            os.rename(stage, out)
            stage = old
        shutil.rmtree(stage, ignore_errors=True)  # now the old set
    else:
        os.rename(stage, out)


def clean_stale_staging(out, command="batch"):
    """Remove staging folders of earlier killed runs on ``out`` (call with the lock held).

    Only folders of this module's name pattern for ``out`` and ``command`` are touched:
    ``.OUT.COMMAND-staging-PID-XXXX`` (and their ``-old`` form of the fallback swap), and for
    fit the ``.OUT.staging-XXXX`` folders of earlier versions. While this run holds the lock
    no other run can be using one, so every such folder is stale.
    """
    out = Path(out)
    if not out.parent.is_dir():
        return
    prefixes = [_STAGING.format(name=out.name, command=command)]
    if command == "fit":
        prefixes.append(_LEGACY_FIT_STAGING.format(name=out.name))
    for p in sorted(out.parent.iterdir()):
        if p.name.startswith(tuple(prefixes)) and p.is_dir() and not p.is_symlink():
            shutil.rmtree(p, ignore_errors=True)


def _nearest_existing(path):
    p = Path(os.path.abspath(path))
    while not p.exists():
        if p.parent == p:
            break
        p = p.parent
    return p


def check_output_path(out, command="batch"):
    """Check before any computation that ``out`` can be written, as :func:`publish` will.

    The outputs are staged beside ``out`` (in its parent, the same file system) and swapped
    in, so the parent must be a folder this process can write in (tried by making and
    removing a folder there), and ``out``, when it exists, a writable folder on the parent's
    file system holding only what ``command`` writes (:func:`check_own_folder`).

    Raises
    ------
    InputError
        One line naming the path: under a file, not writable (permissions, an immutable
        folder, a read-only file system), a mount point, or a folder holding foreign files.
    """
    out = Path(out)
    check_own_folder(out, command)
    base = _nearest_existing(out.parent)
    if not base.is_dir():
        raise InputError(str(out), f"cannot be created: '{base}' is a file, not a folder")
    why = _cannot_write(base)
    if why:
        raise InputError(str(out), f"cannot be written: nothing can be created in '{base}' "
                         f"({why}); choose another --out")
    if out.exists():
        why = _cannot_write(out)
        if why:
            raise InputError(str(out), f"cannot be written ({why}); choose another --out")
        if os.stat(out).st_dev != os.stat(out.parent).st_dev:
            raise InputError(str(out), "is a mount point (another file system than its "
                             "parent); the outputs replace the folder as a whole: give a "
                             "folder inside it")


def _cannot_write(folder):
    """Why nothing can be created in ``folder`` (None when a trial folder could be)."""
    import tempfile

    try:
        os.rmdir(tempfile.mkdtemp(prefix=".rim-invert-probe-", dir=folder))
    except OSError as exc:
        return exc.strerror or exc.__class__.__name__
    return None


def discard_work(out, work_name, *, fresh=False):
    """Remove the working folder a failed run left in ``out`` (under the lock).

    For a run stopped by bad input: its partial chunks could not be resumed into anything
    else, so nothing of it stays in ``out``. ``fresh``: ``out`` did not exist before the run,
    so it is removed too when nothing else is left in it. Nothing is touched while another
    run holds the folder.
    """
    out = Path(out)
    if not out.is_dir():
        return
    try:
        with OutputLock(out):
            shutil.rmtree(out / work_name, ignore_errors=True)
    except InputError:  # another run holds the folder now: leave it alone
        return
    if fresh:
        try:
            out.rmdir()  # only when empty
        except OSError:
            pass
