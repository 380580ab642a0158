"""A bad query or form value gets one plain sentence of ours, on pages and in the API: never a
validator's pattern or internal wording."""

from __future__ import annotations

import html

import pytest

from server.errors import validation_sentence

HINT = "'garbage' is not a valid week: give an ISO week such as 2026-W48."


def test_a_bad_week_on_the_summary_page_is_a_sentence(staff_client, trial) -> None:  # type: ignore[no-untyped-def]
    lead = staff_client("lead")
    r = lead.get("/summary?week=garbage", headers={"Accept": "text/html"})
    assert r.status_code == 422 and r.headers["content-type"].startswith("text/html")
    assert HINT in html.unescape(r.text)
    assert "pattern" not in r.text and "^(" not in r.text and "String should" not in r.text


def test_a_bad_week_in_the_api_is_the_same_sentence(staff_client, trial) -> None:  # type: ignore[no-untyped-def]
    lead = staff_client("lead")
    r = lead.get(f"/api/v1/trials/{trial.code}/summary?week=garbage")
    assert r.status_code == 422
    assert r.json()["error"] == {"code": "invalid_request", "message": HINT, "field": "week"}


@pytest.mark.parametrize(
    ("error", "loc", "page", "api"),
    [
        ({"type": "missing"}, "email", "'email' is required.", "'email' is required."),
        ({"type": "int_parsing", "input": "x"}, "limit", "'limit' must be a whole number.", None),
        ({"type": "less_than_equal", "ctx": {"le": 500}}, "limit", "'limit' must be at most 500.", None),
        ({"type": "greater_than", "ctx": {"gt": 0}}, "limit", "'limit' must be more than 0.", None),
        (
            {"type": "string_too_long", "ctx": {"max_length": 40}},
            "code",
            "'code' is too long: at most 40 characters.",
            None,
        ),
        (
            {"type": "string_pattern_mismatch", "input": "x" * 80},
            "serial",
            "The value given is not a valid serial.",
            None,
        ),
        (
            {"type": "model_attributes_type", "msg": "Input should be an object"},
            "",
            "The request is not valid here.",
            "Input should be an object.",
        ),
    ],
)
def test_each_kind_of_error_reads_as_a_sentence(error, loc, page, api) -> None:  # type: ignore[no-untyped-def]
    assert validation_sentence(error, loc, for_page=True) == page
    assert validation_sentence(error, loc, for_page=False) == (api or page)
