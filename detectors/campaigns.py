"""Campaign pre-flight check: will an outreach campaign break the experiment's sample ratio?

A campaign (email, push, SMS, paid link) brings units into the experiment. If it targets the
same share of every arm's units, its arrivals split in the planned ratio and cause no sample
ratio mismatch, whatever the allocation (ramps and any number of arms included). If it reaches
the arms unequally — the classic case is a newsletter sent only to the users who can see the
new feature — its arrivals land in arm ``a`` in proportion to ``audience_a * w_a`` instead of
``w_a`` (``w`` = the weights in force that day), so each day's expected excess over plan is

    excess_a = size_per_day * (audience_a * w_a / sum_b(audience_b * w_b) - w_a)

which sums to zero across arms. This is the expected value of ``observed - expected`` in the
Pearson chi-square goodness-of-fit test Inrush runs (expected = day's units x planned weights),
so it is exactly what the window scan would see.

The size per day is ``expected_size / campaign days`` when the campaign's size is known. Without
it, a rough estimate is taken from recent traffic: the mean units per day of each arm over the
last ``recent_days`` days with units, times the campaign's audience share of that arm, summed
over arms (the campaign is assumed to bring as many arrivals a day as the part of the arms it
targets usually brings — an order of magnitude, not a forecast). Without either, the excess is
given per 1,000 campaign arrivals.

Example:
    >>> import datetime as dt
    >>> from detectors.allocation import AllocationSchedule
    >>> arms = ["control", "cards"]
    >>> newsletter = Campaign("spring-routes", "newsletter", dt.date(2026, 3, 10),
    ...                       dt.date(2026, 3, 11), {"cards": 1.0, "control": 0.0}, 2000)
    >>> check = check_campaign(newsletter, AllocationSchedule.constant(arms), arms)
    >>> check.balanced, check.expected_excess["2026-03-10"]
    (False, {'control': -500.0, 'cards': 500.0})
"""

from __future__ import annotations

import datetime as dt
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .allocation import AllocationSchedule
from .errors import InputError, Problem

BALANCE_TOLERANCE = 1e-6
"""Audience shares closer than this (absolute) count as equal."""

RECENT_DAYS = 14
PER_ARRIVALS = 1000
FIX = ("target the same share of every arm, or log who would have been targeted in every arm "
       "and analyse by intent to treat")


@dataclass(frozen=True)
class Campaign:
    """A planned or running outreach campaign and the share of each arm's units it targets.

    ``audience`` maps arm -> share (0..1) of that arm's units the campaign reaches; arms left
    out are not reached (share 0). ``expected_size`` is the total number of units the campaign
    is expected to bring over ``start..end`` (both inclusive), if known. Dates may be given as
    ``datetime.date`` or ISO strings. Satisfies :class:`detectors.diagnose.KnownCampaign`.

    Example:
        >>> c = Campaign("spring-routes", "newsletter", "2026-03-10", "2026-03-12",
        ...              {"control": 0.2, "cards": 0.2})
        >>> c.days
        3
    """

    name: str
    source: str
    start: dt.date
    end: dt.date
    audience: dict[str, float] = field(default_factory=dict)
    expected_size: int | None = None

    def __post_init__(self) -> None:
        problems: list[Problem] = []
        if not isinstance(self.name, str) or not self.name.strip():
            problems.append(Problem("name", "must be a non-empty text"))
        if not isinstance(self.source, str) or not self.source.strip():
            problems.append(Problem("source", "must be a non-empty text (the entry source its "
                                              "units arrive through)"))
        start = _parse_date(self.start, "start", problems)
        end = _parse_date(self.end, "end", problems)
        if start is not None and end is not None and end < start:
            problems.append(Problem("end", f"{end.isoformat()} is before start "
                                           f"{start.isoformat()}"))
        audience: dict[str, float] = {}
        audience_ok = True
        if not isinstance(self.audience, Mapping):
            problems.append(Problem("audience", "must map arm names to shares between 0 and 1"))
            audience_ok = False
        else:
            for arm, share in self.audience.items():
                value = _as_float(share)
                if value is None or not 0.0 <= value <= 1.0:
                    problems.append(Problem(f"audience.{arm}",
                                            f"must be a share between 0 and 1, got {share!r}"))
                    audience_ok = False
                    continue
                audience[str(arm)] = value
            if audience_ok and not any(v > 0 for v in audience.values()):
                problems.append(Problem("audience", "reaches no arm: at least one share must "
                                                    "be above 0"))
        size = self.expected_size
        if size is not None and (isinstance(size, bool) or not isinstance(size, int | float)
                                 or not math.isfinite(size) or size != int(size) or size < 1):
            problems.append(Problem("expected_size", "must be a whole number of units >= 1, or "
                                                     "left out when unknown"))
        if problems:
            raise InputError(problems)
        object.__setattr__(self, "start", start)
        object.__setattr__(self, "end", end)
        object.__setattr__(self, "audience", audience)
        if size is not None:
            object.__setattr__(self, "expected_size", int(size))

    @property
    def days(self) -> int:
        return (self.end - self.start).days + 1

    def dates(self) -> list[dt.date]:
        return [self.start + dt.timedelta(days=i) for i in range(self.days)]


