"""Findings: what the analysis noticed, each with a stable kind, severity and message.

Kinds and the rules that raise them (thresholds are common practice unless a
source is named):

* ``strong-correlation``: ``|rho| >= 0.9`` between two parameters (critical at 0.99).
* ``ill-conditioned``: the correlation matrix's eigenvalues span >= 2 decades
  (critical at 4): a diagonal or isotropic proposal will crawl along the long axes.
* ``not-converged``: rank-normalised split R-hat > 1.01 on the measured chains
  (critical above 1.1); Vehtari et al. (2021) recommend below 1.01.
* ``weakly-identified``: posterior sd above 20% of the width of a finite bound
  interval (a uniform distribution over it has 29%), or, with a prior given
  apart, posterior variance at least 80% of the prior's; and the number of
  prior-dominated directions of the likelihood-informed split.
* ``poor-acceptance``: a measured acceptance rate below 0.1 or above 0.7
  (optimal is 0.44 in one dimension, Gelman, Roberts and Gilks 1996, down to
  0.234 as the dimension grows, Roberts, Gelman and Gilks 1997).
* ``acceptance-mismatch``: the tuned covariance's measured acceptance is more
  than 1.5 times off (either way) the acceptance expected on a Gaussian with the
  pilot's covariance (a rule of thumb): the posterior is not Gaussian in shape,
  and the measured figure is the one to trust.
* ``imprecise-ess``: the recommended run's ESS rests on fewer than
  ``diagnostics.IACTS_FOR_PRECISE_ESS`` autocorrelation times over its chains, so
  its relative error is above ``diagnostics.IACT_RELATIVE_ERROR``; not raised beside
  ``proof-unsettled``, which covers it with one count.
* ``proof-unsettled``: the proof's budget ran out before the recommended run
  had a reliable ESS and R-hat below 1.01 on every parameter; says what is
  missing and how many more evaluations would settle it (extrapolated from the
  run's measured IACT, :func:`walktune.recommend.evaluations_still_needed`).
* ``pilot-unsettled``: the pilot ended before the covariance and scale settled;
  a warning when its last estimate rested on too few independent draws to
  confirm a shape and some parameter's spread had grown 1.5-fold or more over
  the start (the posterior may be wider still), else a note.

``not-converged`` and ``imprecise-ess`` are about the recommended run, the one
the posterior table comes from; ``pilot_converged`` in advice.json is false
whenever ``not-converged`` or ``pilot-unsettled`` is raised.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field, replace

import numpy as np

from .diagnostics import IACT_RELATIVE_ERROR, IACTS_FOR_PRECISE_ESS
from .theory import optimal_scale, predicted_parameter_iact

SEVERITIES = ("info", "warn", "critical")


@dataclass(frozen=True)
class Finding:
    """One observation about the posterior or the chains.

    Attributes
    ----------
    kind : str
        Stable machine-readable kind, e.g. ``strong-correlation``.
    severity : str
        ``info``, ``warn`` or ``critical``.
    parameters : list of str
        The parameters involved.
    message : str
        Plain-language explanation with what to do.
    evidence : dict
        The numbers behind it.
    """

    kind: str
    severity: str
    parameters: list
    message: str
    evidence: dict = field(default_factory=dict)

    def __post_init__(self):
        if self.severity not in SEVERITIES:
            raise ValueError(f"severity must be one of {SEVERITIES}; got {self.severity!r}")

    def to_dict(self) -> dict:
        return asdict(self)


def correlation_findings(structure, names, max_listed: int = 5) -> list:
    pairs = [(i, j, rho) for i, j, rho in structure.strongest_pairs if abs(rho) >= 0.9]
    if not pairs:
        return []
    involved = sorted({k for i, j, _ in pairs for k in (i, j)})
    listed = ", ".join(f"{names[i]} ~ {names[j]} ({rho:+.3f})" for i, j, rho in pairs[:max_listed])
    more = f" and {len(pairs) - max_listed} more" if len(pairs) > max_listed else ""
    return [
        Finding(
            "strong-correlation",
            "critical" if abs(pairs[0][2]) >= 0.99 else "warn",
            [names[k] for k in involved],
            f"strongly correlated pairs: {listed}{more}. A proposal without these correlations must take "
            "small steps along the ridges; use the tuned covariance, or sample in the rotated basis.",
            {"pairs": [[names[i], names[j], rho] for i, j, rho in pairs]},
        )
    ]


def conditioning_findings(structure, names) -> list:
    if structure.decades < 2:
        return []
    tight = structure.directions[0]
    return [
        Finding(
            "ill-conditioned",
            "critical" if structure.decades >= 4 else "warn",
            [names[i] for i in range(len(names)) if abs(tight.weights[i]) >= 0.1],
            f"the posterior's principal spreads span {structure.decades:.1f} decades (correlation "
            f"eigenvalues); the tightest combination {tight.describe(names)} is pinned to "
            f"+/- {tight.spread:.3g}. Diagonal step sizes cannot follow this; use the full covariance.",
            {"decades": structure.decades, "smallest_eigenvalue": float(structure.eigenvalues[0])},
        )
    ]


def convergence_findings(rhat, names, run_name: str) -> list:
    bad = [i for i, r in enumerate(rhat) if not r <= 1.01]
    if not bad:
        return []
    worst = max(float(rhat[i]) for i in bad)
    return [
        Finding(
            "not-converged",
            "critical" if worst > 1.1 else "warn",
            [names[i] for i in bad],
            f"the chains of the {run_name} run disagree (R-hat up to {worst:.3f}; below 1.01 is wanted): "
            "they have not mixed, or the posterior has separated regions. Run longer or from other "
            "starts before trusting any estimate.",
            {"rhat": {names[i]: float(rhat[i]) for i in bad}},
        )
    ]


def identification_findings(sd, bounds, names) -> list:
    out = []
    for i, (lo, hi) in enumerate(bounds):
        width = hi - lo
        if not (width < float("inf")):
            continue
        share = sd[i] / width
        if share > 0.2:
            out.append(
                Finding(
                    "weakly-identified",
                    "warn",
                    [names[i]],
                    f"{names[i]} has posterior sd {sd[i]:.3g}, {share:.0%} of its allowed range "
                    f"[{lo:g}, {hi:g}] (a flat spread over it would be 29%): the data say little about it, "
                    "and results for it mostly reflect the bounds or prior.",
                    {"sd": float(sd[i]), "bound_width": float(width)},
                )
            )
    return out


def acceptance_findings(rows, recommended: str | None = None) -> list:
    """One ``poor-acceptance`` finding per side (too rare, too frequent) naming every run on that side.

    When the recommended run is among them, the finding says why it is still
    recommended (it was measured best) and what may do better, so that the
    advice and the finding do not read as a contradiction.
    """
    out = []
    for low, direction in ((True, "too large"), (False, "too small")):
        poor = [row for row in rows if (row.acceptance < 0.1 if low else row.acceptance > 0.7)]
        if not poor:
            continue
        rates = ", ".join(f"{row.proposal} {row.acceptance:.1%}" for row in poor)
        subject = "these proposals accept" if len(poor) > 1 else f"the {poor[0].proposal} proposal accepts"
        message = (f"{subject} {'few' if low else 'most'} moves ({rates}): "
                   f"{'their' if len(poor) > 1 else 'its'} steps are {direction}. "
                   "The best acceptance is about 0.23 (0.44 for one parameter).")
        if recommended in {row.proposal for row in poor}:
            message += (f" {recommended} is still recommended because it was measured the most efficient of the "
                        f"options tried; {'smaller' if low else 'larger'} steps (its covariance scaled by "
                        f"{'0.5' if low else '2'}) may do better.")
            if low and len(poor) == len(rows):
                message += (" Every option accepting this rarely suggests the posterior's scale changes from one "
                            "region to another (see any varying-scale finding).")
        out.append(Finding("poor-acceptance", "warn", [], message,
                           {"proposals": {row.proposal: row.acceptance for row in poor}}))
    return out


def prior_dominated_findings(posterior_variance, prior_variance, names, informed=None, dim=None, ratio: float = 0.8) -> list:
    """``weakly-identified`` where the posterior spread is close to the prior's.

    Per parameter: posterior variance at least ``ratio`` of the prior variance.
    Per combination: directions of the likelihood-informed split that are
    prior-dominated (``dim - informed`` of them).
    """
    out = []
    share = np.asarray(posterior_variance) / np.asarray(prior_variance)
    weak = [i for i in range(len(names)) if np.isfinite(share[i]) and share[i] >= ratio]
    if weak:
        out.append(
            Finding(
                "weakly-identified",
                "warn",
                [names[i] for i in weak],
                f"the posterior spread of {', '.join(names[i] for i in weak)} is close to the prior's "
                f"({', '.join(f'{np.sqrt(share[i]):.0%} of the prior sd' for i in weak[:5])}): the data say little "
                "about them, and results for them mostly restate the prior.",
                {"posterior_over_prior_variance": {names[i]: float(share[i]) for i in weak}},
            )
        )
    if informed is not None and dim is not None and informed < dim:
        out.append(
            Finding(
                "weakly-identified",
                "info",
                [],
                f"only {informed} of {dim} directions are informed by the data; the other {dim - informed} "
                "combinations stay close to the prior (sampling_map.json holds them; the reduced-basis sampler uses them).",
                {"informed_dimension": informed, "dimension": dim},
            )
        )
    return out


def short_chain_findings(row, steps: int) -> list:
    """``imprecise-ess`` when the recommended run's ESS rests on too few autocorrelation times."""
    if row.ess_reliable:
        return []
    settle = f" about {row.settle_evaluations:,} evaluations for that run would settle it." if row.settle_evaluations else ""
    return [
        Finding(
            "imprecise-ess", "warn", [],
            f"the {row.proposal} run was too short for a precise ESS (fewer than {IACTS_FOR_PRECISE_ESS} "
            f"autocorrelation times over its chains, so the ESS may be off by more than "
            f"{IACT_RELATIVE_ERROR:.0%}); the speed-ups resting on it are imprecise. Raise the budget:"
            f"{settle or ' its IACT is unknown.'}",
            {"proposal": row.proposal, "iact_max": row.iact_max, "steps": steps,
             "evaluations_to_settle": row.settle_evaluations},
        )
    ]


