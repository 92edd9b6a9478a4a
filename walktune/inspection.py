"""Diagnose chains from any sampler and give the same advice as the tuning job.

The draws are treated as Markov chain output stored at every step. From them:
per-parameter mean, sd, MCSE, bulk and tail ESS, R-hat, IACT and the rate at
which the state changes (for a random-walk Metropolis chain, the acceptance
rate); a verdict per parameter; the posterior covariance (accumulated over row
blocks, so a memory-mapped file is never copied whole), its structure and the
proposal advice; and how many more draws each parameter needs.

Memory: the draws (possibly a memory-mapped file) are read in blocks, and the
pages a block touched are released before the next (:func:`walktune.chainfiles.release_pages`).
One pass over blocks of draws (all parameters, :data:`READ_BLOCK_BYTES` of file
at a time) gives the moments and move rates; then the per-parameter summary
reads a slab of all chains and draws of a few parameters at a time
(:data:`SLAB_BYTES`, so that a slab and its working copies fit in
:data:`MEMORY_BLOCK_BYTES`; at least one parameter, since rank normalisation and
the FFT need every draw of a parameter), regrouped through a temporary file when
slabs read straight from the file would take many passes over it. Peak memory is
therefore about one block plus the output, whatever the file size.
"""

from __future__ import annotations

import os
import tempfile
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from . import theory
from ._validation import as_covariance, as_float_array, check_positive_number
from .advice import Advice, advice_payload, advise, warmup_and_thinning
from .analysis import Structure, analyse
from .chainfiles import ChainData, check_layout, memory_map_of, orient, release_pages
from .diagnostics import IACT_RELATIVE_ERROR, IACTS_FOR_PRECISE_ESS, ChainMeasures, measure_chain_blocks
from .errors import WalktuneError
from .findings import Finding, conditioning_findings, convergence_findings, correlation_findings
from .constants import ADVICE_SCHEMA as SCHEMA, CAUTION, DEFAULT_TARGET_ESS

#: A chain whose state changes in less than this share of steps is called stuck (common practice).
STUCK_MOVE_RATE = 0.01

#: Working memory of one block of the per-parameter summary: the slab read plus its working copies.
MEMORY_BLOCK_BYTES = 256 * 2**20
#: The summary of a slab needs about this many slab sizes in all (the slab, its split copy, the
#: zero-padded FFT, the ranks); measured with tracemalloc on (4, 250000, 2) draws: 7.6 + 1.
SUMMARY_WORK_FACTOR = 9
#: Bytes of one slab (all chains and draws of a few parameters).
SLAB_BYTES = MEMORY_BLOCK_BYTES // SUMMARY_WORK_FACTOR
#: Bytes of the draws (all parameters) read per block in the pass for moments and move rates.
READ_BLOCK_BYTES = 16 * 2**20
#: Several chains of fewer draws than this (or fewer draws than chains or parameters) make the layout doubtful.
DOUBTFUL_DRAWS = 10


@dataclass
class ParameterVerdict:
    name: str
    verdict: str  # "ok", "not-converged", "too-few-draws", "stuck-chain", "imprecise-ess"
    reason: str


