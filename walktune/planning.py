"""What a tuning job will spend, said before it spends it.

The job's budget (:class:`walktune.stages.Budget`) fixes, from the dimension,
the chains and the cap alone, the pilot's share, the proof runs' steps per
chain and the evaluations kept for the geometry checks. Each proof run must
hold ``IACTS_FOR_PRECISE_ESS`` (250) autocorrelation times over its chains for
an ESS within 20% (Sokal 1997; :mod:`walktune.diagnostics`), and even an
optimally tuned random walk with the exact covariance has an IACT of about
``d / 0.33`` steps (Roberts, Gelman and Gilks 1997), so

    trustworthy  <=>  chains * proof_steps >= 250 / optimal_efficiency(d).

A budget that fails this cannot give trustworthy figures whatever the pilot
finds; :func:`budget_statement` says so, with the least budget that would.

References
----------
Roberts, G. O., Gelman, A. and Gilks, W. R. (1997). Weak convergence and optimal
scaling of random walk Metropolis algorithms. Annals of Applied Probability, 7(1), 110-120.
Sokal, A. (1997). Monte Carlo methods in statistical mechanics: foundations and new algorithms.
"""

from __future__ import annotations

from dataclasses import dataclass

from . import theory
from .diagnostics import IACTS_FOR_PRECISE_ESS
from .findings import Finding
from .stages import Budget, _minimum_pilot, detection_reserve, minimum_budget, proof_steps_default, proof_thinning


def _planned_proof_steps(budget: "Budget") -> int:
    """Steps per chain of each of the three proof runs in the user's parameters, if the pilot spends its whole share."""
    if budget.total is None:
        return proof_steps_default(budget.dim)
    left = budget.total - budget.pilot - detection_reserve(budget.dim, budget.total)
    return max(50, left // (3 * budget.chains))


def trustworthy_budget(dim: int, chains: int) -> int:
    """The least cap on the job whose proof runs (as planned) hold :data:`IACTS_FOR_PRECISE_ESS` IACTs of an
    optimally tuned proposal over their chains."""
    needed_steps = -(-IACTS_FOR_PRECISE_ESS * optimal_iact(dim) // chains)
    low, high = minimum_budget(dim, chains), 2 * minimum_budget(dim, chains)
    while _planned_proof_steps(Budget.plan(high, dim, chains)) < needed_steps:
        low, high = high, 2 * high
    while high - low > max(1000, high // 1000):  # the planned steps grow with the cap
        middle = (low + high) // 2
        if _planned_proof_steps(Budget.plan(middle, dim, chains)) >= needed_steps:
            high = middle
        else:
            low = middle
    return int(-(-high // 1000) * 1000)


def optimal_iact(dim: int) -> float:
    """IACT of an optimally scaled random walk with the exact covariance, in steps: ``1 / efficiency`` (about ``d / 0.33``)."""
    return 1.0 / theory.optimal_efficiency(dim)


@dataclass(frozen=True)
class BudgetStatement:
    """What the job will spend, said before it spends it (:func:`budget_statement`).

    Attributes
    ----------
    total : int or None
        The cap on the job (None: the defaults).
    planned : int
        Evaluations planned: the pilot's share (mode search included), three proof
        runs in the user's parameters and the geometry checks' reserve.
    pilot, proof_steps, reserve : int
        The pilot's share, the steps per chain of each proof run (when the pilot
        spends its whole share) and the evaluations kept for the geometry checks.
    iacts : float
        Autocorrelation times of an optimally tuned proposal (``optimal_iact``)
        that each proof run's chains hold together.
    trustworthy : bool
        Whether ``iacts`` reaches :data:`IACTS_FOR_PRECISE_ESS`.
    needed : int or None
        The least budget that would (:func:`trustworthy_budget`), when not.
    memory : int
        Bytes of draws the job may keep at once (pilot stages and proof runs).
    """

    total: int | None
    planned: int
    pilot: int
    proof_steps: int
    reserve: int
    chains: int
    dim: int
    iacts: float
    trustworthy: bool
    needed: int | None
    memory: int

    @property
    def message(self) -> str:
        cap = f"a budget of {self.total:,} evaluations" if self.total is not None else "the default budget"
        text = (f"{cap} for {self.dim} parameters and {self.chains} chains: up to {self.pilot:,} for the "
                f"mode search and pilot, 3 proof runs of {self.proof_steps:,} steps per chain "
                f"({3 * self.chains * self.proof_steps:,} evaluations; more runs when new coordinates help), "
                f"{self.reserve:,} for the geometry checks; about {self.planned:,} in all, with up to "
                f"{self.memory / 1e9:.2g} GB of draws in memory.")
        if self.trustworthy:
            return text
        return (text + f" Too small for trustworthy figures: even an optimally tuned proposal needs about "
                f"{optimal_iact(self.dim):,.0f} steps per autocorrelation time in {self.dim} dimensions, so each proof "
                f"run would hold {self.iacts:.3g} of the {IACTS_FOR_PRECISE_ESS} its ESS needs; the ESS, speed-ups, "
                f"posterior means and sds it reports will not be trustworthy. A budget of at least {self.needed:,} "
                "would give them enough.")

    def finding(self) -> Finding:
        """The statement as a ``budget`` finding: info, or warn when the budget is too small."""
        return Finding("budget", "info" if self.trustworthy else "warn", [], self.message, {
            "budget": self.total, "planned_evaluations": self.planned, "pilot_evaluations": self.pilot,
            "proof_steps_per_chain": self.proof_steps, "detection_reserve": self.reserve,
            "iacts_per_proof_run": self.iacts, "iacts_needed": IACTS_FOR_PRECISE_ESS,
            "trustworthy": self.trustworthy, "trustworthy_budget": self.needed, "draws_memory_bytes": self.memory,
        })


def budget_statement(budget: Budget) -> BudgetStatement:
    """What a job with this budget will spend, and whether its proof runs can give trustworthy figures.

    Needs only the dimension, the chains and the cap, so it is said before any
    evaluation. Each proof run must hold :data:`IACTS_FOR_PRECISE_ESS` IACTs over
    its chains for an ESS within 20% (Sokal 1997; walktune.diagnostics); even
    with the exact covariance the IACT is about ``d / 0.33``
    (:func:`optimal_iact`), so a budget whose proof runs are shorter cannot give
    trustworthy figures whatever the pilot finds.
    """
    dim, chains = budget.dim, budget.chains
    steps = _planned_proof_steps(budget)
    reserve = detection_reserve(dim, budget.total)
    pilot = budget.pilot + budget.pilot_extension
    iacts = chains * steps / optimal_iact(dim)
    trustworthy = iacts >= IACTS_FOR_PRECISE_ESS
    thin = proof_thinning(chains, steps, dim)
    # Pilot stages keep their draws (the mode search and its 2 d^2-point Hessian do not).
    pilot_draws = max(pilot - 2 * dim * dim, _minimum_pilot(dim, chains))
    memory = 8 * dim * (pilot_draws + 3 * chains * (-(-steps // thin)))
    planned = budget.total if budget.total is not None else pilot + 3 * chains * steps + reserve
    return BudgetStatement(budget.total, planned, pilot, steps, reserve, chains, dim, iacts, trustworthy,
                           None if trustworthy else trustworthy_budget(dim, chains), memory)
