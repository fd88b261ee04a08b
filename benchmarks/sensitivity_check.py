"""Stated vs simulated detection rate of the sensitivity figure.

``detectors.sensitivity`` states, analytically, the smallest one-arm inflow over K days that the
window scan flags with 80% probability. Here each stated size is injected into simulated traffic
(Poisson daily totals, multinomial assignment) and the real scan (``detectors.srm.scan_windows``
at the diagnosis' scan level) is run; the simulated detection rate should be about 0.8 (the
figure counts only the window that matches the inflow, so it is slightly conservative).

``python -m benchmarks.sensitivity_check`` rewrites its section of RESULTS.md and the
``sensitivity.*`` figures in results.json.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from detectors import DiagnosisConfig
from detectors.sensitivity import sensitivity
from detectors.sequential import sequential_srm
from detectors.srm import scan_windows

from .sections import write_section

HERE = Path(__file__).parent
START, END = "<!-- sensitivity:start -->", "<!-- sensitivity:end -->"



@dataclass(frozen=True)
class Case:
    name: str
    weights: tuple[float, ...]
    units_per_day: int
    inflow_days: int
    arm: int


CASES = (
    Case("2 arms 50/50, 10,000/day, 1-day inflow", (0.5, 0.5), 10_000, 1, 1),
    Case("2 arms 50/50, 10,000/day, 2-day inflow", (0.5, 0.5), 10_000, 2, 1),
    Case("2 arms 50/50, 10,000/day, 3-day inflow", (0.5, 0.5), 10_000, 3, 1),
    Case("2 arms 90/10, 10,000/day, 2-day inflow into the 10% arm", (0.9, 0.1), 10_000, 2, 1),
    Case("3 arms equal, 6,000/day, 2-day inflow", (1 / 3, 1 / 3, 1 / 3), 6_000, 2, 2),
)


def simulate_rate(case: Case, inflow: float, *, days: int = 28, reps: int = 1000,
                  seed: int = 7) -> float:
    rng = np.random.default_rng(seed)
    config = DiagnosisConfig()
    weights = np.array(case.weights)
    planned = np.tile(weights, (days, 1))
    hits = 0
    for _ in range(reps):
        totals = rng.poisson(case.units_per_day, days)
        counts = np.array([rng.multinomial(n, weights) for n in totals], dtype=float)
        inflow_start = days - case.inflow_days
        counts[inflow_start:, case.arm] += rng.poisson(inflow, case.inflow_days)
        scan = scan_windows(counts, planned, max_window=config.max_window,
                            watch_alpha=config.watch_alpha)
        hits += any(w.adjusted_p_value < config.scan_alpha and w.stop > inflow_start
                    for w in scan.selected)
    return hits / reps


@dataclass(frozen=True)
class PeriodCase:
    name: str
    weights: tuple[float, ...]
    units_per_day: int
    days: int
    arm: int


PERIOD_CASES = (
    PeriodCase("2 arms 50/50, 10,000/day, 28 days", (0.5, 0.5), 10_000, 28, 1),
    PeriodCase("2 arms 90/10, 10,000/day, 28 days, the 10% arm", (0.9, 0.1), 10_000, 28, 1),
    PeriodCase("3 arms equal, 6,000/day, 14 days", (1 / 3, 1 / 3, 1 / 3), 6_000, 14, 2),
)


def simulate_period_rate(case: PeriodCase, shift: float, *, reps: int = 1000,
                         seed: int = 13) -> float:
    rng = np.random.default_rng(seed)
    config = DiagnosisConfig()
    weights = np.array(case.weights)
    shifted = weights * (1.0 - shift * weights[case.arm] / (1.0 - weights[case.arm]))
    shifted[case.arm] = weights[case.arm] * (1.0 + shift)
    planned = np.tile(weights, (case.days, 1))
    hits = 0
    for _ in range(reps):
        totals = rng.poisson(case.units_per_day, case.days)
        counts = np.array([rng.multinomial(n, shifted) for n in totals], dtype=float)
        result = sequential_srm(counts, planned, config.sequential_concentration)
        hits += result.final_p_value < config.alpha
    return hits / reps


def run_period(reps: int = 1000) -> list[dict[str, object]]:
    config = DiagnosisConfig()
    rows = []
    for case in PERIOD_CASES:
        weights = np.array(case.weights)
        baseline = np.tile(weights * case.units_per_day, (case.days, 1))
        arms = [f"arm{i}" for i in range(len(weights))]
        stated = sensitivity(baseline, np.tile(weights, (case.days, 1)), arms, days=1,
                             alpha=config.scan_alpha, max_window=config.max_window,
                             overall_alpha=config.alpha,
                             concentration=config.sequential_concentration)
        shift = stated.whole_period[case.arm].relative_share_shift
        assert shift is not None
        rows.append({
            "case": case.name, "stated_relative_shift": round(shift, 5),
            "stated_power": stated.power,
            "simulated_rate": simulate_period_rate(case, shift, reps=reps),
            "simulated_rate_at_half_shift": simulate_period_rate(case, shift / 2, reps=reps),
            "reps": reps,
        })
    return rows


def run(reps: int = 1000) -> list[dict[str, object]]:
    config = DiagnosisConfig()
    rows = []
    for case in CASES:
        weights = np.array(case.weights)
        baseline = np.tile(weights * case.units_per_day, (28, 1))
        arms = [f"arm{i}" for i in range(len(weights))]
        stated = sensitivity(baseline, np.tile(weights, (28, 1)), arms, days=case.inflow_days,
                             alpha=config.scan_alpha, max_window=config.max_window)
        size = stated.arms[case.arm].units_per_day
        rows.append({
            "case": case.name, "stated_units_per_day": round(size, 1),
            "stated_share_of_arm_traffic": round(stated.arms[case.arm].share_of_arm_traffic, 4),
            "stated_power": stated.power,
            "simulated_rate": simulate_rate(case, size, reps=reps),
            "simulated_rate_at_half_size": simulate_rate(case, size / 2, reps=reps),
            "reps": reps,
        })
    return rows


def write(rows: list[dict[str, object]], period_rows: list[dict[str, object]]) -> None:
    lines = [START, "## Sensitivity: stated vs simulated detection rate", "",
             "Command: `python -m benchmarks.sensitivity_check`. Stated size from "
             "`detectors.sensitivity` (80% power, scan level and window of `DiagnosisConfig`); "
             "simulated rate of the real window scan with that inflow injected on the last days "
             "of a 28-day experiment.", "",
             "| case | stated units/day | share of arm traffic | simulated rate | at half size |",
             "|---|---|---|---|---|"]
    for row in rows:
        lines.append(f"| {row['case']} | {row['stated_units_per_day']:,} | "
                     f"{100 * float(row['stated_share_of_arm_traffic']):.1f}% | "  # type: ignore[arg-type]
                     f"{row['simulated_rate']:.3f} | {row['simulated_rate_at_half_size']:.3f} |")
    lines += ["", "Whole period: stated relative shift of one arm's share for the anytime-valid "
              "overall test (overall level of `DiagnosisConfig`), simulated rate of that test "
              "read at the end of the period with the shift applied to every day.", "",
              "| case | stated relative shift | simulated rate | at half the shift |",
              "|---|---|---|---|"]
    for row in period_rows:
        lines.append(f"| {row['case']} | {100 * float(row['stated_relative_shift']):.2f}% | "  # type: ignore[arg-type]
                     f"{row['simulated_rate']:.3f} | {row['simulated_rate_at_half_shift']:.3f} |")
    lines += ["", f"{rows[0]['reps']} simulated experiments per row.", END]
    write_section(START, END, lines, {
        "sensitivity.stated_vs_simulated": rows,
        "sensitivity.whole_period_stated_vs_simulated": period_rows})


if __name__ == "__main__":
    table, period_table = run(), run_period()
    write(table, period_table)
    for item in [*table, *period_table]:
        print(item)