@dataclass(frozen=True)
class CampaignCheck:
    """Outcome of :func:`check_campaign`.

    ``expected_excess`` maps each campaign day (ISO date) to the expected units over plan per
    arm; it is in units when ``size_basis`` is ``"expected_size"`` or ``"recent_traffic"`` and
    per 1,000 campaign arrivals when it is ``"unknown"``. ``size_per_day`` is the campaign
    arrivals per day used (``None`` when unknown). ``fix`` is ``None`` for a balanced campaign.
    """

    campaign: str
    balanced: bool
    warnings: tuple[str, ...]
    expected_excess: dict[str, dict[str, float]]
    fix: str | None
    size_per_day: float | None
    size_basis: str
    arrival_shares: dict[str, dict[str, float]]

    @property
    def total_excess(self) -> dict[str, float]:
        """Expected excess per arm summed over the campaign's days."""
        arms = next(iter(self.expected_excess.values())).keys()
        return {a: float(sum(day[a] for day in self.expected_excess.values())) for a in arms}

    def to_dict(self) -> dict[str, Any]:
        return {
            "campaign": self.campaign,
            "balanced": self.balanced,
            "warnings": list(self.warnings),
            "fix": self.fix,
            "size_per_day": None if self.size_per_day is None else round(self.size_per_day, 2),
            "size_basis": self.size_basis,
            "excess_unit": "per_1000_arrivals" if self.size_basis == "unknown" else "units",
            "expected_excess": {d: {a: round(v, 2) for a, v in per_arm.items()}
                                for d, per_arm in self.expected_excess.items()},
            "total_excess": {a: round(v, 2) for a, v in self.total_excess.items()},
            "arrival_shares": {d: {a: round(v, 6) for a, v in per_arm.items()}
                               for d, per_arm in self.arrival_shares.items()},
        }


def check_campaign(campaign: Campaign, schedule: AllocationSchedule, arms: Sequence[str],
                   daily_arm_traffic: np.ndarray | None = None, *,
                   recent_days: int = RECENT_DAYS) -> CampaignCheck:
    """Check before (or during) a campaign whether it will push the arms off their planned ratio.

    ``daily_arm_traffic`` is an optional ``(days, arms)`` array of recent units per day and arm
    (columns in the order of ``arms``), used to estimate the campaign's size when
    ``expected_size`` is not given.

    Method: a campaign that reaches share ``s_a`` of arm ``a``'s units brings arrivals in the
    proportions ``s_a w_a / sum_b s_b w_b``; the Pearson chi-square test expects ``w_a``
    (Pearson 1900). The difference times the arrivals is the expected excess. When every
    ``s_a`` is equal the proportions are exactly ``w`` and the campaign is balanced.

    Example:
        >>> import datetime as dt
        >>> from detectors.allocation import AllocationSchedule
        >>> arms = ["control", "cards"]
        >>> c = Campaign("spring-routes", "push", dt.date(2026, 3, 10), dt.date(2026, 3, 10),
        ...              {"control": 0.3, "cards": 0.3}, 900)
        >>> check_campaign(c, AllocationSchedule.constant(arms, [0.9, 0.1]), arms).balanced
        True
    """
    arms = tuple(arms)
    problems: list[Problem] = []
    if tuple(schedule.arms) != arms:
        problems.append(Problem("arms", f"arms {list(arms)} differ from the allocation "
                                        f"schedule's arms {list(schedule.arms)}"))
    for arm in campaign.audience:
        if arm not in arms:
            problems.append(Problem(f"audience.{arm}",
                                    f"is not one of the experiment's arms {list(arms)}"))
    if isinstance(recent_days, bool) or not isinstance(recent_days, int) or recent_days < 1:
        problems.append(Problem("recent_days", "must be a whole number of days >= 1"))
    traffic = None
    if daily_arm_traffic is not None:
        traffic = np.asarray(daily_arm_traffic, dtype=float)
        if traffic.ndim != 2 or traffic.shape[1] != len(arms):
            problems.append(Problem("daily_arm_traffic", f"must have shape (days, {len(arms)}), "
                                                         f"got {traffic.shape}"))
        elif not np.isfinite(traffic).all() or (traffic < 0).any():
            problems.append(Problem("daily_arm_traffic", "must hold finite counts >= 0"))
    if problems:
        raise InputError(problems)

    dates = campaign.dates()
    weights = schedule.weights_on(dates)                      # (days, arms)
    share = np.array([campaign.audience.get(a, 0.0) for a in arms])
    balanced = bool(np.ptp(share) <= BALANCE_TOLERANCE)
    reached = share * weights
    arrival = reached / reached.sum(axis=1, keepdims=True)    # where the campaign's units land
    shift = arrival - weights                                 # per arrival, sums to 0 per day

    size_per_day, basis, size_note = _size_per_day(campaign, share, traffic, recent_days)
    scale = size_per_day if size_per_day is not None else float(PER_ARRIVALS)
    excess = scale * shift
    iso = [d.isoformat() for d in dates]
    expected_excess = {d: {a: float(v) for a, v in zip(arms, row, strict=True)}
                       for d, row in zip(iso, excess, strict=True)}
    arrival_shares = {d: {a: float(v) for a, v in zip(arms, row, strict=True)}
                      for d, row in zip(iso, arrival, strict=True)}

    warnings: list[str] = []
    fix: str | None = None
    if not balanced:
        fix = f"{FIX} (for example, reach {_pct(share.max())} of every arm's units)"
        order = np.argsort(-share, kind="stable")
        reach = ", ".join(f"{_pct(share[i])} of {_possessive(arms[i])} units" for i in order)
        warnings.append(
            f"Campaign {campaign.name} ({campaign.source}, {campaign.start.isoformat()}.."
            f"{campaign.end.isoformat()}) reaches {_and_last(reach)}: its arrivals will not "
            "split in the planned ratio and will push the arms off it (a sample ratio mismatch) "
            "on its days.")
        total = excess.sum(axis=0)
        unit = "units" if size_per_day is not None else f"units per {PER_ARRIVALS:,} arrivals"
        gains = ", ".join(f"{arms[i]} {total[i]:+,.0f}" for i in np.argsort(-total))
        if size_per_day is not None:
            warnings.append(
                f"Expected excess over plan across its {_days(campaign.days)}, at about "
                f"{size_per_day:,.0f} campaign arrivals a day: {gains} {unit}"
                + (f" (per day from {_span(excess, arms)})" if campaign.days > 1 else "")
                + ".")
        else:
            per_arrival = ", ".join(f"{arms[i]} {PER_ARRIVALS * shift[:, i].mean():+,.0f}"
                                    for i in np.argsort(-total))
            warnings.append(f"Expected excess over plan per {PER_ARRIVALS:,} campaign arrivals: "
                            f"{per_arrival} (averaged over its days).")
        if size_note:
            warnings.append(size_note)
        warnings.append(f"Fix: {fix}.")
    return CampaignCheck(campaign.name, balanced, tuple(warnings), expected_excess, fix,
                         size_per_day, basis, arrival_shares)


