"""Diagnose chains from any sampler and give the same advice as the tuning job.

The draws are treated as Markov chain output stored at every step. From them:
per-parameter mean, sd, MCSE, bulk and tail ESS, R-hat, IACT and the rate at
which the state changes (for a random-walk Metropolis chain, the acceptance
rate); a verdict per parameter; the posterior covariance (accumulated over row
blocks, so a memory-mapped file is never copied whole), its structure and the
proposal advice; and how many more draws each parameter needs.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from . import theory
from ._validation import as_covariance, as_float_array, check_positive_number
from .advice import Advice, advice_payload, advise, warmup_and_thinning
from .analysis import Structure, analyse
from .diagnostics import IACT_RELATIVE_ERROR, IACTS_FOR_PRECISE_ESS, ChainMeasures, measure_chains
from .errors import WalktuneError
from .findings import Finding, conditioning_findings, convergence_findings, correlation_findings
from .constants import ADVICE_SCHEMA as SCHEMA, CAUTION, DEFAULT_TARGET_ESS

#: A chain whose state changes in less than this share of steps is called stuck (common practice).
STUCK_MOVE_RATE = 0.01


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


def _moments(draws: np.ndarray, rows_per_block: int = 65_536) -> tuple[np.ndarray, np.ndarray]:
    """Mean and covariance over all chains, accumulated over blocks of draws."""
    m, n, d = draws.shape
    total = m * n
    shift = np.array(draws[0, 0], dtype=float)  # centring improves the accuracy of the sums
    sums = np.zeros(d)
    cross = np.zeros((d, d))
    for c in range(m):
        for start in range(0, n, rows_per_block):
            block = np.asarray(draws[c, start : start + rows_per_block], dtype=float) - shift
            sums += block.sum(axis=0)
            cross += block.T @ block
    mean_shifted = sums / total
    cov = (cross - total * np.outer(mean_shifted, mean_shifted)) / (total - 1)
    return mean_shifted + shift, 0.5 * (cov + cov.T)


def _move_rates(draws: np.ndarray, block: int = 8) -> tuple[np.ndarray, np.ndarray]:
    """Per chain: share of steps where any parameter changed; per parameter: where it changed."""
    m, n, d = draws.shape
    moved = np.zeros((m, n - 1), dtype=bool)
    per_parameter = np.zeros(d)
    for start in range(0, d, block):
        chunk = np.asarray(draws[:, :, start : start + block], dtype=float)
        changed = np.diff(chunk, axis=1) != 0
        moved |= changed.any(axis=2)
        per_parameter[start : start + block] = changed.mean(axis=(0, 1))
    return moved.mean(axis=1), per_parameter


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


def _chosen_draws(draws, names, params, warmup: int, thin: int) -> tuple[np.ndarray, list]:
    """The draws as (chains, draws, params), restricted to ``params``, after warm-up and thinning; and their names."""
    array = draws if isinstance(draws, np.ndarray) else np.asarray(draws)
    if array.dtype.kind not in "fiu":
        try:
            array = np.asarray(array, dtype=float)
        except (TypeError, ValueError):
            raise WalktuneError("draws must be numbers shaped (chains, draws, params) or (draws, params).") from None
    if array.ndim == 2:
        array = array[None]
    if array.ndim != 3:
        raise WalktuneError(f"draws must be shaped (chains, draws, params) or (draws, params); got {array.ndim} dimensions.")
    m, n, d = array.shape
    names = [f"theta[{i}]" for i in range(d)] if names is None else [str(x) for x in names]
    if len(names) != d:
        raise WalktuneError(f"{len(names)} names for {d} parameters; give one name per parameter.")
    if params is not None:
        index = []
        for p in params:
            if isinstance(p, (int, np.integer)) and 0 <= p < d:
                index.append(int(p))
            elif p in names:
                index.append(names.index(p))
            else:
                raise WalktuneError(f"parameter {p!r} is not in the draws; known: {', '.join(names)}.")
        array = array[:, :, index]
        names = [names[i] for i in index]
    if warmup < 0 or thin < 1:
        raise WalktuneError("warm-up must be >= 0 and thin >= 1.")
    if warmup >= n:
        raise WalktuneError(f"warm-up of {warmup} draws leaves nothing of chains with {n} draws.")
    array = array[:, warmup::thin]
    n = array.shape[1]
    if n < 4:
        raise WalktuneError(f"each chain needs at least 4 draws after warm-up and thinning; got {n}.")
    return array, names


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
    run: str | None = None,
) -> InspectionResult:
    """Diagnose existing draws and advise a proposal.

    Parameters
    ----------
    draws : array-like of shape (chains, draws, params) or (draws, params)
        May be a memory-mapped array; it is read in blocks and not copied whole.
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
    run : str, optional
        The run of a ``walktune tune`` folder the draws are (recorded likewise).
    """
    check_positive_number(target_ess, "target_ess")
    if target_mcse is not None:
        mcse = as_float_array(target_mcse, "target_mcse")
        if not np.all(np.isfinite(mcse) & (mcse > 0)):
            raise WalktuneError(f"`target_mcse` must be numbers > 0; got {target_mcse!r}.")
    array, names = _chosen_draws(draws, names, params, warmup, thin)
    m, n, d = array.shape
    current = None
    if proposal is not None:
        proposal = np.asarray(proposal, dtype=float)
        current = np.diag(proposal**2) if proposal.ndim == 1 and proposal.shape[0] == d else as_covariance(proposal, d, "proposal")

    s = measure_chains(array)
    chain_moves, parameter_moves = _move_rates(array)
    mean, covariance = _moments(array)
    sd = np.sqrt(np.diag(covariance))
    if np.any(sd == 0):
        constant = [names[i] for i in np.flatnonzero(sd == 0)]
        raise WalktuneError(f"parameter(s) {', '.join(constant)} never change in any chain; drop them (--params).")
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
        run=run,
    )
