"""What a varying-scale finding says, and which fix it offers.

One convention for the size of the change, in the model's curvature and in
the draws alike: the spread of the affected parameters is ``X`` times wider
at one end of the candidate than at the other (``X >= 1``).

The fix offered depends on the structure found:

* a funnel over a group of effects (two or more parameters whose spread
  follows the scale the same way, around a location that can be named):
  the non-centred parameterisation, ``effect_j = location + scale * z_j``
  (Papaspiliopoulos, Roberts and Sköld 2007);
* no such group, the candidate positive: a log transform of the positive
  parameters (what walktune's transformed options already do; see
  :func:`note_recommended_coordinates`);
* otherwise: sampling in the coordinates walktune recommends.

Severity comes from the change measured in the draws: a proposal tuned to
one spread loses efficiency at least in proportion to the ratio of spreads
where the spread differs (a step ``r`` times the local sd is accepted about
``1 / r`` as often, and one ``r`` times too short moves ``r^2`` times less
per step; Gelman, Roberts and Gilks 1996, Roberts, Gelman and Gilks 1997),
so at :data:`STALLING_SPREAD_RATIO` a fixed proposal loses an order of
magnitude at one end: critical. Below: warn.

References
----------
Papaspiliopoulos, O., Roberts, G. O. and Sköld, M. (2007). A general framework for the
parametrization of hierarchical models. Statistical Science, 22(1), 59-73.
Gelman, A., Roberts, G. O. and Gilks, W. R. (1996). Efficient Metropolis jumping rules.
Bayesian Statistics 5, 599-607.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from .findings import Finding

#: Spread ratio (measured in the draws) at which a fixed proposal stalls at one end: efficiency
#: there falls at least like the ratio of spreads (see the module docstring), a tenfold loss here.
STALLING_SPREAD_RATIO = 10.0

#: A parameter without a declared bound counts as positive (a scale by type) when its draws are
#: all above 0 and span at least this ratio: a scale near its neck, not a location far from 0
#: (a yield of 6 +/- 1 is positive too). Common practice, a decade.
POSITIVE_SPAN = 10.0


def wider(factor: float) -> float:
    """The spread ratio as ``times wider at one end than the other`` (>= 1)."""
    factor = float(factor)
    if not np.isfinite(factor) or factor <= 0:
        return float("inf")
    return max(factor, 1.0 / factor)


def times(factor: float) -> str:
    """'2.3 times', '37 times', or a bound past any useful precision."""
    x = wider(factor)
    if x >= 1000:
        return "over 1000 times"
    return f"{x:.2g} times" if x < 10 else f"{x:.0f} times"


def positive_type(flat: np.ndarray, bounds: np.ndarray, index: int) -> bool:
    """Whether parameter ``index`` is positive by declaration (lower bound 0) or by its draws (see :data:`POSITIVE_SPAN`)."""
    low, high = bounds[index]
    if np.isfinite(low) and low >= 0 and not np.isfinite(high):
        return True
    if np.isfinite(low) or np.isfinite(high):
        return False
    column = flat[:, index]
    return bool(np.min(column) > 0 and np.max(column) >= POSITIVE_SPAN * np.min(column))


def _location_parameter(flat: np.ndarray, scale: int, affected: list) -> int | None:
    """The parameter the affected ones are centred on, if one stands out; else None.

    In a centred hierarchical model the group effects are conditionally
    independent given their location and scale, and each is tied to the
    location: in the partial correlations (from the inverse of the draws'
    correlation matrix) the location links to every effect, an effect only to
    the location. The candidate with the largest sum of absolute partial
    correlations with the affected parameters counts when that sum is at
    least twice the runner-up's.
    """
    d = flat.shape[1]
    if d < 4:
        return None
    precision = np.linalg.pinv(np.atleast_2d(np.corrcoef(flat.T)))
    scale_of = np.sqrt(np.abs(np.diag(precision)))
    partial = np.abs(precision / np.outer(scale_of, scale_of))
    scores = np.array([sum(partial[k, i] for i in affected if i != k) if k != scale else -np.inf for k in range(d)])
    first, second = np.argsort(-scores)[:2]
    return int(first) if scores[first] >= 2 * scores[second] and len(affected) - (first in affected) >= 2 else None


def effect_group(flat: np.ndarray, scale: int, affected: list, log_ratio: np.ndarray):
    """A group of effects whose spread follows the scale, and their location; or None.

    The effects are the affected parameters whose log spread ratio has the
    sign of the majority (their spread shrinks together toward one end of
    the scale), the location excepted. A group needs two or more effects and
    a location: a parameter they are all tied to (:func:`_location_parameter`),
    or else a common centre of exchangeable effects (their means within one
    median sd of each other, and their sds within :data:`POSITIVE_SPAN` of each
    other). Returns ``(effects, location index or None, common centre or None)``.
    """
    signs = np.sign([log_ratio[i] for i in affected])
    majority = 1.0 if np.sum(signs > 0) >= np.sum(signs < 0) else -1.0
    location = _location_parameter(flat, scale, affected)
    effects = [i for i in affected if np.sign(log_ratio[i]) == majority and i != location]
    if len(effects) < 2:
        return None
    if location is not None:
        return effects, location, None
    means, sds = flat[:, effects].mean(axis=0), flat[:, effects].std(axis=0)
    if np.ptp(means) <= np.median(sds) and np.max(sds) <= POSITIVE_SPAN * max(np.min(sds), 1e-300):
        return effects, None, float(np.mean(means))
    return None


def _scale_expression(name: str, low: float, high: float, sign: float) -> str:
    if not np.isfinite(low) and not np.isfinite(high):
        return f"exp({name})" if sign >= 0 else f"exp(-{name})"
    if np.isfinite(low) and not np.isfinite(high):
        base = name if low == 0 else f"({name} - {low:g})"
        return base if sign >= 0 else f"1 / {base}"
    return f"s({name})"


def noncentred_rewrite(scale: int, group, names: list, bounds: np.ndarray, sign: float = 1.0) -> str:
    """The non-centred parameterisation spelled out for this model's parameters (Papaspiliopoulos et al. 2007)."""
    effects, location, centre_value = group
    low, high = bounds[scale]
    name = names[scale]
    expr = _scale_expression(name, low, high, sign)
    centre = names[location] if location is not None else "m"
    shown = [names[i] for i in effects]
    lines = [f"{e} = {centre} + {expr} * z_{e}" for e in shown]
    if len(lines) > 3:
        lines = lines[:2] + ["...", lines[-1]]
    where = "" if location is not None else (f" (m: their common centre, about {centre_value:.3g} in the draws; "
                                             "a location parameter if the model has one, else a constant)")
    bounded = "" if not expr.startswith("s(") else f" (s({name}): the spread that {name} sets)"
    return (f"{name} acts as the scale of the group effects {', '.join(shown[:5])}{' ...' if len(shown) > 5 else ''}"
            f"{'' if location is None else ' around ' + names[location]}: use the non-centred parameterisation "
            "(Papaspiliopoulos, Roberts and Sköld 2007): sample standardised effects z ~ N(0, 1) in their place and "
            f"set {'; '.join(lines)}{where}{bounded} inside the log-density, whose prior on the effects becomes "
            "N(0, 1) on each z.")


