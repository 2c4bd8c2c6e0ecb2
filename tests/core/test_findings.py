"""Findings: each kind on a purpose-built chain, none on a clean chain.

The chains are invented scenarios; reference values come from closed forms and
published examples named beside each check.
"""
from __future__ import annotations

import itertools
import json
from fractions import Fraction as F

import mpmath
import numpy as np
import pytest

from core import findings as fmod
from core.errors import OptionError
from core.evolution import mixing_time
from core.findings import (
    CODES,
    SEVERITIES,
    Finding,
    bottleneck_ratio,
    expected_exit_times,
    find_all,
    sweep_cuts,
)
from core.io import loads_chain
from core.jsonout import dumps
from core.model import Chain, Step
from core.plan import Plan
from core.stationary import gth


def codes(fs):
    return [f.code for f in fs]


def only(fs, code):
    got = [f for f in fs if f.code == code]
    assert len(got) == 1, codes(fs)
    return got[0]


def chain_json(states, transitions, step=None):
    doc = {
        "format": "longrun-chain",
        "version": 1,
        "states": [{"id": s} for s in states],
        "transitions": [{"from": a, "to": b, "p": p} for a, b, p in transitions],
    }
    if step:
        doc["step"] = {"value": step[0], "unit": step[1]}
    return doc


# --------------------------------------------------------------------------
# clean chains: nothing to report
# --------------------------------------------------------------------------
def land_of_oz():
    # Grinstead & Snell, Introduction to Probability, Example 11.1 (seen): ergodic, aperiodic,
    # t_mix(1/4) = 1 (shared reference list E1, computed).
    return Chain.from_matrix(
        [[F(1, 2), F(1, 4), F(1, 4)], [F(1, 2), 0, F(1, 2)], [F(1, 4), F(1, 4), F(1, 2)]],
        ids=["rain", "nice", "snow"],
        step=Step(1, "day"),
        exact=True,
    )


def dense_clean(n=12, seed=3):
    rng = np.random.default_rng(seed)
    P = 0.2 + rng.random((n, n))
    P /= P.sum(axis=1, keepdims=True)
    return Chain.from_matrix(P, ids=[f"c{i}" for i in range(n)])


@pytest.mark.parametrize("make", [land_of_oz, dense_clean])
def test_clean_chain_has_no_findings(make):
    chain = make()
    assert find_all(chain) == ()
    assert find_all(chain, start=0) == ()
    with_plan = find_all(chain, plan=Plan(0, 10**4, estimator="average", burn_in=100))
    assert [f for f in with_plan if f.severity != "note"] == []
    assert with_plan == ()


# --------------------------------------------------------------------------
# 1. invalid model
# --------------------------------------------------------------------------
def test_invalid_model_findings_never_raise():
    doc = chain_json(
        ["pump", "spare"],
        [("pump", "pump", "0.7"), ("pump", "spare", "0.2"), ("spare", "ghost", "1"), ("spare", "spare", "x")],
    )
    chain = loads_chain(json.dumps(doc))
    fs = find_all(chain, plan=Plan(0, 10), start="pump")
    assert fs and all(f.code == "invalid-model" and f.severity == "error" for f in fs)
    assert len(fs) == len(chain.problems)
    by_problem = {f.data["problem"]: f for f in fs}
    assert "row-sum" in by_problem and "unknown-state" in by_problem
    assert by_problem["row-sum"].states == (0,) and by_problem["row-sum"].state_ids == ("pump",)
    ghost = by_problem["unknown-state"]
    assert ghost.transition_ids == (("spare", "ghost"),) and ghost.transitions == ()
    doc = ghost.to_json()
    assert doc["transitions"] == [["spare", "ghost"]] and doc["severity"] == "error"
    assert "ghost" in ghost.explanation


