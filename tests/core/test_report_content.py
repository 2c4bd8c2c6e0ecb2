"""The client report's content model (core.report), checked without Qt.

Numbers shown in the report are checked against closed forms of small chains
(not against the code that produced them):

* two-state chain ``[[1-a, a], [b, 1-b]]``: stationary law ``(b, a) / (a+b)``
  and ``P^t(0, 0) = b/(a+b) + a/(a+b) (1-a-b)^t`` (Levin, Peres & Wilmer,
  *Markov Chains and Mixing Times*, 2nd ed., 2017, section 1.1, the two-state
  chain; from memory), so ``TV(e_0 P^t, pi) = a/(a+b) |1-a-b|^t``;
* symmetric gambler's ruin on ``0..N``: absorbed at ``N`` from ``i`` with
  probability ``i/N`` after ``i (N - i)`` steps on average (Grinstead & Snell,
  *Introduction to Probability*, ch. 11, absorbing chains, the drunkard's walk
  example; from memory).
"""
from __future__ import annotations

import hashlib
import math
from datetime import datetime, timezone
from fractions import Fraction
from pathlib import Path

import numpy as np
import pytest

from core.errors import OptionError
from core.io import dumps_chain, load_chain
from core.model import Chain, State, Step, Transition
from core.plan import Plan
from core.report import (
    MAX_BARS,
    BarChart,
    Callout,
    ChainPicture,
    LineChart,
    Paragraph,
    Table,
    build_report,
    fmt_pct,
    fmt_prob,
)

SAMPLES = Path(__file__).resolve().parents[2] / "sample_models"
WHEN = datetime(2024, 5, 6, 7, 8, tzinfo=timezone.utc)


def two_state(a: float, b: float, **kw) -> Chain:
    return Chain.from_matrix([[1 - a, a], [b, 1 - b]], ["up", "down"], name="Two states",
                             step=Step(1, "day"), **kw)


def charts(report, kind):
    return [b for b in report.blocks(kind)]


# --------------------------------------------------------------------------
# structure of the report
# --------------------------------------------------------------------------
def test_sections_of_a_valid_chain_with_a_plan_in_reading_order():
    rep = build_report(two_state(0.1, 0.3), plan=Plan("up", 5), generated=WHEN)
    assert [s.key for s in rep.sections] == [
        "summary", "model", "validation", "classes", "long-run", "mixing", "findings", "plan", "caution"]
    assert rep.valid and rep.verdict in ("sound", "misleading")
    assert rep.subtitle == "Long-run analysis and simulation plan check"
    # the chain picture and the matrix are in the model section
    model = rep.section("model")
    assert any(isinstance(b, ChainPicture) for b in model.blocks)
    assert any(isinstance(b, Table) and b.kind == "matrix" for b in model.blocks)
    # the caution closes the report (the user's rule: model, not the world; qualified review)
    last = rep.sections[-1]
    assert last.key == "caution"
    text = " ".join(b.text for b in last.blocks if isinstance(b, (Callout, Paragraph)))
    assert "describe the model, not the world" in text
    assert "qualified person" in text and "local codes and licensed practice" in text


def test_without_a_plan_there_is_no_plan_section():
    rep = build_report(two_state(0.1, 0.3), generated=WHEN)
    assert "plan" not in [s.key for s in rep.sections]
    assert rep.verdict is None
    assert rep.subtitle == "Long-run analysis"


def test_footer_carries_date_version_and_sha256():
    from core import __version__

    chain = two_state(0.2, 0.4)
    rep = build_report(chain, generated=WHEN, source="two.json", sha256="ab" * 32)
    f = rep.footer
    assert f.generated.startswith("2024-05-06 07:08")
    assert f.version == __version__
    assert f.sha256 == "ab" * 32 and f.sha256_of == "the input file"
    assert "two.json" in f.line and "ab" * 32 in f.line
    # without a file, the hash is that of the chain's file text, and the footer says so
    rep2 = build_report(chain, generated=WHEN)
    assert rep2.footer.sha256 == hashlib.sha256(dumps_chain(chain).encode("utf-8")).hexdigest()
    assert "not taken from a saved file" in rep2.footer.sha256_of


# --------------------------------------------------------------------------
# numbers against closed forms
# --------------------------------------------------------------------------
def test_long_run_chart_is_the_two_state_closed_form():
    a, b = 0.1, 0.3
    rep = build_report(two_state(a, b), generated=WHEN)
    (chart,) = charts(rep, BarChart)
    assert chart.categories == ("up", "down")
    # LPW 2nd ed. section 1.1: pi = (b, a) / (a + b) (from memory)
    np.testing.assert_allclose(chart.series[0].values, [b / (a + b), a / (a + b)], rtol=1e-13)
    # the table beside it: probability to 4 significant digits, share in percent
    table = next(t for t in rep.section("long-run").blocks if isinstance(t, Table))
    assert table.rows[0][2] == "0.75" and table.rows[0][3] == "75%"
    assert table.rows[1][2] == "0.25" and table.rows[1][3] == "25%"
    # mean time between visits 1/pi (Kac): 1.33 and 4 steps of one day
    assert table.rows[1][4].startswith("4 steps")


