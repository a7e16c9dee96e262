"""Metric formulas: parsing, checking and evaluation (references: numpy, hand-worked)."""

from __future__ import annotations

import numpy as np
import pytest

from calibrate.errors import InputError
from calibrate.formulas import FUNCTIONS, parse_formula

MEASURES = ("impressions", "clicks", "spend", "revenue")
WHERE = "workspace.toml [metrics] key 'm'"


def values() -> dict[str, np.ndarray]:
    return {
        "impressions": np.array([[100.0, 0.0, 50.0], [0.0, 10.0, 4.0]]),
        "clicks": np.array([[5.0, 0.0, 1.0], [3.0, 0.0, 2.0]]),
        "spend": np.array([[2.0, 0.0, 0.5], [1.0, 4.0, 0.0]]),
        "revenue": np.array([[3.0, 1.0, 0.25], [1.0, 2.0, 5.0]]),
    }


def test_ratio_matches_numpy_with_nan_where_denominator_is_zero() -> None:
    v = values()
    f = parse_formula("clicks / impressions", MEASURES, WHERE)
    assert f.names == ("clicks", "impressions")
    # reference: numpy division, then NaN wherever the denominator is 0 (0/0 and 3/0 alike)
    with np.errstate(all="ignore"):
        expected = v["clicks"] / v["impressions"]
    expected[v["impressions"] == 0] = np.nan
    got = f.evaluate(v)
    np.testing.assert_array_equal(got, expected)
    assert np.isnan(got[1, 0])  # 3 / 0: NaN, not inf
    assert not np.isinf(got).any()


def test_hand_worked_margin_rate_with_functions_and_unary_minus() -> None:
    v = values()
    f = parse_formula("(revenue - spend) / max(spend, 1) + -abs(min(clicks, 2))", MEASURES, WHERE)
    assert set(f.names) == {"revenue", "spend", "clicks"}
    got = f.evaluate(v)
    # hand-worked, row 0: (3-2)/max(2,1) - min(5,2) = 0.5 - 2 = -1.5
    #                     (1-0)/max(0,1) - min(0,2) = 1 - 0 = 1
    #                     (0.25-0.5)/max(0.5,1) - min(1,2) = -0.25 - 1 = -1.25
    #          row 1: (1-1)/1 - 2 = -2;  (2-4)/4 - 0 = -0.5;  (5-0)/1 - 2 = 3
    np.testing.assert_allclose(got, [[-1.5, 1.0, -1.25], [-2.0, -0.5, 3.0]])


def test_operator_precedence_and_constants() -> None:
    v = {"clicks": np.array([2.0, 4.0])}
    f = parse_formula("1 + clicks * 3 / 2 - 0.5", ("clicks",), WHERE)
    # hand-worked: 1 + 2*3/2 - 0.5 = 3.5 ; 1 + 4*3/2 - 0.5 = 6.5
    np.testing.assert_allclose(f.evaluate(v), [3.5, 6.5])


def test_nan_input_stays_nan_through_max() -> None:
    v = {"clicks": np.array([np.nan, 1.0])}
    got = parse_formula("max(clicks, 0)", ("clicks",), WHERE).evaluate(v)
    assert np.isnan(got[0]) and got[1] == 1.0


@pytest.mark.parametrize(
    ("text", "fragment"),
    [
        ("clicks / views", "unknown measure 'views'"),
        ("clicks.real", "attribute access is not allowed"),
        ("clicks.__class__", "attribute access is not allowed"),
        ("eval('1')", "function 'eval' is not allowed"),
        ("__import__('os').system('true')", "is not allowed"),
        ("np.log(clicks)", "function 'np.log' is not allowed"),
        ("clicks ** 2", "operator Pow is not allowed"),
        ("clicks // 2", "operator FloorDiv is not allowed"),
        ("clicks > 2", "Compare is not allowed"),
        ("clicks[0]", "indexing is not allowed"),
        ("(lambda: 1)()", "is not allowed"),
        ("'clicks'", "only numbers may appear as constants"),
        ("True + clicks", "only numbers may appear as constants"),
        ("not clicks", "operator Not is not allowed"),
        ("abs(clicks, spend)", "function 'abs' takes 1 argument(s), but got 2"),
        ("max(clicks)", "function 'max' takes at least 2 argument(s), but got 1"),
        ("max(clicks, key=spend)", "takes plain arguments only"),
        ("clicks / (impressions", "cannot parse formula"),
        ("1 + 2", "must use at least one measure"),
        ("", "must be a formula"),
    ],
)
def test_invalid_formulas_name_the_key_and_problem(text: str, fragment: str) -> None:
    with pytest.raises(InputError) as info:
        parse_formula(text, MEASURES, WHERE)
    message = str(info.value)
    assert message.startswith(WHERE + ": ")
    assert fragment in message
    assert "\n" not in message


def test_registry_is_the_whitelist() -> None:
    assert set(FUNCTIONS) == {"abs", "max", "min"}
    for name in FUNCTIONS:
        parse_formula(f"{name}(clicks{', spend' if name != 'abs' else ''})", MEASURES, WHERE)
