"""Detection quality: false alarms, power against an oracle, delay, localisation, attribution.

Every simulated experiment runs 28 days and is looked at daily: at each look ``diagnose`` sees
the data up to that day (``as_of``), as a team checking the dashboard every morning would.

*Alert* means: the diagnosis has at least one ``Diagnosis.findings()`` entry with severity
``"alert"`` (whole-period SRM, a skewed day in a Holm-significant window, or a skewed source).
The run also checks that this agrees with ``status == "alert"`` on every look and reports any
disagreement.

For an experiment with an inflow, *detected* means an alert at a look on or after the inflow's
first day (an alert before it is a false alarm and is counted separately). Delay is the look's
day minus the inflow's first day (0 = alerted on the evening of the first inflow day).
Localisation compares the alert-flagged days of the diagnosis at the last look (day 28) with the
inflow days (Jaccard index); attribution checks that the source with the largest summed excess
over those alert days is the inflow's own source label (without alert days, the skewed-source
alert with the smallest p-value names the source).

Comparators, on the same simulated experiments:

* ``oracle``: knows the inflow days and tests exactly those days' arm counts against the plan
  (Pearson chi-square, the likelihood-ratio-equivalent score test for a binomial/multinomial
  share), at a threshold set analytically (chi-square with arms - 1 df) to Inrush's measured A/A
  false alarm rate in the matching A/A family.
* ``overall_end``: one chi-square of the whole period at the end, alert at p < 0.0005; it points
  at every day of the experiment.
* ``daily_uncorrected``: a chi-square on each day's counts at p < 0.05, no multiplicity
  correction; it flags the days whose own test is below 0.05.
For both baselines the attributed source is the one with the largest excess in the arm with the
largest relative excess over the days they flag.
"""

from __future__ import annotations

import zlib
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
from scipy import stats

from detectors import DiagnosisConfig, diagnose
from detectors.srm import chisquare_rows

from .simulate import Inflow, Scenario, Simulation, reference_scenario, simulate

BASE_SEED = 20260302
ALERT = "alert"
BASELINE_OVERALL_ALPHA = 0.0005
BASELINE_DAILY_ALPHA = 0.05
POWER_CURVE_SIZES = (0.02, 0.04, 0.06, 0.08, 0.10, 0.15, 0.20)
RAMP = ((0, (0.9, 0.1)), (7, (0.75, 0.25)), (14, (0.5, 0.5)))


@dataclass(frozen=True, slots=True)
class Task:
    family: str
    rep: int


@dataclass(frozen=True)
class RunOutcome:
    """What one simulated experiment gave each method."""

    family: str
    rep: int
    n_arms: int
    inflow_start: int | None
    inflow_days: tuple[int, ...]
    inflow_arm: int | None
    inflow_label: str | None
    inflow_size: float
    # Inrush
    first_alert_look: int | None           # first look with any alert (maybe before the inflow)
    detect_look: int | None                # first alert look on/after the inflow's first day
    kinds_at_detection: tuple[str, ...]
    kinds_at_first_alert: tuple[str, ...]
    final_alert_days: tuple[int, ...]
    final_top_source: str | None
    status_disagreements: int
    looks_run: int
    # comparators
    oracle_statistic: float
    overall_end_p: float
    overall_end_top_source: str | None
    daily_p: tuple[float, ...]
    daily_top_source: str | None


def seed_for(family: str, rep: int) -> list[int]:
    return [BASE_SEED, zlib.crc32(family.encode()), rep]


def draw_scenario(family: str, rng: np.random.Generator) -> Scenario:
    """The scenario of one repetition of ``family`` (inflow timing and size drawn here)."""
    base = reference_scenario(0.0)
    if family == "aa_2arm":
        return base
    if family == "aa_3arm":
        return reference_scenario(0.0, arms=3)
    if family == "aa_ramp":
        return replace(base, allocation=RAMP)
    if family in ("ref_unlabeled", "ref_labeled"):
        start = int(rng.integers(2, base.n_days - 2 + 1))
        return reference_scenario(0.08, labeled=family == "ref_labeled", start=start)
    if family.startswith("curve_"):
        size = float(family.removeprefix("curve_"))
        start = int(rng.integers(2, base.n_days - 2 + 1))
        return reference_scenario(size, start=start)
    if family == "mixed":
        arms = int(rng.choice([2, 3], p=[0.7, 0.3]))
        scenario = reference_scenario(0.0, arms=arms)
        if arms == 2 and rng.random() < 0.3:
            scenario = replace(scenario, allocation=RAMP)
        length = int(rng.integers(1, 4))
        start = int(rng.integers(2, scenario.n_days - length + 1))
        size = float(rng.uniform(0.02, 0.20))
        labeled = bool(rng.random() < 0.5)
        inflow = Inflow(arm=int(rng.integers(1, arms)), start=start, length=length, size=size,
                        label="reactivation_email" if labeled else None,
                        engagement=float(rng.uniform(0.2, 0.7)))
        return scenario.with_inflows(inflow)
    raise ValueError(f"unknown family {family!r}")


