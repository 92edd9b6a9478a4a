"""Checkpoints of a tuning job, saved atomically, for a resume that ends bit for bit as an uninterrupted run.

A tuning job is a deterministic function of its seed, its options and the
values the log-density returns: random numbers are drawn on the driver from
seeded streams and nothing depends on the clock. A checkpoint therefore holds
the job's evaluation record: every batch of log-density evaluations in order,
with the values (and the tracebacks of evaluations that raised), the seconds
they took and a 64-bit fingerprint of the points.

Resuming runs the job again from the start and answers each batch from the
record, after checking that its points are bit for bit those recorded, until
the record ends; from there it evaluates live. The resumed job thus passes
through exactly the states of the interrupted one (draws, adaptation state,
random generator states and counts, including the state inside scipy's
optimisers, which could not be saved any other way) and ends with the same
result bit for bit. Replaying costs walktune's own arithmetic only: no
log-density evaluation is repeated, except a few recorded batches spread over
the record (the start point first, ``SPOT_CHECKS`` in all) that check the model
still gives the recorded values; a model whose data changed is caught there
even when its value at the start did not change (a deterministic log-density
is assumed, as everywhere in walktune).

A checkpoint is written at stage ends, every ``every`` seconds during a stage,
when the job is stopped and when it fails; always to a temporary file moved
into place, so a crash or a second Ctrl-C leaves the previous checkpoint or the
new one, never half of one. A checkpoint is never written before the record
has grown past the one it was resumed from, so a resume that fails (another
model, another seed, a changed function) leaves it as it was.
"""

from __future__ import annotations

import contextvars
import hashlib
import io
import json
import time
import zipfile
from contextlib import contextmanager
from pathlib import Path

import numpy as np

from .errors import WalktuneError
from .evaluators import BatchResult
from .io import atomic_write_bytes
from .outputs import FolderLock

SCHEMA_NAME = "walktune.checkpoint"
SCHEMA_VERSION = 1
SCHEMA = f"{SCHEMA_NAME}/{SCHEMA_VERSION}"
FILE_NAME = "checkpoint.npz"
DEFAULT_EVERY = 30.0

_ARRAYS = ("batch_sizes", "fingerprints", "seconds", "busy", "values", "error_index")


class Interrupted(BaseException):
    """The job was asked to stop (a signal); the checkpoint holds everything done so far.

    Derives from :class:`BaseException`, like :class:`KeyboardInterrupt`, so that
    no ``except Exception`` on the way out swallows it.

    Attributes
    ----------
    signum : int
        The signal that asked for the stop (0 when asked from code).
    partial : dict or None
        Advice from the best estimate so far, marked partial (set by :func:`walktune.tune`).
    checkpoint : Path or None
        The checkpoint file written.
    """

    def __init__(self, signum: int = 0):
        super().__init__(f"stopped by signal {signum}" if signum else "stopped")
        self.signum = signum
        self.partial = None
        self.checkpoint = None


#: The checkpoint of the tuning job running in this context (see :func:`stop_point`).
_ACTIVE: contextvars.ContextVar = contextvars.ContextVar("walktune_active_checkpoint", default=None)


@contextmanager
def active(checkpoint):
    """Make ``checkpoint`` the one :func:`stop_point` consults while the block runs (None: none)."""
    token = _ACTIVE.set(checkpoint)
    try:
        yield
    finally:
        _ACTIVE.reset(token)


def stop_point() -> None:
    """Raise :class:`Interrupted` if a stop was requested on the running job's checkpoint.

    A stop request is honoured before each evaluation batch; a long computation
    between evaluations (diagnostics of a long run, transform scoring, the
    geometry checks) calls this between its pieces, so that Ctrl-C acts within
    a piece's time rather than the whole computation's. It never changes a
    result: without a request it does nothing.
    """
    checkpoint = _ACTIVE.get()
    if checkpoint is not None and checkpoint.stop_signal is not None:
        checkpoint.raise_stop()