# --------------------------------------------------------------------------
# 2. several closed classes (gambler's ruin) and 8b. absorbing states
# --------------------------------------------------------------------------
def gamblers_ruin(N=10, p=F(2, 5)):
    P = [[F(0)] * (N + 1) for _ in range(N + 1)]
    P[0][0] = P[N][N] = F(1)
    for i in range(1, N):
        P[i][i + 1], P[i][i - 1] = p, 1 - p
    return Chain.from_matrix(P, ids=[f"k{i}" for i in range(N + 1)], exact=True)


def test_several_closed_classes_with_absorption_probabilities():
    # Biased gambler's ruin, i = 3, N = 10, p = 2/5: P(hit 10) = 2432/58025 (shared
    # reference list E9: standard closed form (1-r^i)/(1-r^N), from memory, verified exactly).
    chain = gamblers_ruin()
    fs = find_all(chain, start="k3")
    f = only(fs, "several-closed-classes")
    assert f.severity == "warning"
    classes = {tuple(c["states"]): c["probability"] for c in f.data["classes"]}
    assert classes[("k10",)] == pytest.approx(2432 / 58025, rel=1e-13)
    assert classes[("k0",)] == pytest.approx(1 - 2432 / 58025, rel=1e-13)
    assert "0.04191" in f.explanation
    without_start = only(find_all(chain), "several-closed-classes")
    assert all(c["probability"] is None for c in without_start.data["classes"])


def test_absorbing_states_with_expected_steps():
    # Drunkard's walk, Grinstead & Snell Example 11.13-11.15 (seen): from the middle the
    # expected steps to absorption are 4 (t = N 1 = (3, 4, 3)).
    P = [[1, 0, 0, 0, 0], [F(1, 2), 0, F(1, 2), 0, 0], [0, F(1, 2), 0, F(1, 2), 0], [0, 0, F(1, 2), 0, F(1, 2)], [0, 0, 0, 0, 1]]
    chain = Chain.from_matrix(P, ids=["home", "a", "b", "c", "bar"], exact=True)
    fs = find_all(chain, start="b")
    f = only(fs, "absorbing-states")
    assert f.severity == "note"
    assert set(f.state_ids) == {"home", "bar"} and f.transitions == ((0, 0), (4, 4))
    assert f.data["absorbed"] == pytest.approx(1.0, abs=1e-15)
    assert f.data["expected_steps"] == pytest.approx(4.0, rel=1e-14)
    assert "several-closed-classes" in codes(fs)
    assert fs.index(only(fs, "several-closed-classes")) < fs.index(f)  # warnings first


# --------------------------------------------------------------------------
# 3. transient start with a long stay
# --------------------------------------------------------------------------
def commissioning():
    # Invented: a new line in commissioning, released to production w.p. 1e-4 a shift.
    return Chain.from_matrix(
        [[F(1) - F(1, 10**4), F(1, 10**4), 0], [0, F(9, 10), F(1, 10)], [0, F(1, 2), F(1, 2)]],
        ids=["commissioning", "running", "stopped"],
        step=Step(8, "hour"),
        exact=True,
    )


def test_transient_start_long_stay_against_the_plan():
    chain = commissioning()
    fs = find_all(chain, plan=Plan("commissioning", 10**4))
    f = only(fs, "transient-start")
    # geometric stay: expected 1/p = 1e4 steps (G&S §11.2, N = (I - Q)^-1; common practice)
    assert f.data["expected_stay"] == pytest.approx(1e4, rel=1e-12)
    assert f.severity == "warning"
    assert f.state_ids == ("commissioning",) and f.transition_ids == (("commissioning", "running"),)
    assert "plan-misleading" in codes(fs)
    long = only(find_all(chain, plan=Plan("commissioning", 10**8)), "transient-start")
    assert long.severity == "note"
    assert "transient-start" not in codes(find_all(chain, start="running"))


