"""Bad requests: each must answer 4xx with an RFC 9457 problem document
(`application/problem+json`) whose `pointer` is the RFC 6901 JSON Pointer to the part of the
request at fault -- never a 500.

Where the contract leaves two pointers equally reasonable (e.g. a missing member: the member
itself or the object that lacks it), the test accepts both and says so.
"""

from __future__ import annotations

import json

import pytest

X_COUNT = {"x": {"column": "cat"}, "y": {"agg": "count"}}


def body(**kw):
    out = {"source": "fixture", "channels": X_COUNT}
    out.update(kw)
    return out


def ch(**channels):
    return body(channels=channels)


# (id, request body, accepted pointers, a name the suggestions must contain or None)
CASES = [
    ("unknown_source", {"source": "fixtrue", "channels": X_COUNT}, {"/source"}, "fixture"),
    ("missing_source", {"channels": X_COUNT}, {"/source"}, None),
    ("unknown_column_key", ch(x={"column": "caat"}, y={"agg": "count"}), {"/channels/x/column"}, "cat"),
    ("unknown_column_measure", ch(x={"column": "cat"}, y={"agg": "sum", "column": "ww"}), {"/channels/y/column"}, "w"),
    ("unknown_channel_name", ch(colour={"column": "cat"}, y={"agg": "count"}), {"/channels/colour"}, None),
    ("misspelled_channel_option", ch(x={"column": "x", "bins": {"bins": 10}}, y={"agg": "count"}), {"/channels/x/bins"}, None),
    ("bin_on_text", ch(x={"column": "cat", "bin": {"bins": 10}}, y={"agg": "count"}), {"/channels/x/bin"}, None),
    ("avg_of_text", ch(x={"column": "grp2"}, y={"agg": "avg", "column": "cat"}), {"/channels/y/agg", "/channels/y/column"}, None),
    ("stddev_of_text", ch(x={"column": "grp2"}, y={"agg": "stddev_samp", "column": "label"}), {"/channels/y/agg", "/channels/y/column"}, None),
    ("trunc_on_number", ch(x={"column": "x", "trunc": "month"}, y={"agg": "count"}), {"/channels/x/trunc"}, None),
    ("extract_on_text", ch(x={"column": "cat", "extract": "hour"}, y={"agg": "count"}), {"/channels/x/extract"}, None),
    ("unknown_trunc_unit", ch(x={"column": "ts", "trunc": "fortnight"}, y={"agg": "count"}), {"/channels/x/trunc"}, None),
    ("quantile_without_q", ch(x={"column": "cat"}, y={"agg": "quantile", "column": "x"}), {"/channels/y/q", "/channels/y"}, None),
    ("quantile_q_above_1", ch(x={"column": "cat"}, y={"agg": "quantile", "column": "x", "q": 1.5}), {"/channels/y/q"}, None),
    ("quantile_q_negative", ch(x={"column": "cat"}, y={"agg": "quantile", "column": "x", "q": -0.1}), {"/channels/y/q"}, None),
    ("bins_zero", ch(x={"column": "x", "bin": {"bins": 0}}, y={"agg": "count"}), {"/channels/x/bin/bins"}, None),
    ("width_negative", ch(x={"column": "x", "bin": {"width": -2}}, y={"agg": "count"}), {"/channels/x/bin/width"}, None),
    ("width_zero", ch(x={"column": "x", "bin": {"width": 0}}, y={"agg": "count"}), {"/channels/x/bin/width"}, None),
    ("bins_and_width", ch(x={"column": "x", "bin": {"bins": 10, "width": 5}}, y={"agg": "count"}),
     {"/channels/x/bin", "/channels/x/bin/bins", "/channels/x/bin/width"}, None),
    ("origin_without_width", ch(x={"column": "x", "bin": {"bins": 10, "origin": 1}}, y={"agg": "count"}),
     {"/channels/x/bin", "/channels/x/bin/origin"}, None),
    ("limits_reversed", ch(x={"column": "x", "bin": {"width": 5, "limits": [100, 0]}}, y={"agg": "count"}),
     {"/channels/x/bin/limits"}, None),
    ("unknown_agg", ch(x={"column": "cat"}, y={"agg": "average", "column": "x"}), {"/channels/y/agg"}, None),
    ("unknown_rule", ch(x={"column": "x", "bin": {"rule": "doane"}}, y={"agg": "count"}), {"/channels/x/bin/rule"}, None),
    ("bad_tz", ch(x={"column": "ts", "trunc": "day", "tz": "Europe/Atlantis"}, y={"agg": "count"}), {"/channels/x/tz"}, None),
    ("where_unknown_operator", body(where=[{"column": "cat", "like": "a%"}]), {"/where/0/like"}, None),
    ("where_unknown_column", body(where=[{"column": "grp", "eq": "north"}]), {"/where/0/column"}, "grp2"),
    ("where_no_operator", body(where=[{"column": "cat"}]), {"/where/0"}, None),
    ("in_not_a_list", body(where=[{"column": "cat", "in": "alpha"}]), {"/where/0/in"}, None),
    ("wrong_type_for_number", body(where=[{"column": "n", "eq": "abc"}]), {"/where/0/eq"}, None),
    ("wrong_type_in_list", body(where=[{"column": "x", "in": [1, "two"]}]), {"/where/0/in", "/where/0/in/1"}, None),
    ("bad_timestamp_literal", body(where=[{"column": "ts", "gte": "not-a-date"}]), {"/where/0/gte"}, None),
    ("contains_on_number", body(where=[{"column": "x", "contains": "5"}]), {"/where/0/contains"}, None),
    ("is_null_not_bool", body(where=[{"column": "x", "is_null": "yes"}]), {"/where/0/is_null"}, None),
    ("nested_any_unknown_column", body(where=[{"any": [{"column": "cat", "eq": "alpha"}, {"column": "nn", "gt": 1}]}]),
     {"/where/0/any/1/column"}, "n"),
    ("nested_not_bad_operator", body(where=[{"not": {"column": "cat", "equals": "alpha"}}]), {"/where/0/not/equals"}, None),
    ("where_not_a_list", body(where={"column": "cat", "eq": "alpha"}), {"/where"}, None),
    ("empty_channels", {"source": "fixture", "channels": {}}, {"/channels"}, None),
    ("missing_channels", {"source": "fixture"}, {"/channels"}, None),
    ("channel_not_object", ch(x="cat", y={"agg": "count"}), {"/channels/x"}, None),
    ("limit_zero", body(limit=0), {"/limit"}, None),
    ("limit_negative", body(limit=-5), {"/limit"}, None),
    ("limit_not_integer", body(limit="many"), {"/limit"}, None),
    ("stack_without_measure", ch(x={"column": "cat"}, color={"column": "grp2"}) | {"stack": "sum"}, {"/stack"}, None),
    ("stack_unknown_mode", body(stack="stacked"), {"/stack"}, None),
    ("empty_bins_unknown_mode", body(empty_bins="fill"), {"/empty_bins"}, None),
    ("top_on_number", ch(x={"column": "x", "top": 3}, y={"agg": "count"}), {"/channels/x/top"}, None),
    ("top_zero", ch(x={"column": "cat", "top": 0}, y={"agg": "count"}), {"/channels/x/top"}, None),
    ("sort_unknown_channel", body(sort=[{"channel": "size", "desc": True}]), {"/sort/0/channel"}, None),
    ("sort_not_a_channel_name", body(sort=[{"channel": "height"}]), {"/sort/0/channel"}, None),
    ("sort_desc_not_bool", body(sort=[{"channel": "y", "desc": "down"}]), {"/sort/0/desc"}, None),
    ("facet_unknown_column", body(facet={"row": {"column": "grp3"}}), {"/facet/row/column"}, "grp2"),
    ("facet_with_agg", body(facet={"row": {"agg": "count"}}), {"/facet/row", "/facet/row/agg"}, None),
    ("measure_with_bin", ch(x={"column": "cat"}, y={"agg": "sum", "column": "x", "bin": {"bins": 5}}),
     {"/channels/y/bin", "/channels/y"}, None),
    ("time_bin_with_width", ch(x={"column": "ts", "bin": {"width": 3600}}, y={"agg": "count"}), {"/channels/x/bin/width", "/channels/x/bin"}, None),
    ("unknown_top_level_member", body(filters=[]), {"/filters"}, None),
    ("by_unknown_column", ch(x={"column": "cat"}, y={"agg": "count"}, by=[{"column": "grp2"}, {"column": "zone"}]),
     {"/channels/by/1/column"}, None),
    # share (planner/aggregates.py): a boolean column or a condition, exactly one of them
    ("share_of_number", ch(x={"column": "cat"}, y={"agg": "share", "column": "x"}), {"/channels/y/agg"}, None),
    ("share_column_and_condition", ch(x={"column": "cat"}, y={"agg": "share", "column": "flag",
                                                              "condition": "x > 1"}), {"/channels/y"}, None),
    ("share_without_input", ch(x={"column": "cat"}, y={"agg": "share"}), {"/channels/y"}, None),
    ("share_condition_unknown_column", ch(x={"column": "cat"}, y={"agg": "share", "condition": "xx > 1"}),
     {"/channels/y/condition"}, "x"),
    ("share_condition_not_boolean", ch(x={"column": "cat"}, y={"agg": "share", "condition": "x + 1"}),
     {"/channels/y/condition"}, None),
    ("share_condition_subquery", ch(x={"column": "cat"}, y={"agg": "share",
                                                            "condition": "x IN (SELECT 1)"}),
     {"/channels/y/condition"}, None),
    ("condition_on_sum", ch(x={"column": "cat"}, y={"agg": "sum", "column": "x", "condition": "x > 1"}),
     {"/channels/y"}, None),
    ("stack_of_share", body(channels={"x": {"column": "grp2"}, "color": {"column": "cat"},
                                      "y": {"agg": "share", "column": "flag"}}, stack="sum"),
     {"/channels/y/agg"}, None),
]