def other_fix(scale: int, affected: list, names: list, bounds: np.ndarray, flat: np.ndarray) -> tuple[str, str, list]:
    """The fix when no group of effects shares the scale: ``(text, fix kind, positive parameters)``."""
    positive = [i for i in [scale] + list(affected) if positive_type(flat, bounds, i)]
    if scale in positive:
        listed = ", ".join(f"log({names[i]})" for i in positive)
        return (f"No group of effects shares a location and this scale, so the non-centred form does not apply; "
                f"what fits is a log transform of the positive parameters, sampling {listed}: it removes their "
                "bounds and shortens their right tails, though some change of spread may remain (the measured "
                "rows of the comparison show which proposal copes best).", "log-transform",
                [names[i] for i in positive])
    return ("No group of effects shares a location and this scale, so the non-centred form does not apply; sample "
            "in the coordinates walktune recommends (sampling_map.json) and compare the rows of the comparison.",
            "coordinates", [names[i] for i in positive])


def severity(measured_factor: float) -> str:
    """``critical`` when the measured spread ratio stalls a fixed proposal (:data:`STALLING_SPREAD_RATIO`), else ``warn``."""
    return "critical" if wider(measured_factor) >= STALLING_SPREAD_RATIO else "warn"


def listed(names: list, indices: list) -> str:
    return f"{', '.join(names[i] for i in indices[:5])}{' ...' if len(indices) > 5 else ''}"


