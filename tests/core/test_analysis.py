"""The whole analysis: report contents, the JSON contract, the readable text, sample models."""
import json
from fractions import Fraction as F
from pathlib import Path

import numpy as np
import pytest

from core.analysis import CAUTION, Progress, analyze, iter_analyze
from core.errors import OptionError, ValidationError
from core.io import load_chain
from core.jsonout import dumps
from core.model import Chain, Step

OZ = [[F(1, 2), F(1, 4), F(1, 4)], [F(1, 2), F(0), F(1, 2)], [F(1, 4), F(1, 4), F(1, 2)]]
DRUNK = [[1, 0, 0, 0, 0], [F(1, 2), 0, F(1, 2), 0, 0], [0, F(1, 2), 0, F(1, 2), 0],
         [0, 0, F(1, 2), 0, F(1, 2)], [0, 0, 0, 0, 1]]
SAMPLES = sorted((Path(__file__).resolve().parents[2] / "sample_models").glob("*.json"))


def oz_chain():
    return Chain.from_matrix(OZ, ["R", "N", "S"], name="Land of Oz", exact=True)


def test_land_of_oz_report():
    # Grinstead & Snell, Introduction to Probability, Examples 11.1, 11.19-11.20 (P, w seen);
    # §11.5 mean first passage / recurrence times and Kemeny & Snell's constant 32/15 (memory;
    # reference list E1, verified); d(t) = (4/5)(1/4)^t so t_mix(1/4) = 1 (computed).
    r = analyze(oz_chain())
    assert r.structure.irreducible
    assert np.allclose(r.stationary[0], [0.4, 0.2, 0.4], rtol=4e-16, atol=0)
    assert np.allclose(r.return_times, [2.5, 5, 2.5], rtol=4e-16, atol=0)
    assert r.kemeny[0] == pytest.approx(32 / 15, rel=1e-15)
    assert np.allclose(r.passage[0], [[2.5, 4, 10 / 3], [8 / 3, 5, 8 / 3], [10 / 3, 4, 2.5]], rtol=1e-15, atol=0)
    assert r.mixing.steps == 1
    assert r.spectrum.slem == pytest.approx(0.25, rel=1e-15)
    assert r.spectrum.reversible
    assert np.allclose(r.limit, [[0.4, 0.2, 0.4]] * 3, rtol=4e-16, atol=0)


def test_json_contract_land_of_oz():
    doc = json.loads(dumps(analyze(oz_chain(), epsilon=1e-3).to_json()))
    for key in ("states", "classes", "stationary", "absorption", "expected_steps_to_absorption",
                "limit", "mixing_time", "spectral"):
        assert key in doc
    assert doc["states"] == ["R", "N", "S"]
    assert doc["classes"] == [{"states": ["R", "N", "S"], "closed": True, "period": 1,
                               "cyclic_subclasses": [["R", "N", "S"]], "absorbing": False}]
    assert doc["stationary"][0]["class"] == 0
    law = doc["stationary"][0]["law"]
    assert law == pytest.approx({"R": 0.4, "N": 0.2, "S": 0.4}, rel=4e-16)
    assert doc["absorption"] == {} and doc["expected_steps_to_absorption"] == {}
    assert doc["limit"]["N"] == pytest.approx({"R": 0.4, "N": 0.2, "S": 0.4}, rel=4e-16)
    # E1: t_mix(1e-3) = 5 (computed)
    assert doc["mixing_time"] == {"epsilon": 0.001, "steps": 5, "reason": None}
    sp = doc["spectral"]
    assert sp["slem"] == pytest.approx(0.25) and sp["gap"] == pytest.approx(0.75)
    assert sp["relaxation_time"] == pytest.approx(4 / 3)
    assert doc["kemeny"][0]["constant"] == pytest.approx(32 / 15, rel=1e-15)
    assert doc["caution"] == CAUTION


def test_json_contract_drunkards_walk():
    # Grinstead & Snell Examples 11.13-11.16 (reference list E2): B and t; classes indexed as listed.
    chain = Chain.from_matrix(DRUNK, ["home", "a", "b", "c", "bar"], exact=True)
    doc = json.loads(dumps(analyze(chain, start=2).to_json()))
    assert [c["states"] for c in doc["classes"]] == [["home"], ["a", "b", "c"], ["bar"]]
    assert [c["closed"] for c in doc["classes"]] == [True, False, True]
    assert [c["period"] for c in doc["classes"]] == [1, 2, 1]
    assert doc["absorbing_states"] == ["home", "bar"]
    assert [s["class"] for s in doc["stationary"]] == [0, 2]
    assert doc["absorption"] == {"a": {"0": 0.75, "2": 0.25}, "b": {"0": 0.5, "2": 0.5}, "c": {"0": 0.25, "2": 0.75}}
    assert doc["expected_steps_to_absorption"] == {"a": 3.0, "b": 4.0, "c": 3.0}
    assert doc["steps_variance"] == pytest.approx({"a": 8.0, "b": 8.0, "c": 8.0}, rel=1e-14)
    assert doc["limit"]["b"] == {"home": 0.5, "bar": 0.5}
    assert doc["limit"]["home"] == {"home": 1.0}
    assert doc["mixing_time"]["steps"] is None
    assert doc["mixing_time"]["reason"] == "several closed classes"
    assert doc["start"]["state"] == "b"
    assert doc["start"]["absorption"] == {"0": 0.5, "2": 0.5}
    assert doc["start"]["expected_steps_to_absorption"] == 4.0
    assert doc["return_times"] == {"home": 1.0, "bar": 1.0}