def _size_per_day(campaign: Campaign, share: np.ndarray, traffic: np.ndarray | None,
                  recent_days: int) -> tuple[float | None, str, str | None]:
    """Campaign arrivals per day, the basis of the figure, and a note when it is a guess."""
    if campaign.expected_size is not None:
        return campaign.expected_size / campaign.days, "expected_size", None
    if traffic is not None:
        active = traffic[traffic.sum(axis=1) > 0][-recent_days:]
        if active.shape[0]:
            size = float((active.mean(axis=0) * share).sum())
            if size > 0:
                return size, "recent_traffic", (
                    f"The campaign's size is not given: estimated at {size:,.0f} arrivals a day "
                    f"from the last {_days(active.shape[0])} of traffic (mean units per day of "
                    "each arm times the share of it the campaign reaches). This is a rough "
                    "guess; give expected_size for a firmer figure.")
    return None, "unknown", (
        "The campaign's size is unknown (no expected_size and no recent traffic): the excess "
        f"is given per {PER_ARRIVALS:,} campaign arrivals.")


def _span(excess: np.ndarray, arms: Sequence[str]) -> str:
    parts = []
    for i, arm in enumerate(arms):
        low, high = excess[:, i].min(), excess[:, i].max()
        parts.append(f"{arm} {low:+,.0f}" if math.isclose(low, high, abs_tol=0.5)
                     else f"{arm} {low:+,.0f} to {high:+,.0f}")
    return ", ".join(parts)


def _parse_date(value: object, name: str, problems: list[Problem]) -> dt.date | None:
    if isinstance(value, dt.datetime):
        return value.date()
    if isinstance(value, dt.date):
        return value
    if isinstance(value, str):
        try:
            return dt.date.fromisoformat(value.strip())
        except ValueError:
            pass
    problems.append(Problem(name, "must be a calendar date written YYYY-MM-DD"))
    return None


def _as_float(value: object) -> float | None:
    if isinstance(value, bool):
        return None
    try:
        number = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return None
    return number if math.isfinite(number) else None


def _pct(share: float) -> str:
    return f"{100 * share:.0f}%" if abs(100 * share - round(100 * share)) < 1e-9 \
        else f"{100 * share:.1f}%"


def _days(count: int) -> str:
    return f"{count} day" if count == 1 else f"{count} days"


def _possessive(arm: str) -> str:
    return f"{arm}'" if arm.endswith("s") else f"{arm}'s"


def _and_last(listing: str) -> str:
    head, sep, tail = listing.rpartition(", ")
    return f"{head} and {tail}" if sep else listing


__all__ = ["BALANCE_TOLERANCE", "Campaign", "CampaignCheck", "check_campaign"]