def narrow_end(name: str, factor: float) -> str:
    """Which end of the candidate is narrow: the spread ratio is top / bottom."""
    return f"narrower at high {name}" if factor < 1 else f"narrower at low {name}"


def note_recommended_coordinates(findings: list, recommended: str, reparam) -> list:
    """Add to varying-scale findings without a non-centred rewrite what walktune's own options already do.

    ``reparam`` is the job's :class:`walktune.reparam.SamplingMap` (or None):
    when it samples the candidate in log (or logit) coordinates, the finding
    says whether the recommended option is the one that does so.
    """
    out = []
    kinds = {} if reparam is None else {t.name: t.kind for t in reparam.transforms}
    in_map = recommended in ("transformed-rotated", "reduced-basis")
    for finding in findings:
        fix = finding.evidence.get("fix")
        if finding.kind != "varying-scale" or fix not in ("log-transform", "coordinates"):
            out.append(finding)
            continue
        logged = [p for p in finding.evidence.get("positive", []) if kinds.get(p) in ("log", "logit")]
        if not logged:
            out.append(finding)
            continue
        what = ", ".join(f"{kinds[p]}({p})" for p in logged)
        if in_map:
            note = f" walktune's recommended option ({recommended}, sampling_map.json) already samples {what}."
        else:
            note = (f" walktune's transformed-rotated run samples {what} (sampling_map.json); the comparison shows "
                    f"whether it beats the recommended {recommended} here.")
        out.append(replace(finding, message=finding.message + note,
                           evidence={**finding.evidence, "recommended_samples_log": in_map}))
    return out


def fix_text(scale, affected, log_ratio, names, bounds, flat, sign, structural: bool) -> tuple[str, dict]:
    """The advice sentence and its evidence (``fix``, ``positive``) for a varying-scale finding."""
    group = effect_group(flat, scale, affected, log_ratio) if structural else None
    if group is not None:
        return noncentred_rewrite(scale, group, names, bounds, sign), {"fix": "non-centred", "positive": []}
    text, kind, positive = other_fix(scale, affected, names, bounds, flat)
    return text, {"fix": kind, "positive": positive}


def draws_finding(j, factor, affected, log_ratio, names, bounds, flat, structural: bool, scale_hint=None) -> Finding:
    """A varying-scale finding from the spread of the draws alone (:func:`walktune.funnels.varying_scale_findings`)."""
    sign = 1.0 if factor >= 1 else -1.0
    advice, fix = fix_text(j, affected, log_ratio, names, bounds, flat, sign, structural)
    what = "a funnel" if structural else "a varying scale, not a funnel of this parameter"
    hint = ""
    if not structural and positive_type(flat, bounds, j):
        hint = (f" {names[j]} is positive, but the spread does not narrow together toward its low end as a scale's "
                "would.")
    elif not structural:
        hint = (f" {names[j]} is not a scale by type (neither positive nor a log-scale whose change the others "
                "follow alone)" + (f", and {names[scale_hint]}, a positive parameter whose own spread changes "
                                   f"along {names[j]}, may be the scale that sets it" if scale_hint is not None else "")
                + ".")
    return Finding(
        "varying-scale", severity(factor), [names[j]] + [names[i] for i in affected],
        f"the spread of {listed(names, affected)} is about {times(factor)} wider at one end of {names[j]} than the "
        f"other ({what}; from the spread of the draws between their bottom and top fifths of {names[j]}, "
        f"{narrow_end(names[j], factor)}): no single step size fits both ends.{hint} {advice}",
        {"parameter": names[j], "spread_factor": wider(factor), "measured_factor": float(factor),
         "affected": [names[i] for i in affected], "status": "confirmed", "funnel_structure": bool(structural),
         **fix},
    )
