"""Validation of chains: every problem found at once, each naming its place."""
from fractions import Fraction

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from core.errors import ValidationError
from core.model import Chain, State, Transition, parse_probability


def chain(states, transitions, **kw):
    return Chain(
        states=tuple(State(s) for s in states),
        transitions=tuple(Transition(a, b, p) for a, b, p in transitions),
        **kw,
    )


def codes(c):
    return [p.code for p in c.problems]


# --------------------------------------------------------------------------
# parsing what the user typed
# --------------------------------------------------------------------------
@pytest.mark.parametrize(
    "raw, expected",
    [
        ("0.3", Fraction(3, 10)),
        ("1/3", Fraction(1, 3)),
        (" 1 / 3 ", Fraction(1, 3)),
        ("2.5e-11", Fraction(25, 10**12)),
        ("2.5E-11", Fraction(25, 10**12)),
        (".5", Fraction(1, 2)),
        ("0.5/3", Fraction(1, 6)),
        ("2.5%", Fraction(1, 40)),
        (0.1, Fraction(1, 10)),  # a JSON number keeps its decimal reading
        (1, Fraction(1)),
        (0, Fraction(0)),
        ("1e-15", Fraction(1, 10**15)),
    ],
)
def test_parse_probability_exact(raw, expected):
    assert parse_probability(raw) == expected


def test_parse_rest_keyword():
    from core.model import REST_VALUE

    assert parse_probability("rest") is REST_VALUE
    assert parse_probability(" Rest ") is REST_VALUE


@pytest.mark.parametrize("raw", ["abc", "1/0", "", "0.3.4", "--1", "1/3/4", True, None, [1]])
def test_parse_probability_rejects(raw):
    with pytest.raises(ValueError):
        parse_probability(raw)


@pytest.mark.parametrize("raw", ["nan", "NaN", "inf", "-Infinity", float("nan"), float("inf")])
def test_parse_probability_nonfinite(raw):
    with pytest.raises(ValueError, match="not a finite number"):
        parse_probability(raw)


# --------------------------------------------------------------------------
# a valid chain and its matrix
# --------------------------------------------------------------------------
def test_valid_chain_matrix_and_rest():
    c = chain(["a", "b"], [("a", "b", "1/3"), ("a", "a", "rest"), ("b", "a", 1)])
    assert c.is_valid and c.problems == ()
    P = c.matrix()
    np.testing.assert_array_equal(P, [[2 / 3, 1 / 3], [1.0, 0.0]])


def test_rest_keeps_tiny_remainder_exactly():
    # 'rest' is resolved in exact rational arithmetic: the remainder of
    # 1 - (1 - 1e-15) is exactly 1e-15, which float subtraction would blur
    # (1 - 0.999999999999999 == 1.1102230246251565e-15 in binary floats).
    c = chain(["a", "b"], [("a", "a", "0.999999999999999"), ("a", "b", "rest"), ("b", "b", 1)])
    assert c.is_valid
    assert c.matrix()[0, 1] == 1e-15
    assert c.exact_probabilities[("a", "b")] == Fraction(1, 10**15)


def test_matrix_raises_with_all_problems():
    c = chain(["a", "b"], [("a", "b", "0.5"), ("b", "b", "-0.1")])
    with pytest.raises(ValidationError) as info:
        c.matrix()
    assert len(info.value.problems) == 2
    assert "state 'a': probabilities sum to 0.5 (must be 1)" in str(info.value)


# --------------------------------------------------------------------------
# one test per validation problem; each message names the place
# --------------------------------------------------------------------------
def test_negative_probability():
    c = chain(["a", "b"], [("a", "b", "-0.2"), ("a", "a", "rest"), ("b", "b", 1)])
    (p,) = c.problems
    assert p.code == "negative" and p.state == "a" and p.transition == ("a", "b")
    assert "'a' -> 'b'" in p.message and "negative" in p.message


def test_probability_above_one():
    c = chain(["a", "b"], [("a", "b", "1.2"), ("b", "b", 1)])
    (p,) = c.problems
    assert p.code == "above-one" and p.transition == ("a", "b")
    assert "'a' -> 'b'" in p.message and "greater than 1" in p.message


@pytest.mark.parametrize("raw", ["nan", float("inf")])
def test_not_finite(raw):
    c = chain(["a"], [("a", "a", raw)])
    (p,) = c.problems
    assert p.code == "not-finite" and p.transition == ("a", "a")
    assert "'a' -> 'a'" in p.message


