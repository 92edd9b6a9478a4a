"""The last stage of the tuning job: hard-geometry checks on the proof's draws.

Separated regions and their masses (:mod:`walktune.modes`), the chains of the
recommended run the posterior table pools, funnels (:mod:`walktune.funnels`),
pile-up at bounds and heavy tails. :func:`walktune.tune` calls
:func:`check_geometry` after the proof and the recommendation
(see :mod:`walktune.stages` for the stages before it).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .diagnostics import ChainMeasures, measure_chains
from .funnels import merge_probe, needs_curvature_probe
from .geometry import (
    MIN_DRAWS_TO_DECIDE,
    assign_draws,
    boundary_findings,
    chain_iacts,
    curvature_probe_cost,
    find_regions,
    funnel_findings_from_curvature,
    heavy_tail_findings,
    multimodal_finding,
    varying_scale_findings,
    within_chain_iact,
)
from .modes import TableScope, minor_mode_finding, table_scope
from .pilot import PilotResult
from .posterior import Posterior
from .recommend import NEW_COORDINATE_RUNS
from .stages import MAX_CURVATURE_PROBE_DIM, Budget, Proof, StartingPoints


@dataclass(frozen=True)
class GeometryChecks:
    """What the hard-geometry detectors found in the proof draws (and, for funnels, the model's curvature).

    Attributes
    ----------
    regions : list of walktune.geometry.Region
        Separated regions (one when there is no second), with their Laplace masses.
    multimodal, funnel, boundary, heavy_tails : list of Finding
        ``multimodal`` also holds the ``minor-mode`` findings.
    undecided : list of str
        Checks the draws were too few to settle.
    table : walktune.modes.TableScope
        The chains of the recommended run the posterior table comes from.
    table_stats : walktune.diagnostics.ChainMeasures
        Their measures: the posterior table.
    """

    regions: list
    multimodal: list
    funnel: list
    boundary: list
    heavy_tails: list
    undecided: list
    table: TableScope
    table_stats: ChainMeasures


def check_geometry(posterior: Posterior, proof: Proof, start: StartingPoints, pilot: PilotResult,
                   budget: Budget, chosen: str) -> GeometryChecks:
    """Separated modes and their masses, the table's chains, funnels, pile-up at bounds and heavy tails.

    All proof runs are fixed-proposal continuations of the pilot's chains. The
    search for separated regions looks at every run (:meth:`Proof.pooled`); the
    funnel detectors at the runs of full length (:attr:`Proof.full_length_runs`).
    The curvature probe for funnels runs only when the draws showed none (or
    only a scale without a funnel's structure), d <= MAX_CURVATURE_PROBE_DIM and
    the budget has room. The posterior table comes from the ``chosen`` run's
    chains in one region (:func:`walktune.modes.table_scope`), and pile-up and
    heavy tails are checked on those draws, every parameter.
    """
    counted, names, dim = posterior.counted, posterior.names, posterior.dim
    detection_budget = None if budget.total is None else max(0, budget.total - counted.count)
    proof_draws, _, chain_ids = proof.pooled()
    per_chain = chain_iacts(proof_draws)
    tau_within = within_chain_iact(proof_draws, per_chain=per_chain)
    regions, undecided_modes = find_regions(
        counted.scalar, proof_draws, tau_within, extra_centres=start.centres[1:], seed=0, budget=detection_budget,
        chain_ids=[int(c) for c in chain_ids],
    )
    multimodal = [f for f in (multimodal_finding(regions, names),
                              minor_mode_finding(start.minor_modes, start.main_mode, names)) if f is not None]
    chosen_draws = proof.runs[chosen].draws
    # A region minor by its log-density alone (no Laplace mass) counts as holding none.
    table = table_scope(assign_draws(regions, chosen_draws), [0.0 if r.negligible else r.mass for r in regions])
    table_draws = chosen_draws[table.chains]
    table_stats = proof.stats[chosen] if table.region is None else measure_chains(table_draws)
    funnel, undecided_scale = _funnel_checks(posterior, proof, pilot, budget)
    undecided_tails = [names[i] for i in range(dim) if not table_stats.bulk_ess[i] >= MIN_DRAWS_TO_DECIDE]
    return GeometryChecks(
        regions=regions,
        multimodal=multimodal,
        funnel=list(funnel),
        boundary=boundary_findings(table_draws, posterior.bounds, names),
        heavy_tails=heavy_tail_findings(table_draws, table_stats.bulk_ess, names),
        undecided=[note for note in (undecided_modes, undecided_scale) if note] + (
            [f"too few draws to check the tails of {', '.join(undecided_tails)} (bulk ESS below {MIN_DRAWS_TO_DECIDE} "
             f"in the draws of the posterior table)"] if undecided_tails else []),
        table=table,
        table_stats=table_stats,
    )


def _funnel_checks(posterior: Posterior, proof: Proof, pilot: PilotResult, budget: Budget):
    """Varying scale in the draws of the full-length proof runs; the model's curvature when they show none and the
    budget allows."""
    counted, names, dim = posterior.counted, posterior.names, posterior.dim
    # The funnel detectors compare whole chains (fifths filled by several chains): the runs of full length, those
    # in the user's parameters when there are any (the geometry a fixed step in these parameters meets; a run in new
    # coordinates moves along the scale by other steps, and its chains beside theirs hide where those get stuck).
    full = proof.full_length_runs
    full = [run for name, run in full.items() if name not in NEW_COORDINATE_RUNS] or list(full.values())
    proof_draws = np.concatenate([run.draws for run in full], axis=0)
    proof_log_density = np.concatenate([run.log_density for run in full], axis=0)
    tau_median = within_chain_iact(proof_draws, np.median)
    # Multi-chain ESS: chains that disagree must not pass for a funnel (walktune.funnels.independent_draws).
    proof_ess = measure_chains(proof_draws).bulk_ess
    funnel, undecided_scale = varying_scale_findings(proof_draws, tau_median, names, bounds=posterior.bounds,
                                                     ess=proof_ess)
    probe_cost = curvature_probe_cost(dim)
    left = None if budget.total is None else budget.total - counted.count
    if needs_curvature_probe(funnel) and dim <= MAX_CURVATURE_PROBE_DIM and (left is None or left >= probe_cost):
        # The model itself can show a funnel the draws do not show plainly (chains kept out of its neck), and
        # names its scale where the draws show only a parameter that moves with it; it is reported as more
        # than a hypothesis only where the draws confirm it.
        probed = funnel_findings_from_curvature(counted.scalar, proof_draws, tau_median, names, posterior.bounds,
                                                spread=np.sqrt(np.diag(pilot.covariance)),
                                                log_densities=proof_log_density, budget=left)
        funnel = merge_probe(funnel, probed)
        if any(f.severity != "info" for f in funnel):
            undecided_scale = None
    return funnel, undecided_scale