# --------------------------------------------------------------------------
# 4. bottleneck
# --------------------------------------------------------------------------
def two_depots(delta=1e-6):
    """Invented: two depots of three bays each; a truck crosses between them w.p. delta.

    The matrix is symmetric, hence doubly stochastic, so pi is uniform (1/6 each).
    """
    P = np.full((6, 6), 0.0)
    for block in ((0, 1, 2), (3, 4, 5)):
        for i in block:
            for j in block:
                P[i, j] = 0.3 if i != j else 0.4
    P[2, 3] = P[3, 2] = delta
    P[2, 2] -= delta
    P[3, 3] -= delta
    return Chain.from_matrix(P, ids=["n1", "n2", "n3", "s1", "s2", "s3"], step=Step(1, "hour"))


def test_bottleneck_ratio_and_escape_time():
    delta = 1e-6
    chain = two_depots(delta)
    fs = find_all(chain)
    f = only(fs, "bottleneck")
    assert f.severity == "warning"
    assert set(f.states) in ({0, 1, 2}, {3, 4, 5})
    # Phi(S) = Q(S, S^c)/pi(S) = (delta/6)/(1/2) = delta/3 (LPW 2nd ed. §7.2 definition)
    assert f.data["phi"] == pytest.approx(delta / 3, rel=1e-9)
    assert set(f.transitions) == {(2, 3), (3, 2)}
    # exact escape time from the stationary law restricted to S, against a 40-digit solve
    mpmath.mp.dps = 40
    P = chain.matrix()
    S = list(f.states)
    Q = mpmath.matrix([[mpmath.mpf(P[i, j]) for j in S] for i in S])
    x = mpmath.lu_solve(mpmath.eye(3) - Q, mpmath.matrix([1, 1, 1]))
    want = float(sum(x) / 3)
    assert f.data["escape_steps"] == pytest.approx(want, rel=1e-9)
    assert 1e6 < want < 1e7
    # with a plan: a run of 1e5 steps crosses about T Q = 1e5 * delta/6 ~ 0.017 times
    fp = only(find_all(chain, plan=Plan("n1", 10**5, estimator="average")), "bottleneck")
    assert fp.data["crossings"] == pytest.approx(10**5 * delta / 6, rel=1e-9)
    assert fp.severity == "warning"
    long = only(find_all(chain, plan=Plan("n1", 10**12, estimator="average")), "bottleneck")
    assert long.severity == "note"


def _brute_force_phi(P, pi, C):
    best = np.inf
    C = list(C)
    for r in range(1, len(C)):
        for S in itertools.combinations(C, r):
            if pi[list(S)].sum() <= 0.5 + 1e-12:
                best = min(best, bottleneck_ratio(P, pi, S, C))
    return best


@pytest.mark.parametrize("seed", range(6))
def test_sweep_respects_cheeger_and_brute_force(seed):
    # Levin & Peres 2nd ed., Theorem 13.10 (Cheeger, from memory): for a reversible chain
    # with spectral gap gamma, gamma/2 <= Phi_* <= sqrt(2 gamma), and the proof's sweep over
    # the second eigenvector attains the upper bound.  Checked on the additive
    # reversibilisation R = (P + P*)/2 (same flows across every cut), against the exact
    # minimum over all subsets.
    rng = np.random.default_rng(seed)
    n = 7
    P = rng.random((n, n)) * (rng.random((n, n)) < 0.5) + 0.01
    P[:3, 3:] *= 1e-3
    P[3:, :3] *= 1e-3
    P /= P.sum(axis=1, keepdims=True)
    pi = gth(P)
    cuts = sweep_cuts(P, pi, range(n))
    phi_sweep = cuts[0][1]
    phi_star = _brute_force_phi(P, pi, range(n))
    D = np.diag(pi)
    R = 0.5 * (P + np.linalg.inv(D) @ P.T @ D)
    gamma = 1 - np.sort(np.linalg.eigvals(R).real)[-2]
    assert phi_star >= gamma / 2 - 1e-12
    assert phi_star - 1e-15 <= phi_sweep <= np.sqrt(2 * gamma) + 1e-12
    # the planted cut is found exactly here
    assert phi_sweep == pytest.approx(phi_star, rel=1e-12)