def test_unparseable_text():
    c = chain(["pump", "b"], [("pump", "b", "one third"), ("b", "b", 1)])
    (p,) = c.problems
    assert p.code == "unparseable" and p.state == "pump"
    assert "'pump' -> 'b'" in p.message and "'one third'" in p.message


def test_unknown_state():
    c = chain(["a"], [("a", "a", "rest"), ("a", "ghost", "0.1")])
    assert codes(c) == ["unknown-state"]
    p = c.problems[0]
    assert p.value == "ghost" and "'ghost'" in p.message and "does not exist" in p.message


def test_unknown_source_state():
    c = chain(["a"], [("a", "a", 1), ("ghost", "a", "1")])
    assert codes(c) == ["unknown-state"]
    assert c.problems[0].state is None and "'ghost'" in c.problems[0].message


def test_duplicate_state_id():
    c = chain(["a", "a"], [("a", "a", 1)])
    assert codes(c) == ["duplicate-state"]
    assert "'a' is defined more than once" in c.problems[0].message


def test_empty_state_id():
    c = Chain(states=(State(""),), transitions=())
    assert "bad-state-id" in codes(c)


def test_duplicate_transition():
    c = chain(["a", "b"], [("a", "b", "0.5"), ("a", "b", "0.5"), ("b", "b", 1)])
    assert codes(c) == ["duplicate-transition"]
    assert "'a' -> 'b' is given more than once" in c.problems[0].message


def test_two_rest_in_a_row():
    c = chain(["a", "b"], [("a", "b", "rest"), ("a", "a", "rest"), ("b", "b", 1)])
    (p,) = c.problems
    assert p.code == "two-rest" and p.state == "a"
    assert "'rest' twice" in p.message


def test_negative_rest():
    c = chain(["a", "b", "c"], [("a", "b", "0.7"), ("a", "c", "0.6"), ("a", "a", "rest"),
                                ("b", "b", 1), ("c", "c", 1)])
    (p,) = c.problems
    assert p.code == "negative-rest" and p.state == "a" and p.transition == ("a", "a")
    assert "would be -0.3" in p.message and "sum to 1.3" in p.message


def test_row_sum_off_says_the_sum():
    c = chain(["pump", "b"], [("pump", "b", "0.7"), ("pump", "pump", "0.5"), ("b", "b", 1)])
    (p,) = c.problems
    assert p.code == "row-sum" and p.state == "pump"
    assert p.message == "state 'pump': probabilities sum to 1.2 (must be 1)"


def test_row_sum_within_tolerance_accepted_and_beyond_refused():
    ok = chain(["a"], [("a", "a", "1.0000000005")])
    assert ok.is_valid is False  # above one is refused outright
    ok2 = chain(["a", "b"], [("a", "a", "0.4999999996"), ("a", "b", "0.5"), ("b", "b", 1)])
    assert ok2.is_valid  # off by 4e-10 < 1e-9 (tolerance)
    bad = chain(["a", "b"], [("a", "a", "0.499999998"), ("a", "b", "0.5"), ("b", "b", 1)])
    assert codes(bad) == ["row-sum"]


def test_no_states():
    c = Chain()
    assert codes(c) == ["no-states"]
    assert "no states" in c.problems[0].message


def test_state_without_outgoing_probability():
    c = chain(["a", "b"], [("a", "b", 1)])
    (p,) = c.problems
    assert p.code == "no-outgoing" and p.state == "b"
    assert "'b' has no outgoing probability" in p.message


def test_too_many_states_says_the_limit_and_how_to_raise_it():
    c = Chain(states=tuple(State(f"s{i}") for i in range(6)),
              transitions=tuple(Transition(f"s{i}", f"s{i}", 1) for i in range(6)), state_limit=5)
    assert codes(c) == ["too-many-states"]
    msg = c.problems[0].message
    assert "6 states" in msg and "limit of 5" in msg and "--max-states" in msg


def test_all_problems_collected_at_once():
    c = chain(
        ["a", "b", "c", "c"],
        [("a", "b", "x"), ("b", "b", "0.5"), ("c", "zz", "0.1"), ("c", "c", "rest"), ("c", "c", 1)],
    )
    got = codes(c)
    assert set(got) >= {"duplicate-state", "unparseable", "row-sum", "unknown-state", "duplicate-transition"}