def fingerprint(points: np.ndarray) -> int:
    """A 64-bit digest of the points' shape and bytes (BLAKE2b)."""
    points = np.ascontiguousarray(points, dtype=float)
    digest = hashlib.blake2b(repr(points.shape).encode() + points.tobytes(), digest_size=8).digest()
    return int.from_bytes(digest, "little")


#: Recorded batches evaluated again when a run is resumed, and the largest batch that may be one.
SPOT_CHECKS = 8
SPOT_CHECK_MAX_POINTS = 64


def spot_check_batches(sizes, error_keys, offsets) -> set:
    """Indices of up to ``SPOT_CHECKS`` recorded batches, spread evenly over the record's evaluations,
    to evaluate again on resume: the first (the start point) always, then batches of at most
    ``SPOT_CHECK_MAX_POINTS`` points in which no evaluation failed (a failure or a time-out need not
    repeat itself).

    Parameters
    ----------
    sizes : array of shape (batches,)
    error_keys : sorted array of the evaluation indices that failed
    offsets : array of shape (batches + 1,), the cumulative evaluation counts
    """
    sizes = np.asarray(sizes, dtype=int)
    if sizes.size == 0:
        return set()
    failed = np.searchsorted(error_keys, offsets[1:]) - np.searchsorted(error_keys, offsets[:-1])
    eligible = np.flatnonzero((sizes <= SPOT_CHECK_MAX_POINTS) & (failed == 0))
    if eligible.size == 0:
        return set()
    wanted = np.linspace(0, offsets[-1] - 1, SPOT_CHECKS)
    nearest = np.abs(offsets[eligible][None, :] - wanted[:, None]).argmin(axis=1)
    return {0} | {int(eligible[k]) for k in nearest}


def _identity_json(identity: dict) -> str:
    return json.dumps(identity, sort_keys=True, allow_nan=True, default=str)


def read_meta(folder) -> dict:
    """The metadata of the checkpoint in ``folder`` (its identity, stage and counts).

    Raises :class:`WalktuneError` when there is none, when it was written by a
    newer walktune, or when it is damaged.
    """
    meta, _ = _read(Path(folder) / FILE_NAME)
    return meta


def _read(path: Path) -> tuple[dict, dict]:
    if not path.exists():
        raise WalktuneError(
            f"no checkpoint in {path.parent} (no {FILE_NAME}); the run finished or never started there. "
            "Give the folder of an interrupted run."
        )
    damaged = (
        f"the checkpoint {path} is damaged ({{}}); it was left as it is. Start a new run with another --out, "
        "or delete the file."
    )
    try:
        with np.load(path, allow_pickle=False) as archive:
            meta = json.loads(str(archive["meta"][()]))
            schema = str(meta.get("schema", ""))
            name, _, version = schema.partition("/")
            if name != SCHEMA_NAME or not version.isdigit():
                raise WalktuneError(f"{path} is not a walktune checkpoint (schema {schema!r}).")
            if int(version) > SCHEMA_VERSION:
                raise WalktuneError(
                    f"the checkpoint {path} was written by a newer walktune (schema {schema}; this one reads "
                    f"{SCHEMA}); upgrade walktune to resume it."
                )
            arrays = {key: np.array(archive[key]) for key in _ARRAYS}
            arrays["error_text"] = [str(t) for t in archive["error_text"]]
    except WalktuneError:
        raise
    except (zipfile.BadZipFile, KeyError, ValueError, OSError, EOFError, json.JSONDecodeError) as error:
        raise WalktuneError(damaged.format(f"{type(error).__name__}: {error}".strip(": "))) from None
    if meta.get("digest") != _digest(arrays):
        raise WalktuneError(damaged.format("its contents do not match their checksum"))
    counts = arrays["batch_sizes"]
    if counts.shape != arrays["fingerprints"].shape or int(counts.sum()) != arrays["values"].shape[0]:
        raise WalktuneError(damaged.format("its record is inconsistent"))
    return meta, arrays


def _digest(arrays: dict) -> str:
    h = hashlib.sha256()
    for key in _ARRAYS:
        h.update(np.ascontiguousarray(arrays[key]).tobytes())
    for text in arrays["error_text"]:
        h.update(text.encode())
    return h.hexdigest()