def test_plan_story_matches_the_two_state_closed_form():
    a, b, T, tol = 0.1, 0.3, 3, 0.05
    lam = 1 - a - b
    rep = build_report(two_state(a, b), plan=Plan("up", T, tolerance=tol), generated=WHEN)
    (bars,) = [c for c in charts(rep, BarChart) if c.title.startswith("Planned")]
    est, truth = bars.series
    assert est.role == "estimate" and truth.role == "truth"
    # P^T(0, .) from LPW section 1.1 (from memory)
    p00 = b / (a + b) + a / (a + b) * lam ** T
    np.testing.assert_allclose(est.values, [p00, 1 - p00], rtol=1e-12)
    np.testing.assert_allclose(truth.values, [b / (a + b), a / (a + b)], rtol=1e-13)
    # the whiskers are 2 binomial standard deviations at 100 replicates (common practice)
    np.testing.assert_allclose(est.errors, 2 * np.sqrt(np.array([p00, 1 - p00]) * (1 - np.array([p00, 1 - p00])) / 100),
                               rtol=1e-10)
    # the distance curve: TV(e_0 P^t, pi) = a/(a+b) |1-a-b|^t at every plotted run length
    (curve,) = charts(rep, LineChart)
    x = np.array(curve.series[0].x)
    y = np.array(curve.series[0].y)
    assert x[0] == 1 and np.all(np.diff(x) > 0)
    # (the distance is a difference of probabilities of order 1: absolute accuracy ~ 10 ulp of 1)
    np.testing.assert_allclose(y, a / (a + b) * lam ** x, rtol=1e-9, atol=10 * np.finfo(float).eps)
    marks = {m.role: m for m in curve.markers}
    assert marks["tolerance"].axis == "y" and marks["tolerance"].value == tol
    assert marks["plan"].value == T
    assert marks["plan"].point == pytest.approx(a / (a + b) * lam ** T, rel=1e-12)
    # shortest sound run: the smallest t with a/(a+b) lam^t <= tol
    t_star = math.ceil(math.log(tol / (a / (a + b))) / math.log(lam))
    assert marks["sound"].value == t_star
    assert t_star in x
    assert rep.verdict == ("sound" if a / (a + b) * lam ** T <= tol else "misleading") == "misleading"
    plan_text = " ".join(b.text for b in rep.section("plan").blocks if isinstance(b, Paragraph))
    assert f"at least {t_star} steps" in plan_text
    assert "(~" in plan_text and "days" in plan_text   # durations in the file's step unit


def test_absorption_table_of_the_gamblers_ruin():
    # 0..4 with absorbing ends; from i: absorbed at 4 with prob i/4, after i(4-i) steps (G&S ch. 11)
    N = 4
    P = [[Fraction(0)] * (N + 1) for _ in range(N + 1)]
    P[0][0] = P[N][N] = Fraction(1)
    for i in range(1, N):
        P[i][i - 1] = P[i][i + 1] = Fraction(1, 2)
    chain = Chain.from_matrix(P, [f"w{i}" for i in range(N + 1)], exact=True)
    rep = build_report(chain, generated=WHEN)
    table = next(b for b in rep.section("classes").blocks if isinstance(b, Table) and b.columns[0] == "from")
    assert table.columns[1:3] == ("ends in C1", "ends in C2")
    rows = {r[0]: r for r in table.rows}
    for i in range(1, N):
        assert rows[f"w{i}"][1] == fmt_prob(1 - i / N)   # ends at w0
        assert rows[f"w{i}"][2] == fmt_prob(i / N)       # ends at w4
        assert rows[f"w{i}"][3].startswith(f"{i * (N - i)} steps")


# --------------------------------------------------------------------------
# invalid, periodic and large chains
# --------------------------------------------------------------------------
def test_an_invalid_chain_gets_a_report_listing_its_problems():
    chain = Chain(
        states=(State("a"), State("b"), State("c")),
        transitions=(Transition("a", "b", "0.7"), Transition("b", "a", "1.2"), Transition("c", "zz", "1")),
        name="Broken",
    )
    assert len(chain.problems) >= 3
    rep = build_report(chain, plan=Plan("a", 10), generated=WHEN)
    assert not rep.valid and rep.verdict is None
    keys = [s.key for s in rep.sections]
    assert keys == ["summary", "model", "validation", "analysis", "caution"]
    table = next(b for b in rep.section("validation").blocks if isinstance(b, Table))
    assert [r[2] for r in table.rows] == [p.message for p in chain.problems]
    summary = rep.section("summary")
    assert any(isinstance(b, Callout) and "not checked" in b.title for b in summary.blocks)
    # the transitions are shown as written, including the one to a state that does not exist
    listing = next(b for b in rep.section("model").blocks if isinstance(b, Table))
    assert listing.kind == "listing"
    cells = " ".join(" ".join(r) for r in listing.rows)
    assert "b 0.7" in cells and "a 1.2" in cells and "zz 1" in cells


