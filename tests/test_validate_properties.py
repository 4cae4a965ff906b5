"""Property-based checks: validation never crashes and never drops a row silently."""

from __future__ import annotations

import pandas as pd
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from _support import panel_settings
from panelpipe.validate import validate_panel

SETTINGS = panel_settings(
    name="p",
    sources=(),
    unit="u",
    period="t",
    regressors=("x",),
    cluster_by=("u",),
    estimators=("pooled_ols", "fixed_effects"),
)

units = st.sampled_from(["a", "b", " a", "c ", "007", "", None])
periods = st.one_of(
    st.integers(1990, 1995).map(str),
    st.sampled_from(["2020Q1", "2020-03", "2021-01-01", "x", "", None, "1993.0"]),
)
values = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True, width=32),
    st.sampled_from(["1.5", "abc", "", None, "-0", "1e3"]),
)


@st.composite
def frames(draw: st.DrawFn) -> pd.DataFrame:
    n = draw(st.integers(0, 25))
    data = {
        "u": pd.array([draw(units) for _ in range(n)], dtype="string"),
        "t": pd.array([draw(periods) for _ in range(n)], dtype="string"),
        "y": pd.Series([draw(values) for _ in range(n)], dtype="object"),
        "x": pd.Series([draw(values) for _ in range(n)], dtype="object"),
    }
    frame = pd.DataFrame(data)
    frame["_source"] = pd.Categorical(["f.csv"] * n)
    frame["_line"] = range(2, n + 2)
    return frame


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(frames())
def test_validation_never_crashes_and_keeps_every_row(frame: pd.DataFrame) -> None:
    before = frame.copy()
    result = validate_panel(frame, SETTINGS)
    pd.testing.assert_frame_equal(frame, before)  # the input is never modified
    assert result.status in {"pass", "warn", "fail"}
    assert all(f.message for f in result.findings)
    if result.status != "fail":
        # one file, so no re-delivery: every row must survive validation
        assert len(result.panel) == len(frame)
        assert sorted(result.panel["_line"]) == sorted(frame["_line"])
    else:
        assert any(f.severity == "error" for f in result.findings)


@settings(max_examples=60, deadline=None)
@given(
    st.lists(
        st.tuples(
            st.sampled_from("abcdef"),
            st.integers(2000, 2006),
            st.floats(-1e6, 1e6),
            st.floats(-1e6, 1e6),
        ),
        min_size=1,
        max_size=40,
    )
)
def test_valid_keys_pass_through_with_their_values(records: list) -> None:
    frame = pd.DataFrame(records, columns=["u", "t", "y", "x"]).drop_duplicates(["u", "t"])
    frame = frame.astype({"u": "string", "t": "string"})
    frame["_source"] = "f.csv"
    frame["_line"] = range(2, len(frame) + 2)
    result = validate_panel(frame, SETTINGS)
    if result.status == "fail":
        codes = {f.code for f in result.findings if f.severity == "error"}
        assert codes <= {
            "too_few_units",
            "too_few_periods",
            "constant_regressor",
            "constant_outcome",
            "value_too_small",
            "too_few_clusters",
        }, codes
        return
    merged = result.panel.merge(frame.astype({"t": "int64"}), on=["u", "t"], suffixes=("", "_in"))
    assert len(merged) == len(frame)
    assert (merged["y"] == merged["y_in"]).all() and (merged["x"] == merged["x_in"]).all()