# --------------------------------------------------------------------------
# edits return new chains
# --------------------------------------------------------------------------
def test_edits_are_pure_and_keep_order():
    c = chain(["a", "b"], [("a", "b", "1/2"), ("a", "a", "rest"), ("b", "a", 1)])
    c2 = c.with_transition("a", "b", "1/4")
    assert c.transition("a", "b").p == "1/2" and c2.transition("a", "b").p == "1/4"
    assert [t.target for t in c2.outgoing("a")] == ["b", "a"]
    c3 = c2.with_state_renamed("a", "alpha")
    assert c3.ids == ("alpha", "b") and c3.transition("b", "alpha").p == 1
    c4 = c3.without_state("b")
    assert c4.ids == ("alpha",) and all("b" not in (t.source, t.target) for t in c4.transitions)
    with pytest.raises(ValueError, match="already exists"):
        c3.with_state_renamed("alpha", "b")
    assert c.with_transition("a", "b", None).transition("a", "b") is None


def test_from_matrix_exact_fractions_round_trip():
    F = Fraction
    P = [[F(1, 2), F(1, 4), F(1, 4)], [F(1, 2), 0, F(1, 2)], [F(1, 4), F(1, 4), F(1, 2)]]
    c = Chain.from_matrix(P, ["R", "N", "S"], exact=True)
    assert c.is_valid
    assert c.exact_probabilities[("N", "S")] == F(1, 2)
    assert c.transition("N", "N") is None


# ---------------------------------------------------------------------------
# the validator's integer fast path reads decimals exactly as Fraction does


@settings(max_examples=300)
@given(st.one_of(
    st.decimals(allow_nan=False, allow_infinity=False, places=None).map(str),
    st.floats(allow_nan=False, allow_infinity=False),
    st.integers(-10**30, 10**30),
    st.from_regex(r"\A[+-]?(\d{1,25}\.?\d{0,25}|\.\d{1,25})([eE][+-]?\d{1,3})?\Z"),
))
def test_fast_decimal_path_is_exactly_fractions(raw):
    # Python's fractions.Fraction (the reference) reads the same text to the same exact value
    from core.model import _as_decimal

    dec = _as_decimal(raw)
    want = Fraction(repr(raw)) if isinstance(raw, float) else Fraction(raw)
    if dec is None:  # only exponents beyond 400 take the general reader
        assert abs(int(str(raw).lower().split("e")[1])) > 400
        assert parse_probability(raw) == want
    else:
        m, k = dec
        assert Fraction(m, 10**k) == want


def test_fast_path_leaves_other_forms_to_the_general_reader():
    from core.model import _as_decimal

    for raw in ("1/3", "5%", "rest", "", ".", "1e", "0x10", "nan", "inf", True, None, "1e-401"):
        assert _as_decimal(raw) is None, raw


def test_row_sums_are_exact_and_skip_broken_rows():
    c = Chain(states=(State("a"), State("b"), State("c")),
              transitions=(Transition("a", "b", "0.1"), Transition("a", "a", "rest"),
                           Transition("b", "a", "1/3"), Transition("b", "b", 0.6),
                           Transition("c", "c", "-0.5")))
    assert c.row_sums == {"a": Fraction(1), "b": Fraction(1, 3) + Fraction(6, 10)}
    assert c.row_sum("b") == Fraction(14, 15) and c.row_sum("c") == 0
    assert [p.code for p in c.problems] == ["negative", "row-sum"]


def test_rows_mixing_decimals_fractions_and_percentages_sum_exactly():
    # 1/3 + 0.5 + 1/6 = 1 and 0.25 + 25% + 0.5 = 1 exactly; 0.1 + 0.2 + 0.7 = 1 exactly in
    # decimals (though not in doubles); 'rest' after a fraction is exact too
    c = Chain(states=(State("a"), State("b"), State("c"), State("d")),
              transitions=(Transition("a", "a", "1/3"), Transition("a", "b", 0.5), Transition("a", "c", "1/6"),
                           Transition("b", "a", "0.25"), Transition("b", "b", "25%"), Transition("b", "c", "0.5"),
                           Transition("c", "a", 0.1), Transition("c", "b", "0.2"), Transition("c", "c", 0.7),
                           Transition("d", "a", "2/7"), Transition("d", "d", "rest")))
    assert c.problems == ()
    assert set(c.row_sums.values()) == {Fraction(1)}
    assert c.exact_probabilities[("d", "d")] == Fraction(5, 7)