def test_periodic_chain_has_no_mixing_time_and_no_sound_final_step_run():
    chain = Chain.from_matrix([[0, 1, 0], [0, 0, 1], [1, 0, 0]], ["x", "y", "z"])
    rep = build_report(chain, plan=Plan("x", 90), generated=WHEN)
    classes = next(b for b in rep.section("classes").blocks if isinstance(b, Table))
    assert classes.rows[0][:3] == ("C1", "closed", "3")
    mixing = " ".join(b.text for b in rep.section("mixing").blocks if isinstance(b, Paragraph))
    assert "not defined" in mixing and "period 3" in mixing
    # at a fixed time all replicates sit in one state: e_x P^90 = e_x, TV to (1/3,1/3,1/3) = 2/3
    (curve,) = charts(rep, LineChart)
    assert {m.role for m in curve.markers} == {"tolerance", "plan"}
    assert next(m for m in curve.markers if m.role == "plan").point == pytest.approx(2 / 3, rel=1e-12)
    plan_text = " ".join(b.text for b in rep.section("plan").blocks if isinstance(b, Paragraph))
    assert "No run length makes this plan sound" in plan_text
    assert rep.verdict == "misleading"


def test_a_large_chain_is_summarised_not_printed():
    n = 70
    rng = np.random.default_rng(1234)
    P = rng.random((n, n)) * (rng.random((n, n)) < 0.08)
    P[np.arange(n), (np.arange(n) + 1) % n] += 0.5
    P /= P.sum(axis=1, keepdims=True)
    chain = Chain.from_matrix(P, [f"s{i:02d}" for i in range(n)])
    rep = build_report(chain, plan=Plan("s00", 50), generated=WHEN)
    model = rep.section("model")
    assert not any(isinstance(b, (ChainPicture, Table)) for b in model.blocks)
    text = " ".join(b.text for b in model.blocks if isinstance(b, Paragraph))
    assert "limit is 60 states" in text and "--max-table-states" in text and "longrun export" in text
    for chart in charts(rep, BarChart):
        assert len(chart.categories) == MAX_BARS
        assert chart.note
    # the limit can be raised
    rep2 = build_report(chain, generated=WHEN, max_table_states=80)
    assert any(isinstance(b, ChainPicture) for b in rep2.section("model").blocks)
    assert any(isinstance(b, Table) and b.kind == "listing" for b in rep2.section("model").blocks)


def test_matrix_grid_cells_are_the_probabilities_to_four_digits():
    chain = Chain.from_matrix([[Fraction(1, 3), Fraction(2, 3), 0], [0, Fraction(1, 7), Fraction(6, 7)],
                               [1, 0, 0]], ["p", "q", "r"], exact=True)
    rep = build_report(chain, generated=WHEN)
    grid = next(b for b in rep.section("model").blocks if isinstance(b, Table) and b.kind == "matrix")
    assert grid.columns == ("from \\ to", "p", "q", "r")
    assert grid.rows[0] == ("p", "0.3333", "0.6667", "\u00b7")
    assert grid.rows[1] == ("q", "\u00b7", "0.1429", "0.8571")
    assert grid.emphasis[0][3] == "muted"


# --------------------------------------------------------------------------
# every sample model gets a complete report
# --------------------------------------------------------------------------
@pytest.mark.parametrize("path", sorted(SAMPLES.glob("*.json")), ids=lambda p: p.stem)
def test_every_sample_gets_a_report_with_a_plan(path):
    chain = load_chain(path)
    rep = build_report(chain, plan=Plan(chain.ids[0], 240), source=path.name, generated=WHEN)
    assert rep.valid
    assert rep.verdict in ("sound", "misleading")
    # the verdict is the plan check's, told in the summary and at the end of the plan section
    for key in ("summary", "plan"):
        assert any(isinstance(b, Callout) and b.kind == rep.verdict for b in rep.section(key).blocks)
    (curve,) = charts(rep, LineChart)
    assert all(0 <= y <= 1 for y in curve.series[0].y)
    if chain.description:
        assert chain.description.strip() in rep.plain_text()


# --------------------------------------------------------------------------
# formats and bad requests
# --------------------------------------------------------------------------
def test_probability_format():
    # four significant digits; both ends stay readable (common practice)
    assert fmt_prob(0.35300412) == "0.353"
    assert fmt_prob(0.123456) == "0.1235"
    assert fmt_prob(2.5e-11) == "2.5 \u00d7 10\u207b\u00b9\u00b9"
    assert fmt_prob(1 - 1e-12).startswith("1 \u2212 1 \u00d7 10\u207b\u00b9\u00b2")
    assert fmt_prob(-0.02236) == "\u22120.02236"
    assert fmt_pct(0.1412) == "14.1%"


def test_bad_requests_are_option_errors():
    chain = two_state(0.1, 0.3)
    with pytest.raises(OptionError, match="epsilon"):
        build_report(chain, epsilon=1.5)
    with pytest.raises(OptionError, match="no such state"):
        build_report(chain, start="sideways")
    with pytest.raises(OptionError, match="start law"):
        build_report(chain, plan=Plan([0.5, 0.5], 10))