@dataclass
class InspectionResult:
    """Diagnosis of existing draws.

    Attributes
    ----------
    parameter_names : list of str
    summary : walktune.diagnostics.ChainMeasures
    move_rate : float
        Share of steps at which the state changed, over all chains.
    chain_move_rate : ndarray of shape (chains,)
    parameter_move_rate : ndarray of shape (params,)
    structure : Structure
    advice : Advice
    verdicts : list of ParameterVerdict
    more_draws_observed, more_draws_advised : ndarray of shape (params,)
        Further draws needed for the requested precision at the observed
        efficiency, and in total with the advised proposal (at its optimal
        efficiency, from optimal-scaling theory).
    findings : list of Finding
    """

    parameter_names: list
    summary: ChainMeasures
    move_rate: float
    chain_move_rate: np.ndarray
    parameter_move_rate: np.ndarray
    structure: Structure
    advice: Advice
    verdicts: list
    target_ess: float
    needed_ess: np.ndarray
    more_draws_observed: np.ndarray
    more_draws_advised: np.ndarray
    findings: list
    proposal: np.ndarray | None = None
    sources: list = field(default_factory=list)
    warmup: int = 0
    thin: int = 1
    chain_column: str | None = None
    layout: str | None = None
    run: str | None = None

    def __repr__(self) -> str:
        from .plaintext import inspection_repr

        return inspection_repr(self)

    def advice_text(self) -> str:
        """The advice as plain text (for notebooks and logs): verdicts, draws needed, proposal, findings."""
        from .plaintext import inspection_advice

        return inspection_advice(self)

    def to_dict(self) -> dict:
        """advice.json payload, marked ``"source": "inspection"``."""
        from . import __version__

        names = self.parameter_names
        s = self.summary

        def clean(values):
            return [None if not np.isfinite(v) else float(v) for v in np.asarray(values, dtype=float)]

        tau_max = float(np.nanmax(s.iact))
        return {
            "schema": SCHEMA,
            "walktune_version": __version__,
            "source": "inspection",
            "inspected_files": [str(Path(p).resolve()) for p in self.sources],
            "partial": False,
            "seed": None,
            "parameter_names": names,
            "bounds": [[None, None] for _ in names],
            "mode": None,
            "posterior_mean": s.mean.tolist(),
            "posterior_mean_mcse": clean(s.mcse),
            **advice_payload(self.advice, self.structure, names),
            "warmup_steps": warmup_and_thinning(tau_max)[0],
            "thinning": warmup_and_thinning(tau_max)[1],
            "target_ess": self.target_ess,
            "evaluations_needed": {"observed": float(np.nanmax(self.more_draws_observed)),
                                   "tuned-covariance": float(np.nanmax(self.more_draws_advised))},
            "seconds_per_evaluation": None,
            "pilot_evaluations": 0,
            "total_evaluations": int(s.n_chains * s.n_draws),
            "pilot_converged": None,
            "comparison": [],
            "inspection": {
                "chains": s.n_chains,
                "draws_per_chain": s.n_draws,
                "warmup_dropped": self.warmup,
                "chain_column": self.chain_column,
                "layout": self.layout,
                "run": self.run,
                "thin": self.thin,
                "acceptance_from_draws": self.move_rate,
                "chain_acceptance_from_draws": self.chain_move_rate.tolist(),
                "parameters": [
                    {
                        "name": name,
                        "mean": float(s.mean[i]),
                        "sd": float(s.sd[i]),
                        "mcse": clean([s.mcse[i]])[0],
                        "bulk_ess": clean([s.bulk_ess[i]])[0],
                        "tail_ess": clean([s.tail_ess[i]])[0],
                        "rhat": clean([s.rhat[i]])[0],
                        "iact": clean([s.iact[i]])[0],
                        "ess_reliable": not bool(s.bulk_too_short[i]),
                        "move_rate": float(self.parameter_move_rate[i]),
                        "verdict": self.verdicts[i].verdict,
                        "reason": self.verdicts[i].reason,
                        "more_draws_observed": clean([self.more_draws_observed[i]])[0],
                        "draws_advised": clean([self.more_draws_advised[i]])[0],
                    }
                    for i, name in enumerate(names)
                ],
            },
            "findings": [f.to_dict() for f in self.findings],
            "caution": CAUTION,
        }

    def save(self, directory, produced_by: dict | None = None) -> Path:
        """Write advice.json and the proposal files into ``directory``, replacing its earlier walktune
        files as a whole (:func:`walktune.outputs.replace_files`); ``produced_by`` goes into advice.json."""
        from .export import with_provenance
        from .io import csv_bytes, json_bytes, npy_bytes
        from .outputs import replace_files

        names = self.parameter_names
        return replace_files(
            Path(directory),
            {
                "advice.json": json_bytes(with_provenance(self.to_dict(), produced_by)),
                "proposal_covariance.npy": npy_bytes(self.advice.proposal_covariance),
                "proposal_covariance.csv": csv_bytes(self.advice.proposal_covariance, names),
                "step_sizes.csv": csv_bytes(self.advice.step_sizes[None, :], names),
            },
        )