def test_sweep_incremental_path_matches_direct(monkeypatch):
    chain = two_depots(1e-7)
    P = chain.matrix()
    pi = gth(P)
    direct = sweep_cuts(P, pi, range(6))
    monkeypatch.setattr(fmod, "_DIRECT_SWEEP", 2)
    incremental = sweep_cuts(P, pi, range(6))
    assert [c[0] for c in direct] == [c[0] for c in incremental]
    assert direct[0][1] == incremental[0][1]  # the chosen cut is re-summed directly


def test_bottleneck_ratio_keeps_relative_accuracy():
    # a cut crossed with probability 1e-15: Phi must be 1e-15 to many digits, not 0 or noise
    chain = two_depots(1e-15)
    P = chain.matrix()
    phi = bottleneck_ratio(P, np.full(6, 1 / 6), [0, 1, 2])
    assert phi == pytest.approx(1e-15 / 3, rel=1e-12)


# --------------------------------------------------------------------------
# 5. periodicity
# --------------------------------------------------------------------------
def shuttle():
    P = np.zeros((6, 6))
    P[0, 1], P[0, 2] = 0.5, 0.5
    P[1, 3], P[1, 4] = 0.2, 0.8
    P[2, 4], P[2, 5] = 0.5, 0.5
    P[3:, 0] = 1.0
    return Chain.from_matrix(P, ids=["depot", "north", "south", "market", "station", "harbour"])


def test_periodic_finding_with_subclasses_and_remedies():
    fs = find_all(shuttle())
    f = only(fs, "periodic")
    assert f.severity == "warning"
    assert f.data["period"] == 3
    assert f.data["subclasses"] == [["depot"], ["north", "south"], ["market", "station", "harbour"]]
    for word in ("time average", "lazy chain (I+P)/2", "random", "double", "every 3rd step"):
        assert word in f.explanation + f.remedy
    # a time-average plan with a stride coprime to 3 is not affected: a note
    ok = only(find_all(shuttle(), plan=Plan(0, 300, estimator="average", stride=2)), "periodic")
    assert ok.severity == "note"
    bad = find_all(shuttle(), plan=Plan(0, 300))
    assert only(bad, "periodic").severity == "warning"
    assert "plan-misleading" in codes(bad)


# --------------------------------------------------------------------------
# 6. tiny probabilities and near-one decimals
# --------------------------------------------------------------------------
def test_tiny_probability():
    doc = chain_json(
        ["ok", "meltdown"],
        [("ok", "meltdown", "2.5e-12"), ("ok", "ok", "rest"), ("meltdown", "ok", "0.5"), ("meltdown", "meltdown", "rest")],
        step=(1, "day"),
    )
    fs = find_all(loads_chain(json.dumps(doc)))
    f = only(fs, "tiny-probability")
    assert f.severity == "warning"
    assert f.transition_ids == (("ok", "meltdown"),)
    assert f.data["waiting_steps"] == pytest.approx(4e11, rel=1e-12)
    assert "billion years" in f.explanation  # 4e11 days
    # the threshold is strict: exactly 1e-9 is not flagged
    doc["transitions"][0]["p"] = "1e-9"
    assert "tiny-probability" not in codes(find_all(loads_chain(json.dumps(doc))))


@pytest.mark.parametrize(
    "stay,leave,flagged",
    [
        ("0.9999999999999999999", "1e-19", True),  # 19 nines as text: a double cannot hold it
        ("0.999999999999999", "1e-15", True),  # 15 nines: the rule of thumb
        ("0.99999999999999", "1e-14", False),  # 14 nines: the double is off by 0.08% in the rest
        ("rest", "1e-19", False),  # the recommended way
        ("0.999", "0.001", False),
        ("99.99999999999999999%", "1e-19", True),  # percentages too (relative loss)
    ],
)
def test_near_one_decimal_typed_as_text(stay, leave, flagged):
    doc = chain_json(
        ["up", "down"],
        [("up", "up", stay), ("up", "down", leave), ("down", "up", "1")],
    )
    chain = loads_chain(json.dumps(doc))
    assert chain.is_valid
    fs = find_all(chain)
    assert ("near-one-decimal" in codes(fs)) is flagged
    if flagged:  # typed as text, Longrun keeps the remainder exactly: a note about exports
        f = only(fs, "near-one-decimal")
        assert f.severity == "note" and f.transition_ids == (("up", "up"),)
        assert "exports" in f.explanation