def has_alert(diagnosis: Any) -> tuple[bool, bool]:
    """(any finding with severity alert, status == alert)."""
    by_findings = any(f.severity == ALERT for f in diagnosis.findings())
    return by_findings, diagnosis.status == ALERT


def run_task(task: Task, config: DiagnosisConfig | None = None) -> RunOutcome:
    """Simulate one experiment and evaluate every method on it."""
    rng = np.random.default_rng(seed_for(task.family, task.rep))
    scenario = draw_scenario(task.family, rng)
    sim = simulate(scenario, rng)
    return evaluate(sim, task, config or DiagnosisConfig())


def evaluate(sim: Simulation, task: Task, config: DiagnosisConfig) -> RunOutcome:
    scenario, table, schedule = sim.scenario, sim.table, sim.schedule
    n_days = scenario.n_days
    inflow = scenario.inflows[0] if scenario.inflows else None
    start = inflow.start if inflow else None
    inflow_days = tuple(int(d) for d in np.flatnonzero(sim.inflow_days))
    dates = sim.dates

    first_alert = detect = None
    kinds: tuple[str, ...] = ()
    first_kinds: tuple[str, ...] = ()
    disagreements = looks = 0
    final = None
    for look in range(n_days):
        if detect is not None and look < n_days - 1:
            continue  # detected already; only the last look (localisation) is still needed
        diagnosis = diagnose(table, schedule, config=config, as_of=dates[look])
        looks += 1
        alert, status_alert = has_alert(diagnosis)
        disagreements += int(alert != status_alert)
        if alert and first_alert is None:
            first_alert = look
            first_kinds = tuple(sorted({f.kind for f in diagnosis.findings()
                                        if f.severity == ALERT}))
        if alert and detect is None and start is not None and look >= start:
            detect = look
            kinds = tuple(sorted({f.kind for f in diagnosis.findings() if f.severity == ALERT}))
        if look == n_days - 1:
            final = diagnosis
    assert final is not None
    index_of = {d: i for i, d in enumerate(dates)}
    final_alert_days = tuple(sorted(index_of[d] for d in final.alert_days))
    excess: dict[str, float] = {}
    for day in final.flagged_days:
        if day.severity == ALERT:
            for share in day.sources:
                excess[share.source] = excess.get(share.source, 0.0) + share.excess
    top = max(excess, key=lambda s: excess[s]) if excess else None
    if top is None:
        # No alert day at the last look: a skewed-source alert still names a source.
        skewed = [s for s in final.sources if s.skewed]
        if skewed:
            top = min(skewed, key=lambda s: s.p_value).source

    counts = table.daily_totals.astype(float)
    planned = schedule.weights_on(table.dates)
    expected = counts.sum(axis=1, keepdims=True) * planned
    if inflow_days:
        window = list(inflow_days)
        oracle, _ = chisquare_rows(counts[window].sum(axis=0)[None],
                                   expected[window].sum(axis=0)[None])
        oracle_statistic = float(oracle[0])
    else:
        oracle_statistic = float("nan")
    _, overall_p = chisquare_rows(counts.sum(axis=0)[None], expected.sum(axis=0)[None])
    _, daily_p = chisquare_rows(counts, expected)
    daily_flagged = np.flatnonzero(np.nan_to_num(daily_p, nan=1.0) < BASELINE_DAILY_ALPHA)
    return RunOutcome(
        task.family, task.rep, len(scenario.arms), start, inflow_days,
        inflow.arm if inflow else None, inflow.label if inflow else None,
        inflow.size if inflow else 0.0,
        first_alert, detect, kinds, first_kinds, final_alert_days, top, disagreements, looks,
        oracle_statistic, float(overall_p[0]),
        _top_source(table, expected, np.arange(n_days)),
        tuple(float(p) for p in daily_p),
        _top_source(table, expected, daily_flagged) if daily_flagged.size else None)


