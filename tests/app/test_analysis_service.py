"""The analysis service: debounced, threaded, stale results dropped, jobs for later panels."""
import threading

import numpy as np
import pytest

from app.analysis_service import AnalysisService, live_threads, validate
from app.document import Document
from core.model import Chain, State, Transition
from core.structure import classify


def chain_of(rows):
    ids = [f"s{i}" for i in range(len(rows))]
    return Chain.from_matrix(rows, ids)


@pytest.fixture
def service(qtbot):
    doc = Document()
    svc = AnalysisService(doc, delay_ms=40)
    yield doc, svc
    svc.shutdown()


def test_validation_report_and_structure_for_the_current_chain(service, qtbot):
    doc, svc = service
    # Two closed classes {s1} and {s2, s3} (period 2), s0 transient: by definition
    # (Levin, Peres & Wilmer, Markov Chains and Mixing Times, 2nd ed., section 1.7).
    P = [[0.5, 0.25, 0.25, 0.0], [0, 1, 0, 0], [0, 0, 0, 1], [0, 0, 1, 0]]
    with qtbot.waitSignal(svc.structureReady, timeout=5000) as sig:
        doc.reset(chain_of(P))
    report = sig.args[0]
    assert report.chain is doc.chain
    s = report.structure
    assert [c.states for c in s.classes] == [(0,), (1,), (2, 3)]
    assert [s.classes[i].states for i in s.closed] == [(1,), (2, 3)]
    assert s.classes[2].period == 2
    np.testing.assert_array_equal(report.matrix, np.array(P, dtype=float))
    qtbot.waitUntil(lambda: svc.is_idle)
    assert svc.report.valid and svc.report.row_sums == {f"s{i}": 1 for i in range(4)}


def test_invalid_chain_reports_problems_and_no_structure(service, qtbot):
    doc, svc = service
    chain = Chain(states=(State("a"), State("b")),
                  transitions=(Transition("a", "b", "0.6"), Transition("b", "b", "oops")))
    with qtbot.waitSignal(svc.structureReady, timeout=5000) as sig:
        doc.reset(chain)
    assert sig.args[0].structure is None
    rep = svc.report
    assert not rep.valid
    assert {p.code for p in rep.problems} == {"row-sum", "unparseable"}
    assert "a" in rep.by_state and ("b", "b") in rep.by_transition
    assert "b" not in rep.row_sums  # a broken row has no sum
    assert float(rep.row_sums["a"]) == pytest.approx(0.6)


def test_burst_of_edits_gives_one_result_for_the_last_chain(service, qtbot):
    doc, svc = service
    doc.reset(chain_of([[1.0]]))
    qtbot.waitUntil(lambda: svc.is_idle)
    seen = []
    svc.validated.connect(lambda r: seen.append(r.chain))
    doc.reset(chain_of([[0.5, 0.5], [0.5, 0.5]]))
    for k in range(20):
        doc.set_transition("s0", "s1", f"{0.01 * (k + 1):.2f}")
        doc.set_transition("s0", "s0", "rest")
    with qtbot.waitSignal(svc.finished, timeout=5000):
        pass
    assert seen == [doc.chain]  # debounced: nothing for the intermediate chains


def test_moves_do_not_reanalyse(service, qtbot):
    doc, svc = service
    doc.reset(chain_of([[0.5, 0.5], [0.5, 0.5]]))
    qtbot.waitUntil(lambda: svc.is_idle)
    gen = svc.generation
    doc.move_states({"s0": (10.0, 20.0)})
    doc.set_label("s1", "second")
    assert svc.generation == gen and svc.is_idle


def test_registered_job_runs_off_the_gui_thread_and_stale_runs_are_dropped(service, qtbot):
    doc, svc = service
    gui = threading.get_ident()
    release = threading.Event()
    seen = []

    def job(chain, P, structure):
        seen.append((threading.get_ident(), chain))
        if chain.n == 2:          # hold the first run until a newer chain is waiting
            release.wait(5)
            yield "halfway"       # a stale run stops at its next yield
            raise AssertionError("a stale generator job went on after a newer request")
        return float(P.sum())

    results = []
    svc.resultReady.connect(lambda name, r: results.append((name, r.chain, r.value)))
    svc.register("total", job)
    doc.reset(chain_of([[0.5, 0.5], [0.5, 0.5]]))
    qtbot.waitUntil(lambda: any(c.n == 2 for _, c in seen), timeout=5000)
    doc.reset(chain_of([[1, 0, 0], [0, 1, 0], [0, 0, 1]]))
    release.set()
    qtbot.waitUntil(lambda: svc.is_idle and bool(results), timeout=5000)
    assert results == [("total", doc.chain, 3.0)]
    assert all(tid != gui for tid, _ in seen)
    assert svc.results["total"].value == 3.0


def test_failing_job_is_reported_and_the_service_goes_on(service, qtbot):
    doc, svc = service

    def broken(chain, P, structure):
        raise ZeroDivisionError("boom")

    failures = []
    svc.jobFailed.connect(lambda name, msg: failures.append((name, msg)))
    svc.register("broken", broken)
    doc.reset(chain_of([[1.0]]))
    qtbot.waitUntil(lambda: svc.is_idle and bool(failures), timeout=5000)
    assert failures[-1][0] == "broken" and "boom" in failures[-1][1]
    with qtbot.waitSignal(svc.validated, timeout=5000):
        doc.reset(chain_of([[0.5, 0.5], [0.5, 0.5]]))


def test_shutdown_stops_the_thread(qtbot):
    doc = Document()
    svc = AnalysisService(doc, delay_ms=0)
    assert live_threads()
    svc.shutdown()
    assert live_threads() == []
    doc.reset(chain_of([[1.0]]))  # no longer listening, and nothing breaks


def test_validate_matches_core_problems():
    chain = Chain(states=(State("a"), State("b")),
                  transitions=(Transition("a", "b", "1/3"), Transition("a", "a", "rest"), Transition("b", "a", 1)))
    rep = validate(chain)
    assert rep.valid and rep.problems == chain.problems
    assert rep.values[("a", "a")] == pytest.approx(2 / 3)
    assert rep.row_sums["a"] == 1


def test_structure_agrees_with_classify(service, qtbot):
    doc, svc = service
    P = [[0, 1, 0], [0, 0, 1], [1, 0, 0]]  # a 3-cycle: one closed class of period 3 (common practice)
    with qtbot.waitSignal(svc.structureReady, timeout=5000) as sig:
        doc.reset(chain_of(P))
    ref = classify(np.array(P, dtype=float))
    got = sig.args[0].structure
    assert got.classes == ref.classes and got.classes[0].period == 3