class Checkpoint:
    """The evaluation record of one tuning job, saved to ``folder/checkpoint.npz``.

    Parameters
    ----------
    folder : path
        The run's output folder (created if missing).
    identity : dict
        What makes the run the run: model, options, seed. Stored, and compared
        on resume.
    every : float, default=30
        Seconds between checkpoints within a stage (stage ends always write one).
        ``0`` writes at stage ends only.
    resume : bool, default=False
        Continue from the checkpoint in ``folder``.
    """

    def __init__(self, folder, identity: dict, *, every: float = DEFAULT_EVERY, resume: bool = False, clock=time.monotonic):
        self.folder = Path(folder)
        self.path = self.folder / FILE_NAME
        self.identity = json.loads(_identity_json(identity))
        if every < 0 or not np.isfinite(every):
            raise WalktuneError(f"the checkpoint interval must be a number of seconds >= 0; got {every}.")
        self.every = float(every)
        self.clock = clock
        self.stop_signal: int | None = None
        self.stage = None
        self.snapshot: dict = {}
        self._sizes: list = []
        self._prints: list = []
        self._seconds: list = []
        self._busy: list = []
        self._values: list = []
        self._errors: dict = {}
        self._error_keys = np.empty(0, dtype=np.int64)
        self._replay = 0  # batches of the loaded record still to replay
        self._spot_batches: set = set()  # recorded batches evaluated again on replay
        self._cursor = 0  # next batch to replay
        self._value_offset = 0
        self._saved_batches = 0
        self._last_save = clock()
        self.resumed_evaluations = 0
        self.spot_checked = 0  # evaluations repeated on resume to check the model (see spot_check_batches)
        self._lock = None
        if resume:
            self._hold_folder()
            self._load()

    # ------------------------------------------------------------------ loading
    def _load(self) -> None:
        meta, arrays = _read(self.path)
        stored = meta.get("identity", {})
        for key in sorted(set(stored) | set(self.identity)):
            if stored.get(key) != self.identity.get(key):
                raise WalktuneError(
                    f"the checkpoint in {self.folder} is of another run: its {key} is {stored.get(key)!r}, "
                    f"this run's is {self.identity.get(key)!r}. Resume with the same model and options, "
                    "or start a new run with another --out."
                )
        sizes = arrays["batch_sizes"].astype(int)
        values = arrays["values"]
        offsets = np.r_[0, np.cumsum(sizes)]
        self._sizes = sizes.tolist()
        self._prints = arrays["fingerprints"].tolist()
        self._seconds = arrays["seconds"].tolist()
        self._busy = arrays["busy"].tolist()
        self._values = [values[offsets[i] : offsets[i + 1]] for i in range(len(sizes))]
        for index, text in zip(arrays["error_index"].tolist(), arrays["error_text"]):
            self._errors[int(index)] = text
        self._error_keys = np.array(sorted(self._errors), dtype=np.int64)
        self._replay = len(sizes)
        self._spot_batches = spot_check_batches(sizes, self._error_keys, offsets)
        self._saved_batches = len(sizes)
        self.resumed_evaluations = int(offsets[-1])
        self.stage = meta.get("stage")

    @property
    def evaluations(self) -> int:
        """Evaluations in the record (recorded before a resume, and since)."""
        return self._value_offset if self._cursor >= self._replay else self.resumed_evaluations

    # ------------------------------------------------------------------ recording
    def request_stop(self, signum: int = 0) -> None:
        """Ask the job to stop before its next live evaluation (safe to call from a signal handler)."""
        self.stop_signal = int(signum)

    def raise_stop(self) -> None:
        """Save and raise :class:`Interrupted` for the stop requested."""
        stop = Interrupted(self.stop_signal or 0)
        stop.checkpoint = self.save()  # while replaying, the checkpoint on disk is already complete
        raise stop

    def evaluate(self, points: np.ndarray, evaluator) -> tuple[BatchResult, float, float]:
        """Answer a batch from the record, or evaluate it live and record it.

        Returns the result, the wall seconds and the worker-busy seconds.
        """
        if self.stop_signal is not None:
            self.raise_stop()
        if self._cursor < self._replay:
            i = self._cursor
            n = points.shape[0]
            if n != self._sizes[i] or fingerprint(points) != self._prints[i]:
                raise WalktuneError(
                    f"the resumed run left the checkpoint's record at evaluation {self._value_offset + 1}: the model, "
                    "its options, walktune's version or the machine differ from the run that wrote it (numerical "
                    "libraries may round differently on another processor). Resume where the run started; the "
                    f"checkpoint in {self.folder} was left as it is."
                )
            lo, hi = np.searchsorted(self._error_keys, [self._value_offset, self._value_offset + n])
            errors = {int(k) - self._value_offset: self._errors[int(k)] for k in self._error_keys[lo:hi]}
            if i in self._spot_batches:
                self._spot_check(points, evaluator, i)
            self._cursor += 1
            self._value_offset += n
            return BatchResult(self._values[i].copy(), errors), self._seconds[i], self._busy[i]
        t0 = time.perf_counter()
        result = evaluator(points)
        seconds = time.perf_counter() - t0
        busy = float(getattr(result, "busy_seconds", 0.0) or 0.0)
        values = np.array(result.values, dtype=float)
        for k, text in result.errors.items():
            self._errors[self._value_offset + int(k)] = text
        self._sizes.append(points.shape[0])
        self._prints.append(fingerprint(points))
        self._seconds.append(seconds)
        self._busy.append(busy)
        self._values.append(values)
        self._cursor += 1
        self._value_offset += points.shape[0]
        if self.every > 0 and self.clock() - self._last_save >= self.every:
            self.save()
        return BatchResult(values.copy(), dict(result.errors)), seconds, busy

    def _spot_check(self, points: np.ndarray, evaluator, batch: int) -> None:
        """Evaluate a recorded batch again: the replay answers from the record and never calls the
        model, so this is what tells that the model (its code or its data) changed."""
        again = evaluator(points)
        self.spot_checked += points.shape[0]
        recorded = self._values[batch]
        values = np.asarray(again.values, dtype=float)
        differ = ~((values == recorded) | (np.isnan(values) & np.isnan(recorded)))
        differ[list(again.errors)] = True
        if differ.any():
            j = int(np.flatnonzero(differ)[0])
            where = "the start point" if batch == 0 else f"evaluation {self._value_offset + j + 1}"
            now = "an error" if j in again.errors else repr(float(values[j]))
            raise WalktuneError(
                f"the log-density now gives {now} at {where} where the run checkpointed in {self.folder} "
                f"recorded {float(recorded[j])!r}: the model or its data changed since. Resume with the same model "
                "and data, or start a new run elsewhere; the checkpoint was left as it is."
            )

    def stage_ended(self, stage: str, snapshot: dict | None = None) -> None:
        """Note a finished stage (and the job's partial advice then) and write a checkpoint if anything
        new was evaluated."""
        self.stage = stage
        if snapshot is not None:
            self.snapshot = snapshot
        self.save()

    # ------------------------------------------------------------------ saving
    def save(self) -> Path | None:
        """Write the checkpoint atomically, when the record grew since the last write."""
        if len(self._sizes) <= self._saved_batches:
            return self.path if self.path.exists() else None
        from . import __version__

        errors = sorted(self._errors.items())
        arrays = {
            "batch_sizes": np.asarray(self._sizes, dtype=np.int64),
            "fingerprints": np.asarray(self._prints, dtype=np.uint64),
            "seconds": np.asarray(self._seconds, dtype=float),
            "busy": np.asarray(self._busy, dtype=float),
            "values": np.concatenate(self._values) if self._values else np.empty(0),
            "error_index": np.asarray([k for k, _ in errors], dtype=np.int64),
            "error_text": [t for _, t in errors],
        }
        meta = {
            "schema": SCHEMA,
            "walktune_version": __version__,
            "identity": self.identity,
            "stage": self.stage,
            "evaluations": int(arrays["values"].shape[0]),
            "saved_at": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
            "snapshot": self.snapshot,
            "digest": _digest(arrays),
        }
        buffer = io.BytesIO()
        np.savez(buffer, meta=np.array(json.dumps(meta, allow_nan=True, default=str)),
                 **{**arrays, "error_text": np.array(arrays["error_text"], dtype=str)})
        self._hold_folder()
        atomic_write_bytes(self.path, buffer.getvalue())
        self._saved_batches = len(self._sizes)
        self._last_save = self.clock()
        return self.path

    def _hold_folder(self) -> None:
        """Lock the folder for this process (released when it exits, however it exits), and clear
        temporary files that an exit in the middle of a write left behind (:mod:`walktune.outputs`)."""
        if self._lock is None:
            self._lock = FolderLock(self.folder).acquire()

    def release(self) -> None:
        """Let go of this checkpoint's hold on the folder (done anyway when the process exits)."""
        if self._lock is not None:
            self._lock.release()
            self._lock = None

    def remove(self) -> None:
        """Delete the checkpoint once the run's results are written, and unlock the folder."""
        self.path.unlink(missing_ok=True)
        self.release()