def proof_length_findings(row, proof) -> list:
    """``proof-unsettled`` when the proof's budget ran out before the recommended run was settled.

    Says what is missing (the ESS against the ``IACTS_FOR_PRECISE_ESS`` a reliable
    one needs, R-hat against 1.01) and how many more evaluations of that run would
    settle it, extrapolated from its measured IACT
    (:func:`walktune.recommend.evaluations_still_needed`).
    """
    from .recommend import RHAT_SETTLED, evaluations_still_needed

    if proof.settled:
        return []
    ess = row.ess_per_1000 * row.evaluations / 1000
    missing = []
    if not row.ess_reliable:
        missing.append(f"ESS {ess:.0f} of the {IACTS_FOR_PRECISE_ESS} a reliable estimate needs")
    if not row.max_rhat < RHAT_SETTLED:
        missing.append(f"R-hat {row.max_rhat:.3f} (below {RHAT_SETTLED} wanted)")
    if not row.mixed:
        missing.append("its chains have not mixed")
    more = evaluations_still_needed(row)
    if more is None:
        # Not mixed: the IACT is at least half a chain's length, so a reliable ESS needs at least this many.
        more = max(0, int(np.ceil(IACTS_FOR_PRECISE_ESS * row.steps / 2)) - row.evaluations)
        settle = f"at least {more:,} more evaluations of that run (its IACT is at least half its chains' length)"
    else:
        settle = (f"about {more:,} more evaluations of that run (extrapolated from its measured IACT "
                  f"{row.iact_max:.3g} and R-hat)")
    return [
        Finding(
            "proof-unsettled", "warn", [],
            f"the proof's budget ({proof.budget:,} evaluations) ran out before the {row.proposal} run was settled: "
            f"{'; '.join(missing)}. {settle[0].upper() + settle[1:]} would settle it; raise the budget by that much.",
            {"proposal": row.proposal, "ess": ess, "ess_needed": IACTS_FOR_PRECISE_ESS, "max_rhat": row.max_rhat,
             "rhat_wanted": RHAT_SETTLED, "evaluations": row.evaluations, "evaluations_more": more,
             "proof_budget": proof.budget},
        )
    ]


