"""Constants that the tuning job, the inspection and the output layers share.

Kept apart so that reading draws (:mod:`walktune.inspection`) does not depend
on the tuning job, nor the console on either.
"""

#: advice.json schema written by ``tune`` and ``inspect`` (docs/advice-schema.md).
ADVICE_SCHEMA = "walktune.advice/1"

#: Default ESS the user wants, for the "evaluations needed" advice; 400 over
#: all chains is common practice (Vehtari et al. 2021 suggest 100 per chain).
DEFAULT_TARGET_ESS = 400

CAUTION = (
    "Diagnostics can show that chains have not converged; they can never prove that they have. "
    "A pilot can miss modes or regions it never reached. Confirm results with independent runs "
    "from different starting points before relying on them."
)
