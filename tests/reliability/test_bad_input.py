"""The bad-input catalogue: every kind of bad request gets a 4xx problem document naming what
is wrong, and leaves the database exactly as it was.

Each entry of ``CATALOGUE`` is one kind of mistake a client can make (wrong type, value out of
range, calendar-invalid or out-of-window date, impossible sufficient statistics, non-finite
number, repeated member, unknown arm, oversize body or field, ragged or empty CSV, wrong
encoding, byte-order marks, wrong content type, broken JSON, invalid ids and allocation
schedules, unknown experiments and alerts...). For each the test checks:

* the status is the expected 4xx and the body is ``application/problem+json`` with ``type``,
  ``title``, ``status`` and ``detail`` (RFC 9457), the type naming the expected problem kind;
* the document names the problem: every expected field appears among ``errors[].field`` (or in
  ``detail`` when the problem is not tied to a field), and row problems give the row (and for
  CSV bodies the file line, header = line 1);
* a dump of the database (all tables, all rows) is identical before and after.

The app runs on the demo experiment with its data and alerts (``seeded``), on SQLite and
PostgreSQL, with small limits (256 KiB bodies, 500 rows) so that oversize requests stay cheap.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from typing import Any

import pytest

from tests.reliability.conftest import MAX_BODY_BYTES, MAX_ROWS, Seeded
from tests.reliability.support import dump_database, record

OBS = "/v1/experiments/route-cards/observations"
JSON_TYPE = "application/json"
CSV_TYPE = "text/csv"
CSV_HEADER = "date,arm,source,entered,routes_saved.n,routes_saved.sum,routes_saved.sum_sq\n"


@dataclass(frozen=True)
class Bad:
    """One kind of bad request and what the answer must say about it."""

    id: str
    method: str
    path: str
    body: bytes | None = None
    content_type: str | None = JSON_TYPE
    status: int = 422
    slug: str = "invalid-input"
    fields: tuple[str, ...] = ()  # each must be named by errors[].field (or the detail)
    row: int | None = None  # the row the (first) named field is reported on
    headers: dict[str, str] = field(default_factory=dict)


def row(**overrides: Any) -> dict[str, Any]:
    """A valid observation row of the demo experiment, changed by ``overrides``."""
    base: dict[str, Any] = {"date": "2026-11-20", "arm": "cards", "source": "organic",
                            "entered": 120,
                            "metrics": {"routes_saved": {"n": 120, "sum": 240.0,
                                                         "sum_sq": 600.0}}}
    base.update(overrides)
    return {k: v for k, v in base.items() if v is not _DROP}


_DROP = object()


def rows_body(*rows: dict[str, Any]) -> bytes:
    return json.dumps({"rows": list(rows)}).encode()


def obs(case_id: str, *rows: dict[str, Any], fields: tuple[str, ...], at: int | None = 0,
        status: int = 422, slug: str = "invalid-input") -> Bad:
    return Bad(case_id, "PUT", OBS, rows_body(*rows), fields=fields, row=at, status=status,
               slug=slug)


def raw(case_id: str, body: bytes, *, status: int = 400, slug: str = "malformed-body",
        fields: tuple[str, ...] = (), method: str = "PUT", path: str = OBS,
        content_type: str | None = JSON_TYPE) -> Bad:
    return Bad(case_id, method, path, body, content_type=content_type, status=status,
               slug=slug, fields=fields)


def csv(case_id: str, text: str | bytes, *, fields: tuple[str, ...], at: int | None = None,
        status: int = 422, slug: str = "invalid-input") -> Bad:
    body = text.encode("utf-8") if isinstance(text, str) else text
    return Bad(case_id, "PUT", OBS, body, content_type=CSV_TYPE, status=status, slug=slug,
               fields=fields, row=at)


def experiment(**overrides: Any) -> dict[str, Any]:
    base: dict[str, Any] = {"id": "trail-badges", "title": "Trail badges",
                            "start_date": "2026-11-02", "arms": ["control", "badges"]}
    base.update(overrides)
    return {k: v for k, v in base.items() if v is not _DROP}


def create(case_id: str, *, fields: tuple[str, ...] = (), status: int = 422,
           slug: str = "invalid-input", **overrides: Any) -> Bad:
    return Bad(case_id, "POST", "/v1/experiments", json.dumps(experiment(**overrides)).encode(),
               status=status, slug=slug, fields=fields)


def post(case_id: str, path: str, document: Any, *, fields: tuple[str, ...] = (),
         status: int = 422, slug: str = "invalid-input", method: str = "POST") -> Bad:
    return Bad(case_id, method, path, json.dumps(document).encode(), status=status, slug=slug,
               fields=fields)


def get(case_id: str, path: str, *, fields: tuple[str, ...] = (), status: int = 422,
        slug: str = "invalid-input", headers: dict[str, str] | None = None) -> Bad:
    return Bad(case_id, "GET", path, None, content_type=None, status=status, slug=slug,
               fields=fields, headers=headers or {})


GOOD_CSV_ROW = "2026-11-20,cards,organic,120,120,240,600\n"
METRIC = {"routes_saved": {"n": 120, "sum": 240.0, "sum_sq": 600.0}}
TOO_MANY = {"rows": [row(date=f"2026-11-{1 + i % 22:02d}", source=f"s{i}") for i in
                     range(MAX_ROWS + 1)]}

CATALOGUE: list[Bad] = [
    # -- observation rows as JSON: types, ranges, dates, statistics -------------------------
    obs("obs-date-not-a-date", row(date="yesterday"), fields=("date",)),
    obs("obs-date-calendar-invalid", row(date="2026-11-31"), fields=("date",)),
    obs("obs-date-leap-day-of-common-year", row(date="2027-02-29"), fields=("date",)),
    obs("obs-date-day-first-format", row(date="20/11/2026"), fields=("date",)),
    obs("obs-date-with-time", row(date="2026-11-20T10:00:00"), fields=("date",)),
    obs("obs-date-as-number", row(date=20261120), fields=("date",)),
    obs("obs-date-before-start", row(date="2026-10-01"), fields=("date",)),
    obs("obs-date-in-the-future", row(date="2999-01-01"), fields=("date",)),
    obs("obs-arm-unknown", row(arm="treatment"), fields=("arm",)),
    obs("obs-arm-missing", row(arm=_DROP), fields=("arm",)),
    obs("obs-arm-wrong-case", row(arm="Cards"), fields=("arm",)),
    obs("obs-entered-negative", row(entered=-5), fields=("entered",)),
    obs("obs-entered-fraction", row(entered=2.5), fields=("entered",)),
    obs("obs-entered-as-string", row(entered="120"), fields=("entered",)),
    obs("obs-entered-boolean", row(entered=True), fields=("entered",)),
    obs("obs-entered-null", row(entered=None), fields=("entered",)),
    obs("obs-entered-implausibly-large", row(entered=1e300, metrics=None), fields=("entered",)),
    obs("obs-metric-n-above-entered",
        row(metrics={"routes_saved": {"n": 121, "sum": 240.0, "sum_sq": 600.0}}),
        fields=("routes_saved.n",)),
    obs("obs-metric-sum-sq-below-bound",
        row(metrics={"routes_saved": {"n": 120, "sum": 240.0, "sum_sq": 100.0}}),
        fields=("routes_saved.sum_sq",)),
    obs("obs-metric-n-zero-with-sums",
        row(metrics={"routes_saved": {"n": 0, "sum": 3.0, "sum_sq": 9.0}}),
        fields=("routes_saved",)),
    obs("obs-metric-n-fraction",
        row(metrics={"routes_saved": {"n": 12.5, "sum": 24.0, "sum_sq": 60.0}}),
        fields=("routes_saved.n",)),
    obs("obs-metric-stat-missing", row(metrics={"routes_saved": {"n": 120, "sum": 240.0}}),
        fields=("metrics.routes_saved.sum_sq",)),
    obs("obs-metric-stat-unknown",
        row(metrics={"routes_saved": {**METRIC["routes_saved"], "mean": 2.0}}),
        fields=("metrics.routes_saved.mean",)),
    obs("obs-metric-name-invalid", row(metrics={"routes saved!": METRIC["routes_saved"]}),
        fields=("routes saved!",), at=None),
    obs("obs-metrics-not-an-object", row(metrics=[1, 2, 3]), fields=("metrics",)),
    obs("obs-source-too-long", row(source="s" * 129), fields=("source",)),
    obs("obs-source-nul-character", row(source="news\x00letter"), fields=("source",)),
    obs("obs-field-unknown", row(colour="green"), fields=("colour",)),
    obs("obs-key-repeated-in-request", row(), row(entered=99), fields=("date,arm,source",),
        at=1),
    obs("obs-second-row-bad-first-good", row(), row(date="2026-11-21", arm="variant"),
        fields=("arm",), at=1),
    raw("obs-top-level-field-unknown", json.dumps({"rows": [row()], "extra": 1}).encode(),
        status=422, slug="invalid-input", fields=("extra",)),
    raw("obs-rows-not-a-list", b'{"rows": {"date": "2026-11-20"}}', status=422,
        slug="invalid-input", fields=("rows",)),
    raw("obs-rows-empty", b'{"rows": []}', status=422, slug="invalid-input", fields=("rows",)),
    raw("obs-body-is-an-array", json.dumps([row()]).encode(), status=422, slug="invalid-input",
        fields=("rows",)),
    # -- JSON syntax, numbers, encodings ---------------------------------------------------
    raw("obs-json-nan-literal", b'{"rows": [{"date": "2026-11-20", "arm": "cards", '
                                b'"entered": NaN}]}'),
    raw("obs-json-infinity-literal", b'{"rows": [{"date": "2026-11-20", "arm": "cards", '
                                     b'"entered": -Infinity}]}'),
    raw("obs-json-member-repeated", b'{"rows": [{"date": "2026-11-20", "arm": "control", '
                                    b'"arm": "cards", "entered": 5}]}', fields=("arm",)),
    raw("obs-json-truncated", b'{"rows": [{"date": "2026-11-20", "arm": "ca'),
    raw("obs-json-trailing-garbage", rows_body(row()) + b" ]"),
    raw("obs-json-single-quotes", b"{'rows': []}"),
    raw("obs-json-utf16", rows_body(row()).decode().encode("utf-16")),
    raw("obs-json-latin1", json.dumps({"rows": [row(source="caf\u00e9")]},
                                      ensure_ascii=False).encode("latin-1")),
    raw("obs-json-lone-surrogate", b'{"rows": [{"date": "2026-11-20", "arm": "cards", '
                                   b'"source": "\\ud83c", "entered": 5}]}',
        status=422, slug="invalid-input", fields=("source",)),
    raw("obs-json-too-deep", b'{"rows": ' + b"[" * 50_000 + b"]" * 50_000 + b"}"),
    # -- limits, content types -------------------------------------------------------------
    raw("obs-too-many-rows", json.dumps(TOO_MANY).encode(), status=413,
        slug="content-too-large"),
    raw("obs-body-too-large", b'{"rows": [' + b" " * (MAX_BODY_BYTES + 1) + b"]}",
        status=413, slug="content-too-large"),
    raw("obs-content-type-text-plain", rows_body(row()), status=415,
        slug="unsupported-media-type", content_type="text/plain"),
    raw("obs-content-type-xml", b"<rows/>", status=415, slug="unsupported-media-type",
        content_type="application/xml"),
    raw("obs-content-type-form", b"date=2026-11-20&arm=cards", status=415,
        slug="unsupported-media-type", content_type="application/x-www-form-urlencoded"),
    # -- observation rows as CSV -------------------------------------------------------------
    csv("csv-empty-body", "", fields=("body",)),
    csv("csv-whitespace-only", " \n\n", fields=("body",)),
    csv("csv-header-only", CSV_HEADER, fields=("rows",)),
    csv("csv-required-column-missing", "date,arm,source\n2026-11-20,cards,organic\n",
        fields=("header",)),
    csv("csv-column-repeated", "date,arm,arm,entered\n2026-11-20,cards,cards,4\n",
        fields=("header",)),
    csv("csv-column-unknown", "date,arm,source,entered,colour\n2026-11-20,cards,organic,4,red\n",
        fields=("header",)),
    csv("csv-metric-column-missing", "date,arm,source,entered,routes_saved.n\n"
                                     "2026-11-20,cards,organic,4,4\n",
        fields=("routes_saved.sum",)),
    csv("csv-ragged-row-short", CSV_HEADER + GOOD_CSV_ROW + "2026-11-21,cards,organic\n",
        fields=("row",), at=1),
    csv("csv-ragged-row-long", CSV_HEADER + "2026-11-20,cards,organic,1,1,1,1,1\n",
        fields=("row",), at=0),
    csv("csv-unterminated-quote", CSV_HEADER + '2026-11-20,"cards,organic,1,1,1,1\n',
        fields=("body",)),
    csv("csv-latin1-encoding", (CSV_HEADER + "2026-11-20,cards,caf\u00e9,1,1,1,1\n")
        .encode("latin-1"), fields=("body",)),
    csv("csv-utf16-with-bom", (CSV_HEADER + GOOD_CSV_ROW).encode("utf-16"), fields=("body",)),
    csv("csv-utf16-le-without-bom", (CSV_HEADER + GOOD_CSV_ROW).encode("utf-16-le"),
        fields=("body",)),
    csv("csv-utf8-bom-then-bad-arm", "\ufeff" + CSV_HEADER + "2026-11-20,variant,organic,1,1,1,1\n",
        fields=("arm",), at=0),
    csv("csv-bad-date-on-second-row", CSV_HEADER + GOOD_CSV_ROW
        + "2026-13-01,cards,push,1,1,1,1\n", fields=("date",), at=1),
    csv("csv-entered-not-a-number", CSV_HEADER + "2026-11-20,cards,organic,many,1,1,1\n",
        fields=("entered",), at=0),
    csv("csv-entered-nan-text", CSV_HEADER + "2026-11-20,cards,organic,NaN,1,1,1\n",
        fields=("entered",), at=0),
    csv("csv-metric-partly-empty", CSV_HEADER + "2026-11-20,cards,organic,4,4,,9\n",
        fields=("routes_saved",), at=0),
    csv("csv-sum-sq-infinite", CSV_HEADER + "2026-11-20,cards,organic,4,4,8,inf\n",
        fields=("routes_saved",), at=0),
    csv("csv-nul-byte", CSV_HEADER + "2026-11-20,cards,org\x00anic,1,1,1,1\n",
        fields=("body",)),
    csv("csv-too-many-rows", CSV_HEADER + "".join(
        f"2026-11-{1 + i % 22:02d},cards,s{i},1,1,1,1\n" for i in range(MAX_ROWS + 1)),
        fields=(), status=413, slug="content-too-large"),
    # -- experiment definitions --------------------------------------------------------------
    create("exp-id-invalid-characters", id="Trail Badges!", fields=("id",)),
    create("exp-id-too-long", id="t" * 65, fields=("id",)),
    create("exp-id-exists", id="route-cards", status=409, slug="conflict"),
    create("exp-one-arm", arms=["control"], fields=("arms",)),
    create("exp-arms-repeated", arms=["control", "control"], fields=("arms",)),
    create("exp-arm-name-too-long", arms=["control", "b" * 65], fields=("arms[1]",)),
    create("exp-arm-name-blank", arms=["control", " "], fields=("arms[1]",)),
    create("exp-arms-not-a-list", arms="control,badges", fields=("arms",)),
    create("exp-too-many-arms", arms=[f"arm{i}" for i in range(27)], fields=("arms",)),
    create("exp-start-date-calendar-invalid", start_date="2026-02-30", fields=("start_date",)),
    create("exp-start-date-missing", start_date=_DROP, fields=("start_date",)),
    create("exp-start-date-before-2000", start_date="1900-01-01", fields=("start_date",)),
    create("exp-start-date-far-future", start_date="2999-01-01", fields=("start_date",)),
    create("exp-weights-do-not-sum-to-one",
           allocation=[{"from": "2026-11-02", "weights": [0.7, 0.7]}],
           fields=("allocation[0].weights",)),
    create("exp-weight-negative", allocation=[{"from": "2026-11-02", "weights": [1.5, -0.5]}],
           fields=("allocation[0].weights",)),
    create("exp-weight-zero", allocation=[{"from": "2026-11-02", "weights": [1.0, 0.0]}],
           fields=("allocation[0].weights",)),
    create("exp-weights-count-differs", allocation=[{"from": "2026-11-02", "weights": [1.0]}],
           fields=("allocation[0].weights",)),
    create("exp-weights-unknown-arm",
           allocation=[{"from": "2026-11-02", "weights": {"control": 0.5, "variant": 0.5}}],
           fields=("allocation[0].weights",)),
    create("exp-schedule-starts-after-start",
           allocation=[{"from": "2026-11-09", "weights": [0.5, 0.5]}],
           fields=("allocation[0].from",)),
    create("exp-schedule-steps-same-date",
           allocation=[{"from": "2026-11-02", "weights": [0.5, 0.5]},
                       {"from": "2026-11-02", "weights": [0.9, 0.1]}], fields=("allocation",)),
    create("exp-schedule-empty", allocation=[], fields=("allocation",)),
    create("exp-schedule-step-date-invalid",
           allocation=[{"from": "2026-11-31", "weights": [0.5, 0.5]}],
           fields=("allocation[0].from",)),
    create("exp-title-too-long", title="t" * 201, fields=("title",)),
    create("exp-title-nul-character", title="Trail\x00badges", fields=("title",)),
    create("exp-field-unknown", owner="someone", fields=("owner",)),
    create("exp-webhook-not-a-url", notify={"webhook_url": "not a url"},
           fields=("notify.webhook_url",)),
    create("exp-webhook-scheme-ftp", notify={"webhook_url": "ftp://hooks.larkspur.example/x"},
           fields=("notify.webhook_url",)),
    create("exp-webhook-loopback-target", notify={"webhook_url": "http://127.0.0.1:9/hook"},
           fields=("notify.webhook_url",)),
    create("exp-webhook-credentials-in-url",
           notify={"webhook_url": "https://user:pw@93.184.215.14/hook"},
           fields=("notify.webhook_url",)),
    create("exp-webhook-url-too-long",
           notify={"webhook_url": "https://93.184.215.14/" + "h" * 2100},
           fields=("notify.webhook_url",)),
    create("exp-webhook-secret-key-not-base64",
           notify={"webhook_url": "https://93.184.215.14/hook", "secret": "whsec_not*base64!"},
           fields=("notify.secret",)),
    create("exp-webhook-secret-too-short",
           notify={"webhook_url": "https://93.184.215.14/hook", "secret": "short"},
           fields=("notify.secret",)),
    raw("exp-json-infinity-weight",
        b'{"id": "trail-badges", "start_date": "2026-11-02", "arms": ["a", "b"], '
        b'"allocation": [{"from": "2026-11-02", "weights": [Infinity, 0.5]}]}',
        method="POST", path="/v1/experiments"),
    raw("exp-json-member-repeated",
        b'{"id": "trail-badges", "id": "route-cards", "start_date": "2026-11-02", '
        b'"arms": ["a", "b"]}', method="POST", path="/v1/experiments", fields=("id",)),
    raw("exp-json-repeated-member-name-unencodable", b'{"\\ud800": 1, "\\ud800": 2}',
        method="POST", path="/v1/experiments", fields=("\\ud800",)),
    raw("exp-json-member-name-with-nul", b'{"id\\u0000": "x"}', status=422,
        slug="invalid-input", method="POST", path="/v1/experiments", fields=("id\\x00",)),
    raw("exp-json-utf16", json.dumps(experiment()).encode("utf-16"), method="POST",
        path="/v1/experiments"),
    raw("exp-content-type-text-plain", json.dumps(experiment()).encode(), status=415,
        slug="unsupported-media-type", method="POST", path="/v1/experiments",
        content_type="text/plain"),
    raw("exp-body-too-large", json.dumps(experiment(title="t" * (MAX_BODY_BYTES + 10))).encode(),
        status=413, slug="content-too-large", method="POST", path="/v1/experiments"),
    raw("exp-body-not-an-object", b'["trail-badges"]', status=422, slug="invalid-input",
        method="POST", path="/v1/experiments", fields=("body",)),
    # -- changing an experiment --------------------------------------------------------------
    post("patch-unknown-experiment", "/v1/experiments/no-such-trail", {"title": "x"},
         method="PATCH", status=404, slug="not-found"),
    post("patch-title-null", "/v1/experiments/route-cards", {"title": None}, method="PATCH",
         fields=("title",)),
    post("patch-allocation-null", "/v1/experiments/route-cards", {"allocation": None},
         method="PATCH", fields=("allocation",)),
    post("patch-weights-do-not-sum-to-one", "/v1/experiments/route-cards",
         {"allocation": [{"from": "2026-10-26", "weights": [0.6, 0.6]}]}, method="PATCH",
         fields=("allocation[0].weights",)),
    post("patch-start-date-not-changeable", "/v1/experiments/route-cards",
         {"start_date": "2026-10-01"}, method="PATCH", fields=("start_date",)),
    # -- re-weighting, campaigns, sensitivity ------------------------------------------------
    post("reweight-unknown-metric", "/v1/experiments/route-cards/reweight",
         {"metric": "trail_rating"}, fields=("metric",)),
    post("reweight-custom-target-without-weights", "/v1/experiments/route-cards/reweight",
         {"metric": "routes_saved", "target": "custom"}, fields=("body",)),
    post("reweight-target-unknown", "/v1/experiments/route-cards/reweight",
         {"metric": "routes_saved", "target": "everyone"}, fields=("target",)),
    post("reweight-unknown-experiment", "/v1/experiments/no-such-trail/reweight",
         {"metric": "routes_saved"}, status=404, slug="not-found"),
    post("campaign-audience-unknown-arm", "/v1/experiments/route-cards/campaigns",
         {"name": "spring-mail", "source": "newsletter", "start": "2026-11-03",
          "end": "2026-11-05", "audience": {"variant": 0.4}}, fields=("audience.variant",)),
    post("campaign-share-above-one", "/v1/experiments/route-cards/campaigns",
         {"name": "spring-mail", "source": "newsletter", "start": "2026-11-03",
          "end": "2026-11-05", "audience": {"cards": 1.5}}, fields=("audience.cards",)),
    post("campaign-ends-before-it-starts", "/v1/experiments/route-cards/campaigns",
         {"name": "spring-mail", "source": "newsletter", "start": "2026-11-05",
          "end": "2026-11-03", "audience": {"cards": 0.4}}, fields=("end",)),
    post("campaign-expected-size-beyond-bigint", "/v1/experiments/route-cards/campaigns",
         {"name": "spring-mail", "source": "newsletter", "start": "2026-11-03",
          "end": "2026-11-05", "audience": {"cards": 0.4}, "expected_size": 2**64},
         fields=("expected_size",)),
    get("sensitivity-days-out-of-range", "/v1/experiments/route-cards/sensitivity?days=400",
        fields=("days",)),
    # -- reads: unknown experiments, bad queries, negotiation ------------------------------
    get("experiment-unknown", "/v1/experiments/no-such-trail", status=404, slug="not-found"),
    get("experiment-id-with-nul", "/v1/experiments/route%00cards", status=404,
        slug="not-found"),
    get("experiments-cursor-forged", "/v1/experiments?cursor=%25%25%25", fields=("cursor",)),
    get("experiments-limit-zero", "/v1/experiments?limit=0", fields=("limit",)),
    get("diagnosis-version-unknown", "/v1/experiments/route-cards/diagnosis?version=99",
        status=404, slug="not-found"),
    get("diagnosis-version-overflow",
        "/v1/experiments/route-cards/diagnosis?version=99999999999999", status=404,
        slug="not-found"),
    get("observations-from-calendar-invalid",
        "/v1/experiments/route-cards/observations?from=2026-11-31", fields=("from",)),
    get("observations-not-acceptable", OBS, status=406, slug="not-acceptable",
        headers={"Accept": "image/png"}),
    # -- alerts ------------------------------------------------------------------------------
    get("alert-unknown", "/v1/alerts/987654", status=404, slug="not-found"),
    get("alert-id-not-a-number", "/v1/alerts/first", fields=("alert_id",)),
    get("alert-id-beyond-bigint", "/v1/alerts/99999999999999999999999", status=404,
        slug="not-found"),
    get("alert-id-below-bigint", "/v1/alerts/-99999999999999999999999", status=404,
        slug="not-found"),
    post("alert-resolve-id-below-bigint", "/v1/alerts/-3000992496221174590603264/resolve", {},
         status=404, slug="not-found"),
    get("alert-deliveries-unknown-alert", "/v1/alerts/987654/deliveries", status=404,
        slug="not-found"),
    post("alert-acknowledge-unknown", "/v1/alerts/987654/acknowledge", {"note": "seen"},
         status=404, slug="not-found"),
    post("alert-resolve-unknown", "/v1/alerts/987654/resolve", {}, status=404,
         slug="not-found"),
    get("alerts-status-unknown", "/v1/alerts?status=closed", fields=("status[0]",)),
    get("alerts-kind-unknown", "/v1/alerts?kind=drift", fields=("kind",)),
    get("alerts-since-calendar-invalid", "/v1/alerts?since=2026-02-30", fields=("since",)),
    get("alerts-since-out-of-range", "/v1/alerts?since=9999-12-31T23:00:00-05:00",
        fields=("since",)),
    get("alerts-cursor-not-digits", "/v1/alerts?cursor=%C2%B2", fields=("cursor",)),
    get("alerts-cursor-beyond-bigint", "/v1/alerts?cursor=99999999999999999999",
        fields=("cursor",)),
    get("alerts-query-with-nul", "/v1/alerts?experiment=route%00cards", fields=("experiment",)),
    # -- tokens ------------------------------------------------------------------------------
    post("token-scope-unknown", "/v1/tokens", {"scope": "root"}, fields=("scope",)),
    post("token-name-invalid", "/v1/tokens", {"scope": "read", "name": "two words"},
         fields=("name",)),
    post("token-name-reserved", "/v1/tokens", {"scope": "read", "name": "inrush"},
         fields=("name",)),
    Bad("token-revoke-unknown", "DELETE", "/v1/tokens/no-such-token", None, content_type=None,
        status=404, slug="not-found"),
    Bad("token-revoke-id-beyond-integer", "DELETE", "/v1/tokens/99999999999", None,
        content_type=None, status=404, slug="not-found"),
]


def test_the_catalogue_is_wide_and_ids_are_distinct() -> None:
    ids = [case.id for case in CATALOGUE]
    assert len(ids) == len(set(ids))
    assert len(ids) >= 40
    assert all(400 <= case.status < 500 for case in CATALOGUE)
    record("bad_input.kinds", len(ids))


@pytest.mark.parametrize("case", CATALOGUE, ids=[case.id for case in CATALOGUE])
def test_bad_request_is_named_and_writes_nothing(seeded: Seeded, case: Bad) -> None:
    before = dump_database(seeded.engine)
    headers = dict(case.headers)
    if case.content_type is not None:
        headers["Content-Type"] = case.content_type
    response = seeded.client.request(case.method, case.path, content=case.body,
                                     headers=headers)

    assert response.status_code == case.status, response.text[:2000]
    assert response.headers["content-type"].startswith("application/problem+json")
    problem = response.json()
    for member in ("type", "title", "status", "detail"):
        assert isinstance(problem.get(member), str | int), problem
    assert problem["status"] == case.status
    assert problem["type"].endswith(f"/problems/{case.slug}"), problem["type"]
    errors = problem.get("errors") or []
    named = {e["field"] for e in errors}
    for expected in case.fields:
        assert expected in named or expected in problem["detail"], (expected, problem)
    if case.row is not None:
        located = [e for e in errors if e["field"] == case.fields[0]]
        assert any(e["row"] == case.row for e in located), problem
        if case.content_type == CSV_TYPE:
            assert any(e.get("line") == case.row + 2 for e in located), problem
    assert dump_database(seeded.engine) == before, "a refused request changed the database"