def acceptance_mismatch_findings(expected: float, row, factor: float = 1.5) -> list:
    """``acceptance-mismatch`` when ``row`` (the tuned covariance's run) accepts ``factor`` times more or less than expected."""
    measured = row.acceptance
    if not (np.isfinite(expected) and expected > 0 and np.isfinite(measured)):
        return []
    if 1 / factor <= measured / expected <= factor:
        return []
    return [
        Finding(
            "acceptance-mismatch", "info", [],
            f"the tuned covariance accepted {measured:.2f} of its moves where {expected:.2f} is expected if the "
            "posterior were Gaussian with the pilot's covariance: the posterior is not Gaussian in shape (or the "
            "pilot's covariance is off), and the measured rate is the one to expect.",
            {"expected": float(expected), "measured": float(measured)},
        )
    ]


def curved_ridge_measured(findings: list, row, proposal: np.ndarray, covariance: np.ndarray, rows=()) -> list:
    """``findings`` with the measured slowness added to an unstraightened ``curved-ridge``.

    The tuned run's largest IACT (``row.iact_max``) beside the diffusion-limit
    prediction for a Gaussian posterior of ``covariance`` under ``proposal``
    (:func:`walktune.theory.predicted_parameter_iact`): how much slower the bend
    made the same proposal. A ridge straightened by bends gets the measured
    efficiency of the run in the straightened coordinates (``transformed-rotated``
    among the proof's ``rows``) beside the tuned covariance's.
    """
    out = []
    straight = next((r for r in rows if r.proposal == "transformed-rotated"), None)
    for finding in findings:
        if finding.kind == "curved-ridge" and finding.evidence.get("bends") and straight is not None \
                and finding.evidence.get("straightened"):
            finding = replace(finding, message=finding.message + (
                f" Measured: the {straight.proposal} run in those coordinates reached {straight.ess_per_1000:.3g} "
                f"(min bulk ESS per 1000 evaluations) against {row.ess_per_1000:.3g} for the {row.proposal} run."),
                evidence={**finding.evidence, "ess_per_1000_straightened": float(straight.ess_per_1000),
                          "ess_per_1000_tuned": float(row.ess_per_1000)})
        if finding.kind == "curved-ridge" and not finding.evidence.get("straightened", True) \
                and np.isfinite(row.iact_max):
            predicted = float(np.max(predicted_parameter_iact(proposal, covariance)))
            finding = replace(finding, message=finding.message + (
                f" Measured: the {row.proposal} run's slowest parameter has an autocorrelation time of "
                f"{row.iact_max:.3g} steps, {row.iact_max / predicted:.3g}x the {predicted:.3g} predicted for a "
                "Gaussian posterior with the pilot's covariance."),
                evidence={**finding.evidence, "iact_measured": float(row.iact_max), "iact_gaussian": predicted})
        out.append(finding)
    return out


