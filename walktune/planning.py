"""What a tuning job will spend, said before it spends it.

The job's budget (:class:`walktune.stages.Budget`) fixes, from the dimension,
the chains and the cap alone, the pilot's share, the proof's evaluations
(runs in rounds, :mod:`walktune.proof`) and the evaluations kept for the
geometry checks. The recommended proof run must hold ``IACTS_FOR_PRECISE_ESS``
(250) autocorrelation times over its chains for an ESS within 20% (Sokal 1997; :mod:`walktune.diagnostics`), and even an
optimally tuned random walk with the exact covariance has an IACT of about
``d / 0.33`` steps (Roberts, Gelman and Gilks 1997), so

    trustworthy  <=>  recommended run's evaluations >= 250 / optimal_efficiency(d),

its evaluations being the proof's less the other options' first rounds.

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
from .pilot import PILOT_DRAWS_MEMORY
from .proof import first_round_steps
from .stages import Budget, _minimum_pilot, detection_reserve, minimum_budget, proof_budget_default, proof_thinning


def planned_proof(budget: "Budget") -> int:
    """Evaluations of the whole proof, if the pilot spends its whole share (:func:`walktune.stages.proof_budget`)."""
    if budget.total is None:
        return proof_budget_default(budget.dim, budget.chains)
    left = budget.total - budget.pilot - detection_reserve(budget.dim, budget.total)
    return max(left, 50 * 3 * budget.chains)


def _recommended_share(budget: "Budget", proof: int) -> int:
    """Evaluations the recommended run may get: the proof less the other two options' first rounds."""
    first = min(first_round_steps(budget.dim), max(50, proof // (3 * budget.chains)))
    return max(0, proof - 2 * budget.chains * first)


def trustworthy_budget(dim: int, chains: int) -> int:
    """The least cap on the job whose recommended proof run (as planned) can hold :data:`IACTS_FOR_PRECISE_ESS`
    IACTs of an optimally tuned proposal over its chains."""
    needed = IACTS_FOR_PRECISE_ESS * optimal_iact(dim)

    def enough(cap: int) -> bool:
        plan = Budget.plan(cap, dim, chains)
        return _recommended_share(plan, planned_proof(plan)) >= needed

    low, high = minimum_budget(dim, chains), 2 * minimum_budget(dim, chains)
    while not enough(high):
        low, high = high, 2 * high
    while high - low > max(1000, high // 1000):  # the recommended run's share grows with the cap
        middle = (low + high) // 2
        if enough(middle):
            high = middle
        else:
            low = middle
    return int(-(-high // 1000) * 1000)


#: The sparsest the proof runs may keep their states, as a share of an optimally tuned proposal's IACT: a thinned
#: chain's ESS is the full chain's only while ``k`` is well below its IACT, and a first round of
#: ``max(200, 25 d)`` steps then keeps at least about 80 states per chain for its diagnostics.
MAX_KEPT_EVERY_SHARE = 0.1


def proof_kept_every(budget: "Budget") -> int:
    """Steps per stored draw the proof runs would use under ``budget`` (their draws held near 128 MiB each)."""
    return proof_thinning(budget.chains, planned_proof(budget) // budget.chains, budget.dim)


def max_proof_kept_every(dim: int) -> int:
    """The sparsest thinning of the proof runs that keeps their figures sound (:data:`MAX_KEPT_EVERY_SHARE`)."""
    return max(1, int(MAX_KEPT_EVERY_SHARE * optimal_iact(dim)))


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
        Evaluations planned at most: the pilot's share (mode search included),
        the proof and the geometry checks' reserve.
    pilot, proof, reserve : int
        The pilot's share, the evaluations of the whole proof (when the pilot
        spends its whole share; runs in rounds, those measured slower stop early)
        and the evaluations kept for the geometry checks.
    recommended : int
        Evaluations the recommended run may get: the proof less the other
        options' first rounds.
    iacts : float
        Autocorrelation times of an optimally tuned proposal (``optimal_iact``)
        that the recommended run's chains can hold together.
    trustworthy : bool
        Whether ``iacts`` reaches :data:`IACTS_FOR_PRECISE_ESS`.
    needed : int or None
        The least budget that would (:func:`trustworthy_budget`), when not.
    memory : int
        Bytes of draws the job may keep at once: the pilot stages' (at most
        :data:`walktune.pilot.PILOT_DRAWS_MEMORY`) and the proof runs'.
    """

    total: int | None
    planned: int
    pilot: int
    proof: int
    recommended: int
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
                f"mode search and pilot, up to {self.proof:,} for the proof (fixed-proposal runs in rounds: runs "
                f"measured slower stop early, the recommended one runs on until its figures settle, up to "
                f"{self.recommended:,}), {self.reserve:,} for the geometry checks; at most about {self.planned:,} in "
                "all, with up to "
                f"{self.memory / 1e9:.2g} GB of draws in memory.")
        if self.trustworthy:
            return text
        return (text + f" Too small for trustworthy figures: even an optimally tuned proposal needs about "
                f"{optimal_iact(self.dim):,.0f} steps per autocorrelation time in {self.dim} dimensions, so the "
                f"recommended run could hold {self.iacts:.3g} of the {IACTS_FOR_PRECISE_ESS} its ESS needs; the ESS, speed-ups, "
                f"posterior means and sds it reports will not be trustworthy. A budget of at least {self.needed:,} "
                "would give them enough.")

    def finding(self) -> Finding:
        """The statement as a ``budget`` finding: info, or warn when the budget is too small."""
        return Finding("budget", "info" if self.trustworthy else "warn", [], self.message, {
            "budget": self.total, "planned_evaluations": self.planned, "pilot_evaluations": self.pilot,
            "proof_evaluations": self.proof, "recommended_run_evaluations": self.recommended, "detection_reserve": self.reserve,
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
    proof = planned_proof(budget)
    recommended = _recommended_share(budget, proof)
    reserve = detection_reserve(dim, budget.total)
    pilot = budget.pilot + budget.pilot_extension
    iacts = recommended / optimal_iact(dim)
    trustworthy = iacts >= IACTS_FOR_PRECISE_ESS
    thin = proof_thinning(chains, proof // chains, dim)
    # Pilot stages keep their draws (the mode search and its 2 d^2-point Hessian do not), every k-th state
    # beyond PILOT_DRAWS_MEMORY; the proof's runs together keep at most its evaluations' states, every thin-th.
    pilot_draws = max(pilot - 2 * dim * dim, _minimum_pilot(dim, chains))
    memory = min(8 * dim * pilot_draws, PILOT_DRAWS_MEMORY) + 8 * dim * -(-proof // thin)
    planned = budget.total if budget.total is not None else pilot + proof + reserve
    return BudgetStatement(budget.total, planned, pilot, proof, recommended, reserve, chains, dim, iacts, trustworthy,
                           None if trustworthy else trustworthy_budget(dim, chains), memory)