def _top_source(table: Any, expected: np.ndarray, days: np.ndarray) -> str | None:
    """Source with the largest excess in the arm with the largest relative excess on ``days``."""
    if days.size == 0:
        return None
    observed = table.daily_totals[days].sum(axis=0)
    planned_total = expected[days].sum(axis=0)
    arm = int(np.argmax((observed - planned_total) / np.maximum(planned_total, 1e-12)))
    entered = table.entered[days]
    by_source = entered.sum(axis=1, keepdims=True) * (expected[days] / np.maximum(
        expected[days].sum(axis=1, keepdims=True), 1e-12))[:, :, None]
    excess = (entered - by_source)[:, arm, :].sum(axis=0)
    return table.sources[int(np.argmax(excess))]


# ----------------------------------------------------------------------------- summaries

def families(reps: dict[str, int]) -> list[Task]:
    return [Task(family, rep) for family, count in reps.items() for rep in range(count)]


def default_reps(full: bool) -> dict[str, int]:
    if full:
        reps = {"aa_2arm": 3000, "aa_3arm": 1000, "aa_ramp": 1000, "ref_unlabeled": 1000,
                "ref_labeled": 600, "mixed": 600}
        reps |= {f"curve_{s:g}": 300 for s in POWER_CURVE_SIZES if s != 0.08}
    else:
        reps = {"aa_2arm": 12, "aa_3arm": 4, "aa_ramp": 4, "ref_unlabeled": 10,
                "ref_labeled": 6, "mixed": 6}
        reps |= {f"curve_{s:g}": 3 for s in POWER_CURVE_SIZES if s != 0.08}
    return reps


def _rate(flags: Sequence[bool]) -> float | None:
    return float(np.mean(flags)) if len(flags) else None


def _median(values: Sequence[float]) -> float | None:
    return float(np.median(values)) if len(values) else None


def _jaccard(a: Iterable[int], b: Iterable[int]) -> float:
    a, b = set(a), set(b)
    return len(a & b) / len(a | b) if a | b else 1.0


def wilson(successes: int, n: int, z: float = 1.959964) -> tuple[float, float] | None:
    """Wilson score interval for a proportion (Wilson 1927, JASA 22:209-212)."""
    if n == 0:
        return None
    p = successes / n
    centre = (p + z * z / (2 * n)) / (1 + z * z / n)
    half = z * np.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / (1 + z * z / n)
    return float(max(centre - half, 0.0)), float(min(centre + half, 1.0))


def matched_alpha(alarms: int, n: int) -> float:
    """The false alarm rate the oracle is held to: Inrush's measured rate, or, when no A/A run
    alarmed, the median-unbiased estimate ``1 - 0.5^(1/n)`` (about 0.69/n) rather than 0."""
    return alarms / n if alarms else 1.0 - 0.5 ** (1.0 / n)


class Methods:
    """Per-method detection decisions on a run."""

    @staticmethod
    def inrush(o: RunOutcome) -> dict[str, Any]:
        return {"any_alert": o.first_alert_look is not None,
                "detected": o.detect_look is not None,
                "delay": None if o.detect_look is None else o.detect_look - (o.inflow_start or 0),
                "flagged": o.final_alert_days, "top_source": o.final_top_source}

    @staticmethod
    def overall_end(o: RunOutcome) -> dict[str, Any]:
        alert = o.overall_end_p < BASELINE_OVERALL_ALPHA
        n_days = len(o.daily_p)
        return {"any_alert": alert, "detected": alert and o.inflow_start is not None,
                "delay": (n_days - 1 - (o.inflow_start or 0)) if alert else None,
                "flagged": tuple(range(n_days)) if alert else (),
                "top_source": o.overall_end_top_source if alert else None}

    @staticmethod
    def daily_uncorrected(o: RunOutcome) -> dict[str, Any]:
        p = np.nan_to_num(np.array(o.daily_p), nan=1.0)
        hits = np.flatnonzero(p < BASELINE_DAILY_ALPHA)
        after = hits[hits >= (o.inflow_start or 0)] if o.inflow_start is not None else hits[:0]
        return {"any_alert": bool(hits.size),
                "detected": bool(after.size),
                "delay": int(after[0] - o.inflow_start) if after.size else None,
                "flagged": tuple(int(h) for h in hits),
                "top_source": o.daily_top_source if hits.size else None}