def pilot_findings(pilot, pilot_evaluations: int, names: list, start_covariance: np.ndarray | None = None) -> list:
    """``pilot-unsettled`` when the pilot's budget ended before it settled.

    A warning when its last stage was slow (its estimate rested on too few
    independent draws to confirm a shape) and some parameter's spread grew
    1.5-fold or more over the start during the pilot: the posterior may be
    wider still, and the proposals too narrow. Otherwise a note.
    """
    if pilot.converged:
        return []
    last = pilot.stages[-1] if pilot.stages else None
    grew = []
    if start_covariance is not None and last is not None and last.slow:
        ratio = np.sqrt(np.diag(pilot.covariance) / np.diag(start_covariance))
        grew = [(names[i], float(ratio[i])) for i in np.argsort(-ratio) if ratio[i] >= 1.5]
    if not grew:
        why = (f"its last estimate rested on about {last.independent_draws} roughly independent draws, too few "
               "to confirm the covariance" if last is not None and last.slow else
               "the pilot's covariance was still changing")
        return [
            Finding(
                "pilot-unsettled", "info", [],
                f"{why} when the pilot's budget ran out; the advice may improve with a larger budget.",
                {"pilot_evaluations": pilot_evaluations},
            )
        ]
    return [
        Finding(
            "pilot-unsettled", "warn", [name for name, _ in grew],
            f"the pilot did not settle: its last estimate rests on about {last.independent_draws} roughly "
            "independent draws, too few to confirm the covariance, and its spread grew during the pilot (the sd of "
            + ", ".join(f"{name} {r:.2g}-fold" for name, r in grew) + " over the start): the posterior may be "
            "wider still, and proposals built from the pilot too narrow and slow. A larger budget (--budget) "
            "gives the pilot more stages.",
            {"pilot_evaluations": pilot_evaluations, "independent_draws": last.independent_draws,
             "sd_growth": dict(grew)},
        )
    ]