# --------------------------------------------------------------------------- options of a run from the command line

#: Tuning options that shape the result; a resumed run takes them from the checkpoint.
RESULT_OPTIONS = ("target", "names", "start", "bound", "budget", "chains", "seed", "current_proposal", "target_ess",
                  "transform", "no_transform")


def options_for_new_run(folder: Path, given: dict, restart: bool = False) -> dict:
    """The options of a new run into ``folder``: refused where an interrupted run waits (unless ``restart``,
    which lets :func:`discard_interrupted` remove it once the folder is locked); the seed fixed now.

    A seed drawn here and recorded is what lets an interrupted run be resumed bit for bit.
    """
    folder = Path(folder)
    if (folder / FILE_NAME).exists() and not restart:
        raise WalktuneError(
            f"{folder} holds the checkpoint of an interrupted or failed run; continue it with `walktune tune --resume "
            f"{folder}`, start afresh there with --restart (the checkpoint is discarded), or choose another --out."
        )
    options = dict(given)
    if options.get("seed") is None:
        options["seed"] = int(np.random.SeedSequence().entropy % 2**63)
    return options


def discard_interrupted(folder: Path) -> list:
    """Delete the checkpoint and partial advice of an interrupted or failed run in ``folder`` (call with the
    folder locked); returns the names deleted."""
    gone = []
    for name in (FILE_NAME, "partial-advice.json"):
        path = Path(folder) / name
        if path.exists():
            path.unlink()
            gone.append(name)
    return gone


