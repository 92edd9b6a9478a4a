"""Read draws from any sampler: .npy, .npz, .csv/.tsv, one file or one file per chain.

Formats
-------
``.npy``
    Shaped (draws, params) or (chains, draws, params), read with memory
    mapping. Object arrays are refused: user files are never unpickled.
``.npz``
    One array per parameter, each (draws,) or (chains, draws); or one array
    plus a string array of names (keys ``names`` or ``parameter_names``).
``.csv`` / ``.tsv``
    A header row of names, one draw per row, and optionally a column naming
    the chain of each row. Read in chunks.

Several files are several chains: each must hold one chain with the same
parameters.

Layouts
-------
An array's axes are read as (chains, draws, params), or (draws, params) for a
2-D array, unless ``layout`` says otherwise (``"draws,chains,params"``,
``"chains,draws,params"``, ``"draws,params"``, ``"params,draws"``); a stated layout is recorded in
:attr:`ChainData.layout`.

Memory
------
A .npy file stays memory-mapped; :func:`release_pages` drops the pages a block
read has touched from the process, so that reading a file block by block keeps
only one block resident (see :mod:`walktune.inspection`). A .npz file and a
.csv/.tsv table are read whole into memory: a .npz member may be compressed and
cannot be read in parts, and a table's rows must be parsed to be found.
"""

from __future__ import annotations

import csv
import mmap
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .errors import WalktuneError

CSV_CHUNK_ROWS = 50_000

#: The layouts an array's axes can be stated in; the first is the default reading of a 3-D array.
LAYOUTS = ("chains,draws,params", "draws,chains,params", "draws,params", "params,draws")


@dataclass
class ChainData:
    """Draws shaped (chains, draws, params) and the parameter names.

    ``draws`` may be a (transposed) view of a memory-mapped file. ``layout`` is
    the layout the axes were stated in, or that tables have by format (rows are
    draws); None when an array was given the default reading.
    """

    draws: np.ndarray
    names: list
    sources: list
    layout: str | None = None


def check_layout(layout) -> str | None:
    """The layout as one of :data:`LAYOUTS` (spaces ignored), or None; a WalktuneError otherwise."""
    if layout is None:
        return None
    text = str(layout).replace(" ", "").lower()
    if text not in LAYOUTS:
        raise WalktuneError(f"layout {layout!r} is not one of {', '.join(LAYOUTS)}.")
    return text


def orient(array: np.ndarray, layout: str | None, what: str = "the draws") -> np.ndarray:
    """View ``array`` as (chains, draws, params) under the stated ``layout`` (no copy).

    Without a layout, 1-D is one chain of one parameter, 2-D is (draws, params)
    and 3-D is (chains, draws, params).
    """
    if layout is None:
        if array.ndim == 1:
            return array[None, :, None]
        if array.ndim == 2:
            return array[None, :, :]
        if array.ndim == 3:
            return array
        raise WalktuneError(f"{what} have shape {array.shape}; expected (draws, params) or (chains, draws, params).")
    wanted = 2 if layout in ("draws,params", "params,draws") else 3
    if array.ndim != wanted:
        raise WalktuneError(f"{what} have shape {array.shape}, which is not {wanted}-dimensional as layout {layout} says.")
    if layout == "draws,params":
        return array[None, :, :]
    if layout == "params,draws":
        return array.T[None, :, :]
    if layout == "draws,chains,params":
        return np.transpose(array, (1, 0, 2))
    return array


def memory_map_of(array) -> mmap.mmap | None:
    """The memory map ``array`` is a view of (found through ``.base``), or None for an in-memory array."""
    base = array
    while base is not None and not isinstance(base, mmap.mmap):
        base = getattr(base, "base", None)
    return base


def release_pages(array) -> None:
    """Drop the pages of ``array``'s memory map from the process (no effect on in-memory arrays).

    Pages of a file mapping that have been read count as resident memory until
    released; ``madvise(MADV_DONTNEED)`` on a read-only file mapping releases
    them, and a later read faults them in again from the file (or page cache).
    """
    view = array
    while view is not None and not isinstance(view, mmap.mmap):
        if isinstance(view, np.memmap) and view.mode in ("c", "copyonwrite"):
            return  # a private mapping: releasing would discard the caller's changes to it
        view = getattr(view, "base", None)
    base = view
    if base is not None and hasattr(base, "madvise") and hasattr(mmap, "MADV_DONTNEED"):
        base.madvise(mmap.MADV_DONTNEED)


