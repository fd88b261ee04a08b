"""The demo scenario, invented: Larkspur Trails, a hiking-route app.

Experiment ``route-cards`` tests route cards (arm ``cards``) against the current list view
(``control``) at 50/50 for 28 days. On days 15 and 16 the growth team sends a "new: route cards"
newsletter only to users who can already see the cards, pulling about 900 dormant users a day
into ``cards``. They save fewer routes than organic visitors, so the naive effect on
``routes_saved`` shrinks although the cards help every cohort by about 6%.

``python -m service.demo.scenario`` rewrites the committed CSV (seeded, reproducible).
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import numpy as np
import pandas as pd

EXPERIMENT_ID = "route-cards"
TITLE = "Route cards on the trail list"
ARMS = ("control", "cards")
START = dt.date(2026, 10, 26)
DAYS = 28
CAMPAIGN_DAYS = (14, 15)  # 0-based: the 15th and 16th day
CSV_PATH = Path(__file__).with_name("larkspur_route_cards.csv")

# Daily arrivals per source before the weekly pattern, and routes saved per unit.
_SOURCES = {"organic": (7200, 2.4), "newsletter": (900, 1.5), "push": (1100, 1.9),
            "paid_search": (800, 1.2)}
_DORMANT_MEAN = 0.55
_CAMPAIGN_SIZE = 900
_LIFT = 1.06


def generate(seed: int = 20261026) -> pd.DataFrame:
    """One row per (date, arm, source) with ``routes_saved`` sufficient statistics."""
    rng = np.random.default_rng(seed)
    weekday_factor = np.array([1.0, 0.95, 0.95, 1.0, 1.1, 1.35, 1.3])
    records: list[dict[str, object]] = []
    for day in range(DAYS):
        date = START + dt.timedelta(days=day)
        growth = 1.0 + 0.004 * day
        for source, (base, mean) in _SOURCES.items():
            arrivals = rng.poisson(base * growth * weekday_factor[date.weekday()])
            in_cards = rng.binomial(arrivals, 0.5)
            per_arm = {"control": arrivals - in_cards, "cards": in_cards}
            extra = _CAMPAIGN_SIZE if (source == "newsletter" and day in CAMPAIGN_DAYS) else 0
            for arm in ARMS:
                unit_mean = mean * (_LIFT if arm == "cards" else 1.0)
                values = rng.poisson(unit_mean, size=per_arm[arm]).astype(float)
                if arm == "cards" and extra:
                    dormant = rng.poisson(_DORMANT_MEAN * _LIFT, size=extra).astype(float)
                    values = np.concatenate([values, dormant])
                records.append({
                    "date": date.isoformat(), "arm": arm, "source": source,
                    "entered": int(values.size),
                    "routes_saved.n": int(values.size),
                    "routes_saved.sum": float(values.sum()),
                    "routes_saved.sum_sq": float((values ** 2).sum()),
                })
    return pd.DataFrame.from_records(records)


def main() -> None:
    generate().to_csv(CSV_PATH, index=False)
    print(f"wrote {CSV_PATH}")


if __name__ == "__main__":
    main()