def _check_problem(r, accepted):
    assert r.status_code != 500, r.text
    assert 400 <= r.status_code < 500, f"{r.status_code}: {r.text[:500]}"
    assert r.headers["content-type"].split(";")[0].strip() == "application/problem+json"  # reference: RFC 9457 section 3
    p = r.json()
    assert isinstance(p, dict)
    assert p.get("status") == r.status_code  # RFC 9457: status member mirrors the HTTP status
    assert isinstance(p.get("title"), str) and p["title"]
    assert isinstance(p.get("detail"), str) and p["detail"]
    assert "/problems/" in p.get("type", "")  # DEVELOPERS: type is /problems/<slug>
    assert p.get("pointer") in accepted, f"pointer {p.get('pointer')!r} not in {sorted(accepted)}; problem: {p}"  # reference: RFC 6901
    errs = p.get("errors")
    assert isinstance(errs, list) and errs
    assert any(e.get("pointer") == p["pointer"] for e in errs)
    return p


@pytest.mark.parametrize("req,accepted,suggest", [c[1:] for c in CASES], ids=[c[0] for c in CASES])
def test_bad_request_is_problem_json(client, req, accepted, suggest):
    r = client.post("/v1/chart", json=req)
    p = _check_problem(r, accepted)
    if suggest is not None:
        assert suggest in (p.get("suggestions") or []), p  # DESIGN: nearest valid names for an unknown name