def _refuse_object(array: np.ndarray, path: Path) -> None:
    if array.dtype.kind not in "fiu":
        raise WalktuneError(f"{path} holds {array.dtype} data, not numbers; save the draws as a float array.")


def _read_npy(path: Path) -> tuple[np.ndarray, list | None]:
    try:
        array = np.load(path, mmap_mode="r", allow_pickle=False)
    except ValueError as error:
        if any(k in str(error) for k in ("allow_pickle", "Object arrays", "Python objects")):
            raise WalktuneError(f"{path} holds pickled objects; walktune never unpickles files. Save a float array.") from None
        raise WalktuneError(f"{path} is not a readable .npy file ({error}); it may be truncated.") from None
    except (OSError, EOFError) as error:
        raise WalktuneError(f"{path} is not a readable .npy file ({error}); it may be truncated.") from None
    _refuse_object(array, path)
    return array, None


def _read_npz(path: Path, layout: str | None) -> tuple[np.ndarray, list | None]:
    try:
        archive = np.load(path, allow_pickle=False)
        contents = {key: archive[key] for key in archive.files}
    except ValueError as error:
        if any(k in str(error) for k in ("allow_pickle", "Object arrays", "Python objects")):
            raise WalktuneError(f"{path} holds pickled objects; walktune never unpickles files.") from None
        raise WalktuneError(f"{path} is not a readable .npz file ({error}).") from None
    except (OSError, EOFError, KeyError) as error:
        raise WalktuneError(f"{path} is not a readable .npz file ({error}); it may be truncated.") from None
    if not contents:
        raise WalktuneError(f"{path} holds no arrays.")
    names_key = next((k for k in ("parameter_names", "names") if k in contents), None)
    if names_key is not None:
        names = [str(n) for n in contents.pop(names_key).reshape(-1)]
        if len(contents) != 1:
            raise WalktuneError(f"{path} has names and {len(contents)} arrays; with names give exactly one draws array.")
        (array,) = contents.values()
        _refuse_object(array, path)
        if array.ndim == 2 and layout is None:
            array = array[None]
        array = orient(array, layout, str(path))
        if array.shape[2] != len(names):
            raise WalktuneError(
                f"{path}: draws of shape {array.shape} do not match {len(names)} names; expected (chains, draws, {len(names)})."
            )
        return array, names
    shapes = {key: value.shape for key, value in contents.items()}
    if len(set(shapes.values())) != 1:
        raise WalktuneError(f"{path}: the per-parameter arrays differ in shape ({shapes}); they must be equal.")
    for value in contents.values():
        _refuse_object(value, path)
    first = next(iter(contents.values()))
    if first.ndim not in (1, 2):
        raise WalktuneError(f"{path}: per-parameter arrays must be (draws,) or (chains, draws); got {first.shape}.")
    if layout not in (None, "chains,draws,params") and first.ndim == 2:
        raise WalktuneError(f"{path}: per-parameter arrays are read as (chains, draws); layout {layout} does not apply.")
    stacked = np.stack([np.atleast_2d(v) for v in contents.values()], axis=-1)
    return stacked, list(contents)


