"""Every sample model loads, validates, analyses, and shows what it is meant to show."""
import json
from fractions import Fraction
from pathlib import Path

import numpy as np
import pytest
import scipy.linalg

from core.analysis import analyze
from core.findings import find_all
from core.io import load_chain
from core.plan import Plan, check_plan

SAMPLES = Path(__file__).resolve().parents[2] / "sample_models"
FILES = sorted(SAMPLES.glob("*.json"))  # top level only: sample_models/data/ holds demo data

#: file name -> finding codes it is built to show (warnings and notes)
MEANT = {
    "pump_wear.json": set(),
    "pump_wear_no_repair.json": {"absorbing-states"},
    "market_regimes.json": set(),
    "credit_eras.json": {"bottleneck", "slow-mixing"},
    "tanker_rotation.json": {"periodic"},
    "helpdesk_queue.json": set(),
    "asset_fate.json": {"several-closed-classes", "absorbing-states"},
}


def test_the_sample_set_is_complete():
    assert {f.name for f in FILES} == set(MEANT)
    assert len(FILES) >= 6


@pytest.mark.parametrize("path", FILES, ids=[f.name for f in FILES])
def test_sample_loads_validates_analyses(path):
    chain = load_chain(path)
    assert chain.problems == ()
    doc = json.loads(path.read_text())
    assert "illustrative" in doc["description"].lower() and "invented" in doc["description"].lower()
    assert chain.step is not None and chain.step.unit
    report = analyze(chain)
    for law in report.stationary:
        np.testing.assert_allclose(law @ chain.matrix(), law, rtol=1e-12, atol=1e-15)
    codes = {f.code for f in find_all(chain)}
    assert codes == MEANT[path.name]


def _stationary_reference(P):
    """Left null vector of I - P from scipy (a general-purpose reference library)."""
    v = scipy.linalg.null_space((np.eye(len(P)) - P).T)[:, 0]
    return v / v.sum()


def test_pump_availability():
    c = load_chain(SAMPLES / "pump_wear.json")
    pi = analyze(c).stationary[0]
    ref = _stationary_reference(c.matrix())
    np.testing.assert_allclose(pi, ref, rtol=1e-10)
    working = [c.index[s] for s in ("new", "worn", "degraded")]
    assert 0.97 < pi[working].sum() < 1.0  # availability of the invented pump


def test_pump_without_repair_expected_days_to_failure():
    c = load_chain(SAMPLES / "pump_wear_no_repair.json")
    t = analyze(c).absorption.expected_steps
    # First-step analysis in exact fractions (common practice: t = 1 + Q t).
    F = Fraction
    d = 1 / F("0.02")
    w = (1 + F(1, 40) * d) / (F(1, 40) + F("0.003"))
    n = (1 + F(1, 60) * w) / (F(1, 60) + F("0.001"))
    for sid, exact in (("new", n), ("worn", w), ("degraded", d)):
        assert t[c.index[sid]] == pytest.approx(float(exact), rel=1e-12)


def test_queue_is_reversible_with_birth_death_law():
    c = load_chain(SAMPLES / "helpdesk_queue.json")
    r = analyze(c)
    assert r.spectrum.reversible
    # LPW 2nd ed., Prop. 2.8 (birth-death chains): pi_k proportional to prod p_{i-1}/q_i.
    w = np.array([(0.3 / 0.36) ** k for k in range(9)])
    np.testing.assert_allclose(r.stationary[0], w / w.sum(), rtol=1e-12)


def test_tanker_rotation_period_three_and_fixed_step_sampling_misleads():
    c = load_chain(SAMPLES / "tanker_rotation.json")
    r = analyze(c)
    (cls,) = r.structure.classes
    assert cls.period == 3
    start = c.index["refinery"]
    final = check_plan(c, Plan(start, 300, estimator="final"))
    assert final.verdict == "misleading"
    avg = check_plan(c, Plan(start, 300, estimator="average"))
    assert avg.verdict == "sound"


def test_credit_eras_short_run_from_expansion_misleads():
    c = load_chain(SAMPLES / "credit_eras.json")
    pc = check_plan(c, Plan(c.index["boom_a"], 240, estimator="average"))
    assert pc.verdict == "misleading" and pc.min_steps > 240


def test_asset_fate_long_run_depends_on_start():
    c = load_chain(SAMPLES / "asset_fate.json")
    r = analyze(c)
    assert len(r.structure.closed) == 2
    limits = r.limit
    assert not np.allclose(limits[c.index["commissioning"]], limits[c.index["running"]])
    np.testing.assert_allclose(limits.sum(axis=1), 1.0, rtol=1e-12)
