"""Server-side SVG charts: titled, labelled, flagged days marked, readable without colour."""

from __future__ import annotations

import re
import xml.etree.ElementTree as ET

from service import charts
from service.demo import scenario
from tests.demo_documents import demo_documents

SVG = "{http://www.w3.org/2000/svg}"


def texts(svg: str) -> str:
    root = ET.fromstring(svg)  # well-formed, standalone SVG
    assert root.tag == f"{SVG}svg"
    return " ".join("".join(node.itertext()) for node in root.iter(f"{SVG}text"))


def test_share_chart_has_title_axes_and_hatched_flagged_days() -> None:
    series = demo_documents().series
    svg = charts.share_chart(series)
    words = texts(svg)
    for label in ("Arm shares against the plan", "Day of entry", "Share of the day's units",
                  "control: observed", "cards: planned", "flagged day (alert)"):
        assert label in words
    assert 'aria-label="Arm shares against the plan"' in svg
    assert "<pattern" in svg  # hatching, not colour alone, marks the flagged days


def test_series_differ_by_dash_and_marker_not_only_colour() -> None:
    series = demo_documents().series
    svg = charts.share_chart(series)
    dashes = set(re.findall(r"stroke-dasharray: ([0-9.,\s]+)", svg))
    assert len(dashes) >= 2
    assert len({(s.linestyle, s.marker) for s in charts.STYLES}) == len(charts.STYLES)
    assert len({s.marker for s in charts.STYLES}) == len(charts.STYLES)


def test_entrants_chart_has_a_panel_per_arm_and_every_source() -> None:
    series = demo_documents().series
    words = texts(charts.entrants_chart(series))
    assert "Entrants per source and arm" in words and "Units entered" in words
    for arm in scenario.ARMS:
        assert f"arm {arm}" in words
    for source in ("organic", "newsletter", "push", "paid_search"):
        assert source in words


def test_engagement_and_effect_charts_are_labelled() -> None:
    documents = demo_documents()
    series, effect = documents.series, documents.effect
    words = texts(charts.engagement_chart(series, "routes_saved"))
    assert "Entrant engagement per arm: routes_saved" in words
    assert "Mean routes_saved per entrant" in words and "Day of entry" in words
    words = texts(charts.effect_chart(effect))
    assert "Effect on routes_saved: naive and re-weighted by entry cohort" in words
    assert "95% interval" in words and "cards vs reference" in words
    assert "naive (as randomised, all entrants)" in words


def test_labels_are_escaped_and_empty_data_still_draws_a_titled_chart() -> None:
    series = demo_documents().series
    hostile = {**series, "sources": [{**series["sources"][0], "source": "<script>x</script>"}]}
    svg = charts.entrants_chart(hostile)
    assert "<script>" not in svg and "&lt;script&gt;" in svg
    empty = texts(charts.share_chart({"arms": ["control", "cards"], "days": []}))
    assert "Arm shares against the plan" in empty and "No days with data yet." in empty


def test_date_axis_names_the_year_once_and_days_plainly() -> None:
    words = texts(charts.share_chart(demo_documents().series))
    assert "2026-Oct" not in words and "2026-Nov" not in words
    assert "2026" in words.split() and "09 Nov" in words


def test_entrants_arm_labels_head_their_panels_off_the_data() -> None:
    figure = charts.entrants_figure(demo_documents().series)
    axes = figure.axes
    assert [ax.get_title(loc="right") for ax in axes] == [f"arm {a}" for a in scenario.ARMS]
    # No text box inside a panel, where it would cover the lines.
    assert all(not ax.texts for ax in axes)


def test_palette_gives_the_browser_the_same_colours_and_distinct_dashes() -> None:
    looks = charts.palette()
    assert [look["color"] for look in looks] == [s.color for s in charts.STYLES]
    assert len({tuple(look["dash"]) for look in looks}) == len(looks)
