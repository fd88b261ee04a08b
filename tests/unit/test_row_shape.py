"""The fast shape check of JSON observation rows never accepts what the pydantic model refuses
(it may send valid rows on to the model: that is only slower)."""

from __future__ import annotations

from typing import Any

from hypothesis import given, settings
from hypothesis import strategies as st
from pydantic import TypeAdapter, ValidationError

from service.schemas.observations import ObservationIn, rows_plainly_conform

MODEL = TypeAdapter(list[ObservationIn])

scalars = st.one_of(st.none(), st.booleans(), st.integers(-5, 10**20),
                    st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=3))
stats = st.dictionaries(st.sampled_from(["n", "sum", "sum_sq", "mean"]), scalars, max_size=4)
metric_maps = st.one_of(st.none(), scalars, st.dictionaries(
    st.sampled_from(["hikes", "photos", ""]), st.one_of(stats, scalars), max_size=3))
rows = st.one_of(scalars, st.lists(scalars, max_size=2), st.fixed_dictionaries(
    {}, optional={"date": st.one_of(st.just("2026-03-01"), scalars),
                  "arm": st.one_of(st.just("cards"), scalars),
                  "source": st.one_of(st.just("organic"), st.text(min_size=120, max_size=140),
                                      scalars),
                  "entered": st.one_of(st.integers(0, 500), scalars),
                  "metrics": metric_maps,
                  "extra": scalars}))


def _model_accepts(value: list[Any]) -> bool:
    try:
        MODEL.validate_python(value)
    except ValidationError:
        return False
    return True


@settings(max_examples=600, deadline=None)
@given(st.lists(rows, min_size=1, max_size=4))
def test_fast_check_accepts_only_what_the_model_accepts(value: list[Any]) -> None:
    if rows_plainly_conform(value):
        assert _model_accepts(value)


def test_fast_check_accepts_ordinary_rows() -> None:
    ordinary = [{"date": "2026-03-01", "arm": "cards", "source": "organic", "entered": 120,
                 "metrics": {"hikes": {"n": 100, "sum": 240.5, "sum_sq": 810.25}}},
                {"date": "2026-03-01", "arm": "control", "entered": 118.0},
                {"date": "2026-03-02", "arm": "control", "source": None, "entered": 0,
                 "metrics": None}]
    assert rows_plainly_conform(ordinary) and _model_accepts(ordinary)


def test_fast_check_declines_what_needs_the_models_messages() -> None:
    for bad in ({"date": "2026-03-01", "arm": "cards", "entered": True},
                {"date": "2026-03-01", "arm": "cards", "entered": "12"},
                {"date": "2026-03-01", "arm": "cards", "entered": 1, "colour": "red"},
                {"date": "2026-03-01", "arm": "cards", "entered": 1,
                 "metrics": {"hikes": {"n": 1, "sum": 2}}},
                {"arm": "cards", "entered": 1}):
        assert not rows_plainly_conform([bad]) and not _model_accepts([bad])