def test_near_one_decimal_as_json_number_with_fifteen_nines():
    # A JSON number with 15 nines (the typed text may have been longer): a warning.
    doc = chain_json(["up", "down"], [("up", "up", 0.999999999999999), ("up", "down", 1e-15), ("down", "up", 1)])
    f = only(find_all(loads_chain(json.dumps(doc))), "near-one-decimal")
    assert f.severity == "warning" and "JSON number" in f.explanation


def test_near_one_decimal_as_json_number_lost_its_remainder():
    # A JSON number with 17 nines is read as the double 1.0: the remainder is gone.
    text = (
        '{"format": "longrun-chain", "version": 1, "states": [{"id": "up"}, {"id": "down"}],'
        ' "transitions": [{"from": "up", "to": "up", "p": 0.99999999999999999},'
        ' {"from": "up", "to": "down", "p": 1e-17}, {"from": "down", "to": "up", "p": 1}]}'
    )
    chain = loads_chain(text)
    assert chain.is_valid  # the row sums to 1 + 1e-17, within tolerance
    f = only(find_all(chain), "near-one-decimal")
    assert f.severity == "warning"
    assert f.transition_ids == (("up", "up"),)
    assert "'rest'" in f.remedy and "exactly 1" in f.explanation
    # a plain absorbing self-loop of 1.0 is not flagged
    text2 = text.replace("0.99999999999999999", "1.0").replace("1e-17", "0")
    assert "near-one-decimal" not in codes(find_all(loads_chain(text2)))


# --------------------------------------------------------------------------
# 7. slow mixing and burn-in
# --------------------------------------------------------------------------
def test_slow_mixing_against_plan_and_recommended_burn_in():
    chain = two_depots(1e-4)
    P = chain.matrix()
    t4 = mixing_time(P, 0.25)
    t01 = mixing_time(P, 0.01)
    assert t4 > 1000
    f = only(find_all(chain), "slow-mixing")
    assert f.severity == "note" and f.data["t_mix"] == t4
    fe = only(find_all(chain, epsilon=0.01, plan=Plan(0, 5 * t4, estimator="average")), "slow-mixing")
    assert fe.severity == "warning"
    assert fe.data["t_mix_epsilon"] == t01
    assert f"{t01:,}" in fe.remedy
    burn = only(find_all(chain, epsilon=0.01, plan=Plan(0, 5 * t4, estimator="average")), "short-burn-in")
    assert burn.data["recommended"] == t01
    fine = find_all(chain, epsilon=0.01, plan=Plan(0, 100 * t4, burn_in=t01, estimator="average"))
    assert "slow-mixing" not in codes(fine) and "short-burn-in" not in codes(fine)


def test_epsilon_out_of_range():
    with pytest.raises(OptionError, match="epsilon"):
        find_all(land_of_oz(), epsilon=1.5)


# --------------------------------------------------------------------------
# 8. unreachable states
# --------------------------------------------------------------------------
def test_unreachable_states():
    chain = gamblers_ruin(4, F(1, 2))
    f = only(find_all(chain, start="k0"), "unreachable-states")
    assert f.severity == "warning"  # includes the closed class {k4}
    assert set(f.state_ids) == {"k1", "k2", "k3", "k4"}
    # only transient states unreachable: a note
    P = [[F(1, 2), F(1, 2), 0], [0, F(1, 2), F(1, 2)], [0, F(1, 2), F(1, 2)]]
    g = only(find_all(Chain.from_matrix(P, ids=["boot", "on", "off"], exact=True), start="on"), "unreachable-states")
    assert g.severity == "note" and g.state_ids == ("boot",)


