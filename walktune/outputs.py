"""Output folders hold one run's files at a time.

A folder is held by one process at a time: an advisory lock (``flock``) on the
folder, taken before anything is written into it and released when the
process lets it go or ends, however it ends. Within a process the lock is
counted, so the command line, the checkpoint and the writers below may each
take it.

Results replace the folder's walktune files as a whole: the new files are
written into a temporary folder beside it, and only when every one is on disk
are the earlier run's walktune files moved out and the new ones moved in
(renames within one file system). The folder itself stays (its lock, and any
file of the user's, stay with it), so a reader never finds one run's advice
beside another run's draws or report.
"""

from __future__ import annotations

import os
import shutil
import tempfile
from pathlib import Path

from .errors import WalktuneError

#: Figures of the report (the names of ``walktune.report.FIGURES``; a test keeps them equal).
FIGURE_NAMES = ("traces", "pairs", "spectrum", "autocorrelation", "ess", "evaluations")
REPORT_FILES = ("report.html",) + tuple(f"{name}.png" for name in FIGURE_NAMES)
#: Files of a finished run (tune or inspect) and of its report.
RESULT_FILES = ("advice.json", "proposal_covariance.npy", "proposal_covariance.csv", "step_sizes.csv", "draws.npz",
                "recommended_proposal.npy", "recommended_proposal.csv",
                "sampling_map.json") + REPORT_FILES
#: Files of an interrupted or failed tuning run.
INTERRUPTED_FILES = ("checkpoint.npz", "partial-advice.json")
RUN_FILES = RESULT_FILES + INTERRUPTED_FILES

_held: dict = {}  # (device, inode) of a locked folder -> [file descriptor, holders in this process]


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


class FolderLock:
    """The lock on an output folder, created when missing.

    Parameters
    ----------
    folder : path
        The output folder.

    Use as a context manager, or call :meth:`acquire` and :meth:`release`.
    A folder created by :meth:`acquire` and still empty at :meth:`release` is
    removed again, so that input refused early leaves nothing behind.
    """

    def __init__(self, folder):
        self.folder = Path(folder)
        self._key = None
        self._created = False

    def acquire(self) -> "FolderLock":
        if self._key is not None:
            return self
        if self.folder.exists() and not self.folder.is_dir():
            raise WalktuneError(f"output path {self.folder} exists and is not a folder; choose another --out.")
        if not self.folder.exists():
            self.folder.mkdir(parents=True)
            self._created = True
        fd = os.open(self.folder, os.O_RDONLY)
        stat = os.fstat(fd)
        key = (stat.st_dev, stat.st_ino)
        if key in _held:
            os.close(fd)
            _held[key][1] += 1
        else:
            try:
                import fcntl
            except ImportError:  # not on POSIX: no lock
                fcntl = None
            if fcntl is not None:
                try:
                    fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
                except BlockingIOError:
                    os.close(fd)
                    raise WalktuneError(
                        f"another walktune run is using {self.folder}; wait for it to finish or stop it first."
                    ) from None
            _held[key] = [fd, 1]
            _clear_leftovers(self.folder)
        self._key = key
        return self

    def release(self) -> None:
        if self._key is None:
            return
        key, self._key = self._key, None
        entry = _held.get(key)
        if entry is not None:
            entry[1] -= 1
            if entry[1] <= 0:
                del _held[key]
                os.close(entry[0])
        if self._created:
            self._created = False
            try:
                self.folder.rmdir()  # only when empty: nothing was written
            except OSError:
                pass

    def __enter__(self) -> "FolderLock":
        return self.acquire()

    def __exit__(self, *exc) -> None:
        self.release()


def _clear_leftovers(folder: Path) -> None:
    """Temporary files and folders that an exit in the middle of a write left behind (the lock is ours)."""
    for name in RUN_FILES:
        for stale in folder.glob(f".{name}.*.tmp"):
            stale.unlink(missing_ok=True)
    for stale in folder.parent.glob(f".{folder.name}.walktune-*"):
        if stale.is_dir():
            shutil.rmtree(stale, ignore_errors=True)


def walktune_files(folder, names=RUN_FILES) -> list:
    """The walktune files (of ``names``) present in ``folder``."""
    folder = Path(folder)
    return [name for name in names if (folder / name).exists()]


def check_free(folder, *, overwrite: bool, names=RUN_FILES) -> None:
    """Refuse a folder holding another run's files (of ``names``) unless ``overwrite`` (call with the lock held)."""
    present = walktune_files(folder, names)
    if present and not overwrite:
        shown = ", ".join(present[:3]) + (", ..." if len(present) > 3 else "")
        raise WalktuneError(
            f"{folder} holds the files of another run ({shown}); give --overwrite to replace them as a whole, "
            "or choose another --out."
        )


def replace_files(folder, files: dict, replaced=RUN_FILES) -> Path:
    """Write ``files`` (name -> bytes) into ``folder``, replacing its walktune files of ``replaced`` as a whole.

    Every new file is written and flushed in a temporary folder beside
    ``folder`` first; then the earlier files of ``replaced`` are moved out and
    the new ones moved in. Takes the folder's lock for the duration.
    """
    folder = Path(folder)
    with FolderLock(folder):
        parent = folder.parent if str(folder.parent) else Path(".")
        staging = Path(tempfile.mkdtemp(prefix=f".{folder.name}.walktune-new.", dir=parent))
        old = None
        try:
            mode = 0o666 & ~_umask()
            for name, data in files.items():
                with open(staging / name, "wb") as handle:
                    handle.write(data)
                    handle.flush()
                    os.fsync(handle.fileno())
                os.chmod(staging / name, mode)
            old = Path(tempfile.mkdtemp(prefix=f".{folder.name}.walktune-old.", dir=parent))
            for name in walktune_files(folder, replaced):
                os.replace(folder / name, old / name)
            for name in files:
                os.replace(staging / name, folder / name)
        finally:
            shutil.rmtree(staging, ignore_errors=True)
            if old is not None:
                shutil.rmtree(old, ignore_errors=True)
    return folder