METHODS = {"inrush": Methods.inrush, "overall_end": Methods.overall_end,
           "daily_uncorrected": Methods.daily_uncorrected}
AA_FAMILIES = ("aa_2arm", "aa_3arm", "aa_ramp")


def summarise(outcomes: Sequence[RunOutcome]) -> dict[str, Any]:
    """Figures and details from all runs."""
    by_family: dict[str, list[RunOutcome]] = {}
    for o in outcomes:
        by_family.setdefault(o.family, []).append(o)
    for runs in by_family.values():
        runs.sort(key=lambda o: o.rep)

    details: dict[str, Any] = {"families": {}, "definitions": {
        "alert": "any Diagnosis.findings() entry with severity 'alert' at a daily look "
                 "(checked against status == 'alert')",
        "detected": "an alert at a look on or after the inflow's first day",
        "delay_days": "look day minus the inflow's first day (0 = alert on the first day)",
        "localisation": "Jaccard index of the alert-flagged days of the day-28 diagnosis and "
                        "the inflow days, over detected runs",
        "attribution": "source with the largest summed excess over the day-28 alert days (or, "
                       "without alert days, the skewed source with the smallest p-value) is "
                       "the inflow's own label, over detected labelled runs",
        "oracle": "chi-square of exactly the inflow days, threshold chi2.isf(alpha, arms-1) with "
                  "alpha = the method's measured A/A rate in the matching family",
    }}
    figures: dict[str, Any] = {}
    disagreements = sum(o.status_disagreements for o in outcomes)
    details["status_disagreements"] = disagreements
    details["looks_run"] = sum(o.looks_run for o in outcomes)

    for name, method in METHODS.items():
        prefix = "detection." if name == "inrush" else f"detection.baseline.{name}."
        fam: dict[str, Any] = {}
        # False alarms.
        aa_all = [o for f in AA_FAMILIES for o in by_family.get(f, [])]
        aa_flags = [method(o)["any_alert"] for o in aa_all]
        figures[prefix + "aa_false_alarm_rate"] = _rate(aa_flags)
        for family in AA_FAMILIES:
            flags = [method(o)["any_alert"] for o in by_family.get(family, [])]
            fam[family] = {"runs": len(flags), "false_alarms": int(sum(flags)),
                           "rate": _rate(flags), "wilson95": wilson(int(sum(flags)), len(flags))}
            if name == "inrush":
                fam[family]["alert_kinds_at_first_alarm"] = _counts(
                    "+".join(o.kinds_at_first_alert) for o in by_family.get(family, [])
                    if o.first_alert_look is not None)
                fam[family]["first_alarm_looks"] = sorted(
                    o.first_alert_look for o in by_family.get(family, [])
                    if o.first_alert_look is not None)
        ref_aa = by_family.get("aa_2arm", [])
        alarms = sum(method(o)["any_alert"] for o in ref_aa)
        alpha = matched_alpha(int(alarms), len(ref_aa)) if ref_aa else None

        def oracle_power(runs: Sequence[RunOutcome], alpha: float | None = alpha) -> float | None:
            if not runs or alpha is None:
                return None
            threshold = stats.chi2.isf(alpha, runs[0].n_arms - 1)
            return float(np.mean([o.oracle_statistic > threshold for o in runs]))

        # Reference scenario, unlabelled.
        ref = by_family.get("ref_unlabeled", [])
        decisions = [method(o) for o in ref]
        power = _rate([d["detected"] for d in decisions])
        o_power = oracle_power(ref)
        figures[prefix + "power_ratio_to_oracle"] = (
            power / o_power if power is not None and o_power else None)
        detected = [(o, d) for o, d in zip(ref, decisions, strict=True) if d["detected"]]
        figures[prefix + "delay_days_median"] = _median([d["delay"] for _, d in detected])
        figures[prefix + "localisation_jaccard_median"] = _median(
            [_jaccard(d["flagged"], o.inflow_days) for o, d in detected])
        fam["ref_unlabeled"] = {
            "runs": len(ref), "power": power, "oracle_power_at_matched_alpha": o_power,
            "oracle_alpha": alpha,
            "oracle_power_at_0.0005": oracle_power(ref, 0.0005),
            "false_alarm_before_inflow": _rate(
                [d["any_alert"] and not d["detected"] for d in decisions]) if name == "inrush"
            else None,
            "delay_days_distribution": _counts([d["delay"] for _, d in detected]),
            "detected_without_flagged_days": _rate([not d["flagged"] for _, d in detected]),
            "jaccard_distribution": _counts(
                [round(_jaccard(d["flagged"], o.inflow_days), 2) for o, d in detected]),
        }
        if name == "inrush":
            fam["ref_unlabeled"]["alert_kinds_at_detection"] = _counts(
                ["+".join(o.kinds_at_detection) for o, _ in detected])
        # Labelled.
        lab = by_family.get("ref_labeled", [])
        lab_decisions = [method(o) for o in lab]
        figures[prefix + "labeled_power"] = _rate([d["detected"] for d in lab_decisions])
        lab_detected = [(o, d) for o, d in zip(lab, lab_decisions, strict=True) if d["detected"]]
        figures[prefix + "attribution_accuracy"] = _rate(
            [d["top_source"] == o.inflow_label for o, d in lab_detected])
        fam["ref_labeled"] = {
            "runs": len(lab), "delay_days_median": _median([d["delay"] for _, d in lab_detected]),
            "localisation_jaccard_median": _median(
                [_jaccard(d["flagged"], o.inflow_days) for o, d in lab_detected]),
            "top_sources": _counts([d["top_source"] for _, d in lab_detected]),
            "detected_without_flagged_days": _rate([not d["flagged"] for _, d in lab_detected]),
        }
        if name == "inrush":
            fam["ref_labeled"]["alert_kinds_at_detection"] = _counts(
                ["+".join(o.kinds_at_detection) for o, _ in lab_detected])
        # Power curve.
        curve = []
        for size in POWER_CURVE_SIZES:
            runs = ref if size == 0.08 else by_family.get(f"curve_{size:g}", [])
            curve.append({"size": size, "runs": len(runs),
                          "detection_rate": _rate([method(o)["detected"] for o in runs]),
                          "oracle_rate": oracle_power(runs)})
        fam["power_curve"] = curve
        if name == "inrush":
            figures["detection.power_curve"] = {
                f"{p['size']:g}": p["detection_rate"] for p in curve}
        # Mixed scenarios.
        mixed = by_family.get("mixed", [])
        mixed_decisions = [method(o) for o in mixed]
        fam["mixed"] = _mixed_summary(mixed, mixed_decisions)
        details["families"][name] = fam
    return {"figures": figures, "details": details}


