"""Atomic file output: a crash never leaves a half-written file or folder.

Files are written to a temporary name in the same folder, flushed, and moved
into place with :func:`os.replace`, which is atomic on POSIX and Windows. A
whole output folder is first built under a temporary name and then moved.
"""

from __future__ import annotations

import csv
import io
import json
import os
import shutil
import tempfile
from pathlib import Path

import numpy as np


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def atomic_write_bytes(path: Path, data: bytes) -> None:
    path = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.chmod(tmp, 0o666 & ~_umask())  # mkstemp makes 0600; give the usual permissions
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def npy_bytes(array: np.ndarray) -> bytes:
    buffer = io.BytesIO()
    np.save(buffer, np.asarray(array))
    return buffer.getvalue()


def npz_bytes(arrays: dict) -> bytes:
    buffer = io.BytesIO()
    np.savez_compressed(buffer, **arrays)
    return buffer.getvalue()


def csv_bytes(matrix: np.ndarray, header: list) -> bytes:
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(header)
    for row in np.atleast_2d(matrix):
        writer.writerow([repr(float(v)) for v in row])
    return buffer.getvalue().encode()


def json_bytes(payload: dict) -> bytes:
    return (json.dumps(payload, indent=2, allow_nan=True) + "\n").encode()


def write_folder(directory: Path, files: dict) -> Path:
    """Write ``files`` (name -> bytes) into ``directory`` atomically.

    A new folder is built under a temporary name beside it and renamed into
    place; into an existing folder each file is replaced atomically.
    """
    directory = Path(directory)
    parent = directory.parent if str(directory.parent) else Path(".")
    parent.mkdir(parents=True, exist_ok=True)
    if directory.exists():
        if not directory.is_dir():
            raise FileExistsError(f"{directory} exists and is not a folder")
        for name, data in files.items():
            atomic_write_bytes(directory / name, data)
        return directory
    staging = Path(tempfile.mkdtemp(prefix=f".{directory.name}.", dir=parent))
    try:
        for name, data in files.items():
            (staging / name).write_bytes(data)
        os.chmod(staging, 0o777 & ~_umask())  # mkdtemp makes 0700
        os.replace(staging, directory)
    except BaseException:
        shutil.rmtree(staging, ignore_errors=True)
        raise
    return directory