# --------------------------------------------------------------------------
# plan finding, ordering, JSON
# --------------------------------------------------------------------------
def test_plan_misleading_finding_carries_the_exact_verdict():
    chain = commissioning()
    f = only(find_all(chain, plan=Plan("commissioning", 1000)), "plan-misleading")
    assert f.severity == "warning"
    assert f.explanation.startswith("Misleading")
    assert f.data["min_steps"] is not None and f.data["min_steps"] > 1000


def test_start_overrides_the_plan_start():
    chain = commissioning()
    fs = find_all(chain, plan=Plan("commissioning", 1000), start="running")
    assert "plan-misleading" not in codes(fs) and "transient-start" not in codes(fs)


def test_sorted_by_severity_and_json_shape():
    chain = gamblers_ruin()
    fs = find_all(chain, start="k3", plan=Plan("k3", 10))
    sev = [SEVERITIES.index(f.severity) for f in fs]
    assert sev == sorted(sev)
    doc = json.loads(dumps(list(fs)))
    for item in doc:
        assert set(item) >= {"code", "severity", "title", "explanation", "remedy", "states", "transitions"}
        assert all(isinstance(s, str) for s in item["states"])
        assert all(len(t) == 2 for t in item["transitions"])
    f = fs[0]
    assert f.to_json(chain.ids)["states"] == [chain.ids[i] for i in f.states]
    assert all(f.code in CODES for f in fs)


def test_finding_rejects_unknown_code_or_severity():
    with pytest.raises(ValueError, match="severity"):
        Finding("periodic", "fatal", "t", "e", "r")
    with pytest.raises(ValueError, match="code"):
        Finding("made-up", "note", "t", "e", "r")
    hash(Finding("periodic", "note", "t", "e", "r", data={"x": 1}))  # hashable despite data


# --------------------------------------------------------------------------
# exit times
# --------------------------------------------------------------------------
def test_exit_times_relative_accuracy_and_infinity():
    # a set left with probability 1e-13 per step: expected exit 1e13 (geometric; common practice)
    P = np.array([[1 - 1e-13, 1e-13, 0.0], [0.0, 0.5, 0.5], [0.0, 0.0, 1.0]])
    assert expected_exit_times(P, [0])[0] == pytest.approx(1e13, rel=1e-12)
    # {1, 2} contains the absorbing state 2: never left from either
    assert np.all(np.isinf(expected_exit_times(P, [1, 2])))
    # G&S Example 11.13-11.15 (seen): drunkard's walk, t = (3, 4, 3) for the inner states
    W = np.array([[1, 0, 0, 0, 0], [0.5, 0, 0.5, 0, 0], [0, 0.5, 0, 0.5, 0], [0, 0, 0.5, 0, 0.5], [0, 0, 0, 0, 1.0]])
    assert np.allclose(expected_exit_times(W, [1, 2, 3]), [3, 4, 3], rtol=1e-14)


def test_three_weakly_joined_groups_are_each_reported():
    # Invented: three depots of three bays each, joined by 1e-6 crossings.  Two eigenvalues
    # of the reversibilisation lie near 1; their sweeps and the atoms of the cuts they give
    # name every group.
    rng = np.random.default_rng(1)
    P = rng.random((9, 9)) + 0.1
    for a in range(3):
        for b in range(3):
            if a != b:
                P[3 * a : 3 * a + 3, 3 * b : 3 * b + 3] *= 1e-6
    P /= P.sum(axis=1, keepdims=True)
    chain = Chain.from_matrix(P)
    found = {f.states for f in find_all(chain) if f.code == "bottleneck"}
    assert found == {(0, 1, 2), (3, 4, 5), (6, 7, 8)}
    pi = gth(P)
    for S in found:
        f = next(f for f in find_all(chain) if f.code == "bottleneck" and f.states == S)
        assert f.data["phi"] == pytest.approx(bottleneck_ratio(P, pi, S), rel=1e-12)
        assert f.data["phi"] < 1e-5
    assert json.loads(dumps(list(find_all(chain))))  # NaN eigenvalues of atoms become null