def _mixed_summary(runs: Sequence[RunOutcome], decisions: Sequence[dict[str, Any]]
                   ) -> dict[str, Any]:
    if not runs:
        return {"runs": 0}
    sizes = np.array([o.inflow_size for o in runs])
    detected = np.array([d["detected"] for d in decisions])
    bands = {}
    for low, high in ((0.02, 0.05), (0.05, 0.10), (0.10, 0.15), (0.15, 0.20)):
        mask = (sizes >= low) & (sizes < high + 1e-12)
        bands[f"{low:g}-{high:g}"] = _rate(list(detected[mask]))
    labelled = [(o, d) for o, d in zip(runs, decisions, strict=True)
                if d["detected"] and o.inflow_label]
    return {
        "runs": len(runs), "detection_rate": float(detected.mean()),
        "detection_rate_by_size": bands,
        "detection_rate_labeled": _rate([d["detected"] for o, d in zip(runs, decisions,
                                                                       strict=True)
                                         if o.inflow_label]),
        "detection_rate_unlabeled": _rate([d["detected"] for o, d in zip(runs, decisions,
                                                                         strict=True)
                                           if not o.inflow_label]),
        "delay_days_median": _median([d["delay"] for d in decisions if d["detected"]]),
        "localisation_jaccard_median": _median(
            [_jaccard(d["flagged"], o.inflow_days)
             for o, d in zip(runs, decisions, strict=True) if d["detected"]]),
        "attribution_accuracy_labeled": _rate(
            [d["top_source"] == o.inflow_label for o, d in labelled]),
    }


def _counts(values: Iterable[object]) -> dict[str, int]:
    out: dict[str, int] = {}
    for v in values:
        out[str(v)] = out.get(str(v), 0) + 1
    return dict(sorted(out.items()))