@pytest.mark.parametrize("req,accepted,suggest", [c[1:] for c in CASES[:12]], ids=[c[0] for c in CASES[:12]])
def test_bad_request_on_sql_endpoint_too(client, req, accepted, suggest):
    # /v1/sql plans through the same validation, so it must refuse the same way
    _check_problem(client.post("/v1/sql", json=req), accepted)


def test_avg_of_a_boolean_points_at_share(client):
    # the 422 names the aggregate that does answer "how often is it true" (planner/aggregates.py)
    r = client.post("/v1/chart", json=ch(x={"column": "cat"}, y={"agg": "avg", "column": "flag"}))
    p = _check_problem(r, {"/channels/y/agg"})
    assert '"share"' in p["detail"], p


def test_distinct_cases_count():
    assert len({c[0] for c in CASES}) == len(CASES) >= 25


@pytest.mark.parametrize(
    "raw",
    [b"{not json", b"", b"[1, 2, 3]", b"\"a string\"", b"42", b"null", b"{\"source\": \"fixture\", \"channels\": "],
    ids=["broken", "empty", "array", "string", "number", "null", "truncated"],
)
def test_body_not_a_json_object(client, raw):
    r = client.post("/v1/chart", content=raw, headers={"content-type": "application/json"})
    _check_problem(r, {""})  # RFC 6901: "" is the whole document


def test_non_utf8_body(client):
    r = client.post("/v1/chart", content=b"\xff\xfe\x00{", headers={"content-type": "application/json"})
    _check_problem(r, {""})


def test_unknown_source_detail_endpoint(client):
    r = client.get("/v1/sources/nope")
    assert r.status_code == 404
    assert r.headers["content-type"].split(";")[0] == "application/problem+json"


def test_several_errors_are_all_listed(client):
    req = {
        "source": "fixture",
        "channels": {"x": {"column": "caat"}, "y": {"agg": "quantile", "column": "x", "q": 7}},
        "limit": 0,
    }
    r = client.post("/v1/chart", json=req)
    assert 400 <= r.status_code < 500
    p = r.json()
    ptrs = {e.get("pointer") for e in p.get("errors", [])}
    # DEVELOPERS: errors lists all problems found. Shape problems (q, limit) are found together
    # before the request is checked against the schema, so at least those two appear.
    assert {"/channels/y/q", "/limit"} <= ptrs, p


def test_pointer_escapes_tilde_and_slash(client):
    # RFC 6901 section 3: '~' -> '~0', '/' -> '~1' in a reference token
    r = client.post("/v1/chart", json=ch(**{"a/b~c": {"column": "cat"}, "y": {"agg": "count"}}))
    _check_problem(r, {"/channels/a~1b~0c"})


def test_error_response_is_valid_json_even_with_unicode_names(client):
    r = client.post("/v1/chart", json=ch(x={"column": "東京"}, y={"agg": "count"}))
    p = _check_problem(r, {"/channels/x/column"})
    assert "東京" in json.dumps(p, ensure_ascii=False)