def failed_evaluation_findings(runs: dict) -> list:
    """``failed-evaluations`` for each run in which the log-density raised or returned NaN."""
    out = []
    for name, run in runs.items():
        if run.error_count or run.nan_count:
            first = (run.first_error or "").strip().splitlines()[-1] if run.first_error else "NaN"
            out.append(
                Finding(
                    "failed-evaluations", "warn", [],
                    f"in the {name} run the log-density raised {run.error_count} times and returned NaN "
                    f"{run.nan_count} times; those proposals were rejected. First: {first}",
                    {"errors": run.error_count, "nans": run.nan_count},
                )
            )
    return out


def timeout_findings(timeouts: int, limit: float | None) -> list:
    if not timeouts:
        return []
    limit_text = f" ({limit:g} s)" if limit else ""
    return [
        Finding(
            "timed-out-evaluations", "warn", [],
            f"{timeouts} evaluations did not return within the time limit{limit_text} and were rejected as "
            "failed. A chain that rejects slow regions samples the posterior restricted to where the model "
            "answers in time: raise the limit if those regions matter.",
            {"timeouts": timeouts},
        )
    ]


def collect_findings(posterior, structure, pilot, pilot_evaluations: int, coords, proof, checks,
                     recommended: str = "tuned-covariance", expected_acceptance: float = float("nan")) -> list:
    """Every finding of a tuning job, from its stage results (see :mod:`walktune.stages`), in a fixed order.

    Structure first (correlations, conditioning), then convergence and
    identification, acceptance (and whether it is what was expected), the hard-geometry checks, the new coordinates'
    findings, and last what limits the run itself (short chains, an unsettled
    pilot, failed or timed-out evaluations).
    """
    names = posterior.names
    sd = np.sqrt(np.diag(pilot.covariance))
    findings = correlation_findings(structure, names) + conditioning_findings(structure, names)
    # The chains the posterior table comes from (walktune.modes.table_scope): all of the recommended run's, or one region's.
    findings += convergence_findings(checks.table_stats.rhat, names, recommended)
    findings += identification_findings(sd, posterior.bounds, names)
    if posterior.prior_terms is not None and coords.prior_covariance is not None:
        reparam = coords.reparam
        informed = reparam.informed if reparam is not None and reparam.prior_variance_ratio is not None else None
        findings += prior_dominated_findings(np.diag(pilot.covariance), np.diag(coords.prior_covariance), names,
                                             informed, posterior.dim)
    findings += acceptance_findings(proof.rows, recommended)
    findings += acceptance_mismatch_findings(expected_acceptance, proof.tuned_row)
    from .funnel_advice import note_recommended_coordinates  # funnel_advice builds on this module's Finding

    findings += checks.multimodal + note_recommended_coordinates(checks.funnel, recommended, coords.reparam)
    findings += checks.boundary + checks.heavy_tails
    findings += [Finding("undecided", "info", [], f"{note}; run longer to let walktune check.", {})
                 for note in checks.undecided]
    tuned = (pilot.scale_factor * optimal_scale(posterior.dim)) ** 2 * pilot.covariance
    findings += curved_ridge_measured(coords.findings, proof.tuned_row, tuned, pilot.covariance, proof.rows)
    chosen = next(row for row in proof.rows if row.proposal == recommended)
    # proof-unsettled already says what is missing, with one count that settles both ESS and R-hat.
    findings += proof_length_findings(chosen, proof) or short_chain_findings(chosen, proof.steps[recommended])
    first = pilot.stages[0].proposal_cov / optimal_scale(posterior.dim) ** 2 if pilot.stages else None
    findings += pilot_findings(pilot, pilot_evaluations, names, first)
    findings += failed_evaluation_findings(proof.runs)
    findings += timeout_findings(posterior.counted.timeouts, posterior.time_limit)
    return findings