def test_json_floats_in_full_precision():
    chain = Chain.from_matrix([[F(2, 3), F(1, 3)], [F(1, 6), F(5, 6)]], ["x", "y"], exact=True)
    r = analyze(chain)
    text = dumps(r.to_json())
    assert repr(float(r.stationary[0][0])) in text  # 1/3 written with all its digits
    assert json.loads(text)["stationary"][0]["law"]["x"] == float(r.stationary[0][0])


def test_periodic_chain_report():
    # Ehrenfest urn (G&S Example 11.17; LPW §2.3): period 2, no mixing time, gap 0.
    P = [[0, 1, 0, 0, 0], [F(1, 4), 0, F(3, 4), 0, 0], [0, F(1, 2), 0, F(1, 2), 0],
         [0, 0, F(3, 4), 0, F(1, 4)], [0, 0, 0, 1, 0]]
    r = analyze(Chain.from_matrix(P, exact=True))
    doc = r.to_json()
    assert doc["classes"][0]["period"] == 2
    assert doc["classes"][0]["cyclic_subclasses"] == [["s0", "s2", "s4"], ["s1", "s3"]]
    assert doc["mixing_time"]["steps"] is None and doc["mixing_time"]["reason"] == "periodic"
    assert doc["spectral"]["gap"] == 0.0 and doc["spectral"]["relaxation_time"] is None
    # mean return times 1/pi = (16, 4, 8/3, 4, 16) (reference list E3)
    assert list(doc["return_times"].values()) == pytest.approx([16, 4, 8 / 3, 4, 16], rel=1e-15)
    text = r.to_text()
    assert "period 2" in text and "cyclic subclass 1: s1, s3" in text


def test_trap_reported_in_steps_and_years():
    # A trap left with probability 1e-12 per daily step: 1e12 steps, ~2.74 billion years
    # (1e12 days / 365.25, Julian year; common practice).
    chain = Chain.from_matrix([[F(1) - F(1, 10**12), F(1, 10**12)], [0, 1]], ["stuck", "free"],
                              step=Step(1, "day"), exact=True)
    r = analyze(chain)
    assert r.absorption.expected_steps[0] == pytest.approx(1e12, rel=1e-15)
    text = r.to_text()
    assert "1.00e12 steps (~2.74 billion years at 1 day per step)" in text


def test_readable_report_sections():
    chain = load_chain(Path(__file__).resolve().parents[2] / "sample_models" / "pump_wear.json")
    text = analyze(chain, start=chain.index["worn"]).to_text()
    for part in ("Classes", "Stationary law", "Mixing time", "Spectrum", "From start state worn",
                 "Caution:", "relaxation time"):
        assert part in text


def test_iter_analyze_progress_and_result():
    gen = iter_analyze(oz_chain())
    stages = []
    while True:
        try:
            p = next(gen)
        except StopIteration as stop:
            report = stop.value
            break
        assert isinstance(p, Progress) and 0 <= p.done <= p.total
        stages.append(p.stage)
    assert stages[0] == "classes" and stages[-1] == "done"
    assert report.kemeny == analyze(oz_chain()).kemeny


def test_bad_arguments():
    with pytest.raises(OptionError, match="epsilon"):
        analyze(oz_chain(), epsilon=0)
    with pytest.raises(OptionError, match="out of range"):
        analyze(oz_chain(), start=7)
    bad = Chain.from_matrix([[0.5, 0.6], [0.5, 0.5]])
    with pytest.raises(ValidationError):
        analyze(bad)


@pytest.mark.parametrize("path", SAMPLES, ids=[p.name for p in SAMPLES])
def test_every_sample_model_is_analysed(path):
    chain = load_chain(path)
    r = analyze(chain)
    doc = json.loads(dumps(r.to_json()))
    assert doc["states"] == list(chain.ids)
    for law in doc["stationary"]:
        assert sum(law["law"].values()) == pytest.approx(1, abs=1e-14)
    for row in doc["limit"].values():
        assert sum(row.values()) == pytest.approx(1, abs=1e-14)
    P = chain.matrix()
    for pi in r.stationary:
        assert np.max(np.abs(pi @ P - pi)) <= 1e-15
    assert "Caution:" in r.to_text()


@pytest.mark.parametrize(
    "steps, step, text",
    [
        # durations use the Julian year of 365.25 days and a month of 1/12 of it (common practice)
        (1e12, Step(1, "day"), "1.00e12 steps (~2.74 billion years at 1 day per step)"),
        (3.4, Step(1, "week"), "3.4 steps (~3.4 weeks at 1 week per step)"),
        (90, Step(15, "min"), "90 steps (~22.5 hours at 15 min per step)"),
        (1, Step(1, "day"), "1 step (~1 day at 1 day per step)"),
        (40, Step(1, "inspection"), "40 steps (40 inspections)"),
        (2.5, Step(2, "cycles"), "2.5 steps (5 cycles)"),
        (12345, None, "12,345 steps"),
        (None, None, "not defined"),
        (float("inf"), None, "never (infinitely many steps)"),
    ],
)
def test_format_steps(steps, step, text):
    from core.units import format_steps

    assert format_steps(steps, step) == text