@dataclass(frozen=True)
class _Selection:
    """The chosen draws, read lazily in blocks.

    ``array`` has shape (chains, draws, all params), warm-up and thinning
    applied by slicing (a view: of a memory-mapped file, it is not read);
    ``index`` (k,) are the chosen parameters' positions; ``thin`` is the step
    between kept draws (a block touches the skipped rows' pages too).
    """

    array: np.ndarray
    index: np.ndarray
    thin: int

    @property
    def shape(self) -> tuple:
        return self.array.shape[0], self.array.shape[1], self.index.size

    def _rows(self, chains: int) -> int:
        """Draws per read so that one read touches about READ_BLOCK_BYTES of the file."""
        row_bytes = chains * self.array.shape[2] * self.array.itemsize * self.thin
        return max(1, READ_BLOCK_BYTES // max(row_bytes, 1))

    def _columns(self):
        d = self.array.shape[2]
        whole = self.index.size == d and np.array_equal(self.index, np.arange(d))
        return slice(None) if whole else self.index

    def row_blocks(self):
        """Yield ``(chain, block)``, block of shape (rows, k) float64, chain by chain in order of draws."""
        m, n, _ = self.array.shape
        rows, columns = self._rows(1), self._columns()
        for c in range(m):
            for start in range(0, n, rows):
                block = np.array(self.array[c, start : start + rows][:, columns], dtype=float)
                release_pages(self.array)
                yield c, block

    def slabs(self, slab_bytes: int | None = None):
        """Yield slabs of shape (chains, draws, a few params) float64, in one reused buffer.

        Reading one slab reads every draw of the file; when that would take more
        than two passes over a memory-mapped file, one pass copies the chosen
        parameters slab by slab into a temporary file (as big as the chosen
        draws), from which each slab is one contiguous read.
        """
        m, n, k = self.shape
        slab_bytes = SLAB_BYTES if slab_bytes is None else slab_bytes
        per_slab = int(min(k, max(1, slab_bytes // (8 * m * n))))
        groups = [self.index[p0 : p0 + per_slab] for p0 in range(0, k, per_slab)]
        flat = np.empty(m * n * per_slab)
        if len(groups) > 2 and memory_map_of(self.array) is not None:
            yield from self._slabs_through_scratch(groups, flat)
            return
        rows = self._rows(m)
        for columns in groups:
            slab = flat[: m * n * columns.size].reshape(m, n, columns.size)
            contiguous = columns.size == 1 or np.all(np.diff(columns) == 1)
            chosen = slice(int(columns[0]), int(columns[-1]) + 1) if contiguous else columns
            for start in range(0, n, rows):
                slab[:, start : start + rows] = self.array[:, start : start + rows][:, :, chosen]
                release_pages(self.array)
            yield slab

    def _slabs_through_scratch(self, groups: list, flat: np.ndarray):
        """Slabs of ``groups`` of parameters, regrouped through a temporary file in one pass."""
        m, n, _ = self.shape
        sizes = [m * n * g.size for g in groups]
        offsets = np.concatenate([[0], np.cumsum(sizes)[:-1]]) * 8
        rows = self._rows(m)
        with tempfile.TemporaryFile(prefix="walktune-slabs-") as scratch:
            descriptor = scratch.fileno()
            for start in range(0, n, rows):
                block = np.array(self.array[:, start : start + rows], dtype=float)  # (m, r, all params)
                release_pages(self.array)
                for columns, offset in zip(groups, offsets):
                    part = np.ascontiguousarray(block[:, :, columns])  # (m, r, g)
                    for c in range(m):
                        try:
                            os.pwrite(descriptor, part[c].data, int(offset + (c * n + start) * columns.size * 8))
                        except OSError as error:
                            raise WalktuneError(
                                f"cannot write the temporary regrouped copy of the draws ({error.strerror}); "
                                f"it needs {sum(sizes) * 8 / 1e9:.1f} GB in {tempfile.gettempdir()} (set TMPDIR)."
                            ) from None
                del block
            for columns, offset, size in zip(groups, offsets, sizes):
                view = flat[:size]
                if os.preadv(descriptor, [view.view(np.uint8)], int(offset)) != size * 8:
                    raise WalktuneError("the temporary copy of the draws came back short; is the temporary folder full?")
                yield view.reshape(m, n, columns.size)


def _moments_and_moves(draws: _Selection):
    """One pass over blocks of draws: mean and covariance over all chains, and move rates.

    Returns
    -------
    mean : ndarray of shape (params,)
    covariance : ndarray of shape (params, params)
    chain_moves : ndarray of shape (chains,)
        Per chain, the share of steps where any parameter changed.
    parameter_moves : ndarray of shape (params,)
        Per parameter, the share of steps (over all chains) where it changed.
    """
    m, n, d = draws.shape
    total = m * n
    shift = sums = cross = previous = None
    moved = np.zeros(m)
    changed = np.zeros(d)
    for c, block in draws.row_blocks():
        if shift is None:
            shift = block[0].copy()  # centring improves the accuracy of the sums
            sums, cross = np.zeros(d), np.zeros((d, d))
        steps = np.diff(block if previous is None or previous[0] != c else np.vstack([previous[1], block]), axis=0) != 0
        moved[c] += np.count_nonzero(steps.any(axis=1))
        changed += np.count_nonzero(steps, axis=0)
        previous = (c, block[-1:].copy())
        block -= shift
        sums += block.sum(axis=0)
        cross += block.T @ block
    mean_shifted = sums / total
    cov = (cross - total * np.outer(mean_shifted, mean_shifted)) / (total - 1)
    return mean_shifted + shift, 0.5 * (cov + cov.T), moved / (n - 1), changed / (m * (n - 1))


def _verdicts(names, s: ChainMeasures, chain_moves, needed_ess) -> list:
    stuck_chains = np.flatnonzero(chain_moves < STUCK_MOVE_RATE)
    pooled_sd = np.where(s.sd > 0, s.sd, 1.0)
    flat_chains = s.chain_sd < 1e-3 * pooled_sd[None, :]  # (chains, params)
    out = []
    for i, name in enumerate(names):
        stuck = sorted(set(stuck_chains.tolist()) | set(np.flatnonzero(flat_chains[:, i]).tolist()))
        if stuck:
            out.append(ParameterVerdict(name, "stuck-chain", f"chain(s) {', '.join(map(str, stuck))} barely move"))
        elif not s.rhat[i] <= 1.01:
            out.append(ParameterVerdict(name, "not-converged", f"R-hat {s.rhat[i]:.3f} > 1.01: chains disagree"))
        elif not s.bulk_ess[i] >= needed_ess[i]:
            out.append(
                ParameterVerdict(name, "too-few-draws", f"bulk ESS {s.bulk_ess[i]:.0f} < {needed_ess[i]:.0f} needed")
            )
        elif s.bulk_too_short[i] or s.tail_too_short[i]:
            out.append(ParameterVerdict(name, "imprecise-ess", f"fewer than {IACTS_FOR_PRECISE_ESS} IACTs in all: "
                                        f"the ESS may be off by more than {IACT_RELATIVE_ERROR:.0%}"))
        else:
            out.append(ParameterVerdict(name, "ok", "no problem seen (which does not prove convergence)"))
    return out


def _inspection_findings(structure, s: ChainMeasures, names: list, chain_moves: np.ndarray, rate: float) -> list:
    """Structure, convergence, stuck chains, acceptance far from optimal, and too-short chains."""
    m, d = chain_moves.shape[0], len(names)
    findings: list = []
    findings += correlation_findings(structure, names)
    findings += conditioning_findings(structure, names)
    findings += convergence_findings(s.rhat, names, "inspected")
    stuck = np.flatnonzero(chain_moves < STUCK_MOVE_RATE)
    if stuck.size:
        findings.append(
            Finding(
                "stuck-chain", "critical", [],
                f"chain(s) {', '.join(map(str, stuck))} change state in under {STUCK_MOVE_RATE:.0%} of steps: "
                "their proposal is far too large, or they sit in a region they cannot leave.",
                {"chain_move_rate": chain_moves.tolist()},
            )
        )
    if stuck.size < m and (rate < 0.1 or rate > 0.7):
        findings.append(
            Finding(
                "poor-acceptance", "warn", [],
                f"the state changes in {rate:.1%} of steps (for random-walk Metropolis, the acceptance rate); "
                f"about {theory.target_acceptance(d):.2f} is best for {d} parameters.",
                {"acceptance": rate},
            )
        )
    if np.any(s.bulk_too_short):
        findings.append(
            Finding(
                "imprecise-ess", "warn", [names[i] for i in np.flatnonzero(s.bulk_too_short)],
                f"these parameters have fewer than {IACTS_FOR_PRECISE_ESS} autocorrelation times over all chains: "
                f"their ESS may be off by more than {IACT_RELATIVE_ERROR:.0%}.",
                {},
            )
        )
    return findings


def _doubtful_layout(shape: tuple) -> str | None:
    """Why the (chains, draws, params) reading of ``shape`` looks wrong, or None."""
    m, n, d = shape
    if m > n:
        return f"{m} chains of {n} draws each (more chains than draws)"
    if d > n:
        return f"{n} draws of {d} parameters (more parameters than draws)"
    if m > 1 and n < DOUBTFUL_DRAWS:
        return f"{m} chains of only {n} draws each"
    return None


def _as_array(draws) -> np.ndarray:
    array = draws if isinstance(draws, np.ndarray) else np.asarray(draws)
    if array.dtype.kind not in "fiu":
        try:
            array = np.asarray(array, dtype=float)
        except (TypeError, ValueError):
            raise WalktuneError("draws must be numbers shaped (chains, draws, params) or (draws, params).") from None
    return array


def _select(draws, names, params, warmup: int, thin: int, layout: str | None, stated: bool) -> tuple[_Selection, list]:
    """The draws as a lazy (chains, draws, params) selection after warm-up and thinning; and the chosen names.

    ``layout`` orients an array; ``stated`` says the orientation was stated by the
    caller (else a doubtful shape is refused). Nothing is read from a memory map here.
    """
    raw = _as_array(draws)
    if raw.ndim not in (1, 2, 3):
        raise WalktuneError(f"draws must be shaped (chains, draws, params) or (draws, params); got {raw.ndim} dimensions.")
    array = orient(raw, layout, "the draws")
    m, n, d = array.shape
    doubt = None if stated else _doubtful_layout(array.shape)
    if doubt is not None:
        raise WalktuneError(
            f"draws of shape {raw.shape} read as {doubt} look mis-laid; state the layout with --layout "
            "(layout= in Python): draws,chains,params, chains,draws,params to keep this reading, draws,params or params,draws."
        )
    names = [f"theta[{i}]" for i in range(d)] if names is None else [str(x) for x in names]
    if len(names) != d:
        raise WalktuneError(f"{len(names)} names for {d} parameters; give one name per parameter.")
    index = list(range(d))
    if params is not None:
        index = []
        for p in params:
            if isinstance(p, (int, np.integer)) and 0 <= p < d:
                index.append(int(p))
            elif p in names:
                index.append(names.index(p))
            else:
                raise WalktuneError(f"parameter {p!r} is not in the draws; known: {', '.join(names)}.")
        names = [names[i] for i in index]
    if warmup < 0 or thin < 1:
        raise WalktuneError("warm-up must be >= 0 and thin >= 1.")
    if warmup >= n:
        raise WalktuneError(f"warm-up of {warmup} draws leaves nothing of chains with {n} draws.")
    array = array[:, warmup::thin]
    if array.shape[1] < 4:
        raise WalktuneError(f"each chain needs at least 4 draws after warm-up and thinning; got {array.shape[1]}.")
    return _Selection(array, np.asarray(index, dtype=np.intp), int(thin)), names


def _select_input(draws, names, sources, layout, params, warmup: int, thin: int):
    """:func:`_select` of an array or of a ChainData (oriented by read_chains); with the names, sources and layout."""
    if not isinstance(draws, ChainData):
        chosen, names = _select(draws, names, params, warmup, thin, layout, layout is not None)
        return chosen, names, sources, layout
    names = draws.names if names is None else names
    sources = draws.sources if sources is None else sources
    stated = draws.layout is not None or layout is not None
    chosen, names = _select(draws.draws, names, params, warmup, thin, None, stated)
    return chosen, names, sources, draws.layout or layout


def inspect(
    draws,
    names=None,
    *,
    warmup: int = 0,
    thin: int = 1,
    params=None,
    proposal=None,
    target_ess: float = DEFAULT_TARGET_ESS,
    target_mcse=None,
    sources=None,
    chain_column: str | None = None,
    layout: str | None = None,
    run: str | None = None,
) -> InspectionResult:
    """Diagnose existing draws and advise a proposal.

    Parameters
    ----------
    draws : array-like of shape (chains, draws, params) or (draws, params), or ChainData
        May be a memory-mapped array; it is read in blocks, the pages of each
        block released before the next, and never copied whole. A
        :class:`walktune.chainfiles.ChainData` (from ``read_chains``) brings its
        names, sources and the layout it was read with.
    names : list of str, optional
    warmup : int, default=0
        Draws to drop from the start of every chain.
    thin : int, default=1
        Keep every ``thin``-th draw after warm-up.
    params : list of str or int, optional
        Parameters to analyse (default: all).
    proposal : array-like, optional
        The proposal the chains ran with, (d, d) covariance or (d,) step sizes
        over the chosen parameters; its predicted slow-down is reported.
    target_ess : float, default=400
        ESS wanted per parameter.
    target_mcse : float or array-like, optional
        Wanted MCSE of each mean; overrides ``target_ess`` where it asks for more.
    sources, chain_column : optional
        Where the draws came from, recorded in advice.json so a report can read them again.
    layout : {"chains,draws,params", "draws,chains,params", "draws,params", "params,draws"}, optional
        How the axes of ``draws`` are laid out. Without it, 3-D draws are read as
        (chains, draws, params) and 2-D as (draws, params), and a shape that makes
        that reading doubtful (more chains or parameters than draws, or several
        chains of fewer than :data:`DOUBTFUL_DRAWS` draws) is refused with a WalktuneError.
    run : str, optional
        The run of a ``walktune tune`` folder the draws are (recorded likewise).
    """
    check_positive_number(target_ess, "target_ess")
    if target_mcse is not None:
        mcse = as_float_array(target_mcse, "target_mcse")
        if not np.all(np.isfinite(mcse) & (mcse > 0)):
            raise WalktuneError(f"`target_mcse` must be numbers > 0; got {target_mcse!r}.")
    chosen, names, sources, layout = _select_input(draws, names, sources, check_layout(layout), params, warmup, thin)
    m, n, d = chosen.shape
    current = None
    if proposal is not None:
        proposal = np.asarray(proposal, dtype=float)
        current = np.diag(proposal**2) if proposal.ndim == 1 and proposal.shape[0] == d else as_covariance(proposal, d, "proposal")

    mean, covariance, chain_moves, parameter_moves = _moments_and_moves(chosen)
    if not np.all(np.isfinite(covariance)):
        raise WalktuneError("draws contain NaN or infinity; remove those draws first.")
    sd = np.sqrt(np.diag(covariance))
    if np.any(sd == 0):  # checked before the summary: a file of constants is refused after one pass
        constant = [names[i] for i in np.flatnonzero(sd == 0)]
        listed = ", ".join(constant[:10]) + (f" and {len(constant) - 10} more" if len(constant) > 10 else "")
        raise WalktuneError(f"parameter(s) {listed} never change in any chain; drop them (--params).")
    s = measure_chain_blocks(chosen.slabs(), m, n)
    structure = analyse(covariance)
    advice = advise(covariance, current=current)

    needed = np.full(d, float(target_ess))
    total = m * n
    more_observed = np.maximum(0.0, needed / (s.bulk_ess / total) - total)
    if target_mcse is not None:
        # MCSE = sd / sqrt(ESS) with the split-chain ESS of the mean (s.ess), so the
        # draws an MCSE target needs follow that ESS per draw, not the bulk ESS.
        mean_ess_needed = (s.sd / np.asarray(target_mcse, dtype=float)) ** 2
        needed = np.maximum(needed, mean_ess_needed)
        more_observed = np.maximum(more_observed, mean_ess_needed / (s.ess / total) - total)
    advised_total = needed / theory.optimal_efficiency(d)

    rate = float(np.mean(chain_moves))
    findings = _inspection_findings(structure, s, names, chain_moves, rate)
    return InspectionResult(
        parameter_names=names,
        summary=s,
        move_rate=rate,
        chain_move_rate=chain_moves,
        parameter_move_rate=parameter_moves,
        structure=structure,
        advice=advice,
        verdicts=_verdicts(names, s, chain_moves, needed),
        target_ess=float(target_ess),
        needed_ess=needed,
        more_draws_observed=more_observed,
        more_draws_advised=advised_total,
        findings=findings,
        proposal=current,
        sources=list(sources or []),
        warmup=warmup,
        thin=thin,
        chain_column=chain_column,
        layout=layout,
        run=run,
    )
