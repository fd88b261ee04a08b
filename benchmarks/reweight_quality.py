"""Re-weighting quality: does the cohort-adjusted effect cover the true within-cohort effect?

Each repetition simulates the reference experiment (50/50, about 10,000 units a day, 28 days)
with a labelled 2-day inflow into ``cards`` whose units are much less engaged, and effects that
differ between sources (the cards lift each source's mean by 5% times a source factor). The
inflow's units carry their own source label, so entry cohorts capture why they differ. The
diagnosis at day 28 supplies the flagged dates; ``detectors.reweight.reweight`` then estimates
the effect by ``source x window`` cohorts with the reference arm's mix as target.

The truth is known: the within-cohort mean differences averaged with the reference arm's
realised source mix (exactly what post-stratification to the reference arm estimates, given the
cohort sizes). Coverage is the share of 95% intervals containing it; bias over SE is
``|mean(estimate - truth)| / mean(SE)`` with SE from the interval's half-width / 1.96. The naive
difference of arm means is scored against the same truth.
"""

from __future__ import annotations

import multiprocessing
import zlib
from dataclasses import replace
from typing import Any

import numpy as np

from detectors import diagnose
from detectors.reweight import reweight

from .detection import BASE_SEED, wilson
from .simulate import Inflow, Simulation, reference_scenario, simulate

METRIC = "routes_saved"
Z95 = 1.959963984540054


def scenario_for(rng: np.random.Generator, labeled: bool = True) -> Any:
    base = reference_scenario(0.0)
    start = int(rng.integers(2, base.n_days - 1))
    inflow = Inflow(arm=1, start=start, length=2, size=0.15,
                    label="reactivation_email" if labeled else None, engagement=0.35)
    return replace(base, inflows=(inflow,))


def _estimate_fields(estimate: Any) -> tuple[float, float, float]:
    """(difference, ci_low, ci_high) of an estimate object or mapping."""
    if isinstance(estimate, dict):
        return float(estimate["difference"]), float(estimate["ci_low"]), float(estimate["ci_high"])
    return float(estimate.difference), float(estimate.ci_low), float(estimate.ci_high)


def cohort_truth(result: Any, sim: Simulation, arm: int = 1) -> float:
    """The within-cohort effect averaged with the target weights the method reports (cohort
    names are ``SOURCE`` or ``SOURCE|window``; simulated effects depend on the source only)."""
    effects = sim.cohort_effects[METRIC]
    index = {name: i for i, name in enumerate(sim.table.sources)}
    return float(sum(c.weight * (effects[arm, index[c.name.split("|")[0]]]
                                 - effects[0, index[c.name.split("|")[0]]])
                     for c in result.cohorts))


def one_rep(rep: int, labeled: bool = True, target: str = "reference_arm") -> dict[str, Any]:
    rng = np.random.default_rng([BASE_SEED, zlib.crc32(b"reweight"), rep])
    sim: Simulation = simulate(scenario_for(rng, labeled), rng)
    diagnosis = diagnose(sim.table, sim.schedule)
    flagged = sorted({d.date for d in diagnosis.flagged_days})
    try:
        result = reweight(sim.table, METRIC, target=target, by=("source", "window"),
                          flagged_dates=flagged)
    except Exception as error:  # recorded, not hidden: the summary counts them
        return {"rep": rep, "error": f"{type(error).__name__}: {error}"}
    from_weights = cohort_truth(result, sim)
    # For the reference-arm target the truth is computed independently of the method's output
    # (the reference arm's realised source mix); the two must agree.
    truth = sim.true_effect(METRIC, arm=1) if target == "reference_arm" else from_weights
    comparison = next(c for c in result.comparisons if c.arm == sim.table.arms[1])
    out: dict[str, Any] = {"rep": rep, "truth": truth, "flagged_days": len(flagged),
                           "truth_gap": abs(truth - from_weights)}
    for name in ("naive", "adjusted"):
        diff, low, high = _estimate_fields(getattr(comparison, name))
        out[name] = {"estimate": diff, "low": low, "high": high,
                     "se": (high - low) / (2 * Z95), "covers": bool(low <= truth <= high)}
    return out


def summarise(reps: list[dict[str, Any]]) -> dict[str, Any]:
    good = [r for r in reps if "error" not in r]
    errors = [r["error"] for r in reps if "error" in r]
    details: dict[str, Any] = {"description": __doc__.strip().split("\n\n")[1].replace("\n", " "),
                               "runs": len(reps), "errors": len(errors)}
    if errors:
        details["first_errors"] = errors[:3]
    figures: dict[str, Any] = {}
    if not good:
        figures["reweight.ci_coverage"] = "not run: every repetition failed"
        figures["reweight.abs_bias_over_se"] = "not run: every repetition failed"
        return {"figures": figures, "details": details}
    truth = np.array([r["truth"] for r in good])
    details["mean_truth"] = float(truth.mean())
    details["max_truth_gap"] = float(max(r["truth_gap"] for r in good))
    for name in ("adjusted", "naive"):
        est = np.array([r[name]["estimate"] for r in good])
        se = np.array([r[name]["se"] for r in good])
        covers = np.array([r[name]["covers"] for r in good])
        bias = float(np.mean(est - truth))
        details[name] = {
            "ci_coverage": float(covers.mean()),
            "coverage_wilson95": wilson(int(covers.sum()), len(covers)),
            "mean_bias": bias, "mean_se": float(se.mean()),
            "abs_bias_over_se": abs(bias) / float(se.mean()),
            "bias_monte_carlo_se": float(np.std(est - truth, ddof=1) / np.sqrt(len(est))),
            "empirical_sd_over_mean_se": float(np.std(est - truth, ddof=1) / se.mean()),
        }
    figures["reweight.ci_coverage"] = details["adjusted"]["ci_coverage"]
    figures["reweight.abs_bias_over_se"] = details["adjusted"]["abs_bias_over_se"]
    figures["reweight.naive_ci_coverage"] = details["naive"]["ci_coverage"]
    figures["reweight.naive_abs_bias_over_se"] = details["naive"]["abs_bias_over_se"]
    return {"figures": figures, "details": details}


def _unlabeled_rep(rep: int) -> dict[str, Any]:
    return one_rep(rep, labeled=False)


def _unlabeled_pooled_rep(rep: int) -> dict[str, Any]:
    return one_rep(rep, labeled=False, target="pooled_unflagged")


def run(full: bool, jobs: int = 2) -> dict[str, Any]:
    """The labelled case gives the figures; the same experiments with the inflow unlabelled
    (mixed into organic, so no cohort captures it) are reported beside them as a caution."""
    count = 2000 if full else 20
    if jobs > 1:
        with multiprocessing.get_context("fork").Pool(jobs) as pool:
            reps = pool.map(one_rep, range(count), chunksize=25)
            unlabeled = pool.map(_unlabeled_rep, range(count // 2), chunksize=25)
            pooled = pool.map(_unlabeled_pooled_rep, range(count // 2), chunksize=25)
    else:
        reps = [one_rep(i) for i in range(count)]
        unlabeled = [_unlabeled_rep(i) for i in range(count // 2)]
        pooled = [_unlabeled_pooled_rep(i) for i in range(count // 2)]
    out = summarise(reps)
    for key, runs in (("unlabeled_inflow", unlabeled),
                      ("unlabeled_inflow_pooled_unflagged", pooled)):
        other = summarise(runs)["details"]
        out["details"][key] = {k: other[k] for k in ("runs", "errors", "adjusted", "naive")
                               if k in other}
    return out