def _read_table(path: Path, chain_column: str | None) -> tuple[np.ndarray, list]:
    delimiter = "\t" if path.suffix.lower() == ".tsv" else ","
    try:
        handle = path.open(newline="")
    except OSError as error:
        raise WalktuneError(f"cannot read {path}: {error.strerror}.") from None
    with handle:
        reader = csv.reader(handle, delimiter=delimiter)
        header = next(reader, None)
        if header is None or not any(h.strip() for h in header):
            raise WalktuneError(f"{path} is empty; expected a header row of parameter names and one draw per row.")
        header = [h.strip() for h in header]
        if len(set(header)) != len(header):
            raise WalktuneError(f"{path}: the header repeats a column name.")
        chain_index = None
        if chain_column is not None:
            if chain_column not in header:
                raise WalktuneError(f"{path} has no column {chain_column!r}; columns: {', '.join(header)}.")
            chain_index = header.index(chain_column)
        names = [h for i, h in enumerate(header) if i != chain_index]
        value_columns = [i for i in range(len(header)) if i != chain_index]
        blocks, labels = [], []
        rows, row_labels = [], []
        line = 1

        def flush():
            if not rows:
                return
            try:
                blocks.append(np.array(rows, dtype=float))
            except ValueError:
                for offset, row in enumerate(rows):
                    for column, cell in zip(names, row):
                        try:
                            float(cell)
                        except ValueError:
                            raise WalktuneError(
                                f"{path}, line {line - len(rows) + offset + 1}: {cell!r} in column {column!r} is not a number."
                            ) from None
                raise
            labels.extend(row_labels)
            rows.clear()
            row_labels.clear()

        for record in reader:
            line += 1
            if not record or all(not c.strip() for c in record):
                continue
            if len(record) != len(header):
                raise WalktuneError(f"{path}, line {line}: {len(record)} cells where the header has {len(header)}.")
            rows.append([record[i] for i in value_columns])
            if chain_index is not None:
                row_labels.append(record[chain_index].strip())
            if len(rows) >= CSV_CHUNK_ROWS:
                flush()
        flush()
    if not blocks:
        raise WalktuneError(f"{path} has a header but no draws.")
    table = np.concatenate(blocks, axis=0)
    if chain_index is None:
        return table[None, :, :], names
    order = list(dict.fromkeys(labels))
    labels_array = np.array(labels)
    if len(order) < 2:
        raise WalktuneError(
            f"{path}: the chain column {chain_column!r} names only one chain; drop the option, or check the column."
        )
    chains = [table[labels_array == label] for label in order]
    lengths = {c.shape[0] for c in chains}
    if len(lengths) != 1:
        raise WalktuneError(
            f"{path}: chains have different lengths ({', '.join(f'{o}: {c.shape[0]}' for o, c in zip(order, chains))}); "
            "trim them to a common length."
        )
    return np.stack(chains), names


def read_chains(paths, chain_column: str | None = None, layout: str | None = None) -> ChainData:
    """Read draws from one file or several files (one chain each).

    Parameters
    ----------
    paths : path or list of paths
        .npy, .npz, .csv or .tsv files; several files are several chains.
    chain_column : str, optional
        The column of a table that names each row's chain.
    layout : {"chains,draws,params", "draws,chains,params", "draws,params", "params,draws"}, optional
        How the axes of a .npy/.npz array are laid out (default: (chains, draws,
        params) for 3-D, (draws, params) for 2-D). Tables are always (draws, columns).

    Returns
    -------
    ChainData
        ``draws`` of shape (chains, draws, params), a view of the file for .npy.
    """
    layout = check_layout(layout)
    paths = [Path(p) for p in ([paths] if isinstance(paths, (str, Path)) else paths)]
    if not paths:
        raise WalktuneError("no draws file given.")
    arrays, names = [], None
    for path in paths:
        if not path.exists():
            raise WalktuneError(f"draws file {path} does not exist.")
        suffix = path.suffix.lower()
        if suffix == ".npy":
            array, file_names = _read_npy(path)
            array = orient(array, layout, str(path))
        elif suffix == ".npz":
            array, file_names = _read_npz(path, layout)
        elif suffix in (".csv", ".tsv"):
            if layout not in (None, "chains,draws,params", "draws,params"):
                raise WalktuneError(f"{path}: a table holds one draw per row; layout {layout} does not apply.")
            array, file_names = _read_table(path, chain_column)
        else:
            raise WalktuneError(f"{path}: unknown file type {suffix!r}; use .npy, .npz, .csv or .tsv.")
        if names is not None and file_names is not None and file_names != names:
            raise WalktuneError(f"{path} has parameters {file_names}, unlike the first file's {names}.")
        names = names or file_names
        arrays.append(array)
    if len(arrays) == 1:
        draws = arrays[0]
    else:
        shapes = {a.shape[1:] for a in arrays}
        if any(a.shape[0] != 1 for a in arrays):
            raise WalktuneError("with several files, each must hold exactly one chain.")
        if len(shapes) != 1:
            raise WalktuneError(
                f"the files hold chains of different shapes ({', '.join(str(a.shape[1:]) for a in arrays)}); "
                "trim them to a common length."
            )
        draws = np.concatenate([np.asarray(a, dtype=float) for a in arrays], axis=0)
    if names is None:
        names = [f"theta[{i}]" for i in range(draws.shape[2])]
    if layout is None and all(p.suffix.lower() in (".csv", ".tsv") for p in paths):
        layout = "chains,draws,params" if chain_column is not None else "draws,params"  # rows are draws, by format
    return ChainData(draws=draws, names=names, sources=[str(p) for p in paths], layout=layout)