def options_for_resume(folder: Path, given: dict, canonical_target) -> tuple[dict, dict]:
    """The options of the run checkpointed in ``folder``, checked against those given again, and its identity.

    ``given`` holds the command line's options (None or [] where not given);
    ``canonical_target(text)`` turns a TARGET into the form recorded. An
    option given again must equal the recorded one.
    """
    identity = read_meta(folder).get("identity", {})
    stored = identity.get("options")
    if not isinstance(stored, dict):
        raise WalktuneError(f"the checkpoint in {folder} was not written by `walktune tune`; resume it from Python.")
    merged = dict(stored)
    for key in RESULT_OPTIONS:
        value = given.get(key)
        if value is None or value == []:
            continue
        if key == "target":
            value = canonical_target(value)
        if value != stored.get(key):
            flag = "TARGET" if key == "target" else "--" + key.replace("_", "-")
            raise WalktuneError(
                f"{flag} {value!r} differs from the interrupted run's {stored.get(key)!r} in {folder}; "
                f"drop {flag} to resume with the run's own options, or start a new run with another --out."
            )
    return merged, identity


def check_model_unchanged(folder: Path, identity: dict, model_digest: str, label: str) -> None:
    """A resumed run needs the model file the checkpointed run used (compared by digest)."""
    if identity.get("model_digest") != model_digest:
        raise WalktuneError(
            f"the model file of {label} changed since the run in {folder} was checkpointed; a resumed run "
            "needs the same model. Restore it, or start a new run with another --out."
        )
