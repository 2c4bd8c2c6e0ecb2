"""`longrun fit`: the chain file it writes, its report, and its refusals (exit 2, with lines).

Expected counts are hand counts of the small tables written here (common practice);
the E13 sequence and intervals come from REFERENCES.md E13 (computed from Anderson &
Goodman 1957 / Wilson 1927 formulas, values from memory as listed there).
"""
from __future__ import annotations

import json
from pathlib import Path

import pytest

from core.cli import main
from core.io import load_chain

ROOT = Path(__file__).resolve().parents[2]
DEMO = ROOT / "sample_models" / "data" / "daily_moves.csv"


def write(tmp_path, text, name="data.csv"):
    p = tmp_path / name
    p.write_text(text)
    return p


def run(argv, capsys):
    code = main([str(a) for a in argv])
    out = capsys.readouterr()
    return code, out.out, out.err


def test_demo_data_end_to_end(tmp_path, capsys):
    out = tmp_path / "moves.json"
    code, stdout, err = run(
        ["fit", DEMO, "--column", "daily_return", "--id-column", "fund", "--time-column", "date",
         "--cuts=-1%,1%", "--draws", "200", "-o", out],
        capsys,
    )
    assert code == 0, err
    chain = load_chain(out)
    assert chain.is_valid
    assert [s.display_name for s in chain.states] == ["below -1%", "-1% to 1%", "1% and above"]
    rec = chain.extra["transition_counts"]
    assert rec["states"] == ["band1", "band2", "band3"]
    src = chain.extra["fitted_from"]
    assert src["file"] == "daily_moves.csv" and src["sequences"] == 2
    assert src["id_column"] == "fund" and src["time_column"] == "date"
    assert src["binning"]["cuts"] == [-0.01, 0.01] and src["binning"]["closed"] == "left"
    # 520 days per fund, two funds: 2 x 519 transitions, none across the funds
    assert sum(map(sum, rec["matrix"])) == 2 * 519 == src["transitions"]
    assert "Wilson score intervals" in stdout
    assert "200 matrices drawn" in stdout and "seed 0" in stdout
    assert "long-run share of band2" in stdout
    assert "First- vs second-order test" in stdout
    assert f"Wrote {out}" in stdout
    # the file is a normal chain file
    assert main(["validate", str(out)]) == 0


def test_e13_sequence_json_output(tmp_path, capsys):
    data = write(tmp_path, "obs\n" + "\n".join("AABABBBAABAAABBBBABAAB") + "\n")
    out = tmp_path / "e13.json"
    code, stdout, err = run(["fit", data, "-o", out, "--json", "--draws", "50", "--seed", "3"], capsys)
    assert code == 0, err
    doc = json.loads(stdout)
    fit = doc["fit"]
    assert fit["counts"] == [[5, 6], [5, 5]]  # REFERENCES.md E13
    assert fit["intervals"]["low"][0][1] == pytest.approx(0.280091537409322, abs=1e-12)
    assert fit["intervals"]["high"][1][1] == pytest.approx(0.763406909487436, abs=1e-12)
    assert doc["valid"] is True and doc["output"] == str(out)
    unc = doc["uncertainty"]
    assert unc["draws"] == 50 and unc["seed"] == 3 and unc["method"] == "posterior"
    assert {v["quantity"] for v in unc["values"]} == {"stationary", "mixing_time"}
    assert any(f["code"] == "few-departures" for f in fit["findings"])
    typed = {(t.source, t.target): t.p for t in load_chain(out).transitions}
    assert typed[("A", "B")] == "6/11"


def test_sequences_by_id_never_cross(tmp_path, capsys):
    data = write(tmp_path, "unit,state\nu1,ok\nu2,broken\nu1,ok\nu2,broken\nu1,worn\nu2,ok\n")
    out = tmp_path / "c.json"
    code, stdout, err = run(["fit", data, "--id-column", "unit", "--draws", "0", "-o", out], capsys)
    # u1: ok ok worn ; u2: broken broken ok.  'worn' is never left -> written but not valid (exit 2)
    assert code == 2
    assert "never seen leaving" in err and "--prior" in err
    chain = load_chain(out)
    assert chain.extra["transition_counts"]["states"] == ["broken", "ok", "worn"]
    assert chain.extra["transition_counts"]["matrix"] == [[1, 1, 0], [0, 1, 1], [0, 0, 0]]
    assert [p.code for p in chain.problems] == ["no-outgoing"]
    assert "Long-run answers: not sampled" in stdout


def test_prior_fills_rows_and_is_recorded(tmp_path, capsys):
    data = write(tmp_path, "s\na\na\nb\na\nc\n")
    out = tmp_path / "p.json"
    code, stdout, err = run(["fit", data, "--prior", "0.5", "--draws", "20", "-o", out], capsys)
    assert code == 0, err
    chain = load_chain(out)
    assert chain.is_valid
    assert chain.extra["estimation"]["prior_alpha"] == 0.5
    assert "posterior mean" in chain.extra["estimation"]["method"]
    assert "pseudo-count alpha = 0.5" in stdout
    # 'c' was never left: its row is the prior alone, 1/3 each
    from fractions import Fraction

    assert chain.exact_probabilities[("c", "a")] == Fraction(1, 3)


def test_fixed_states_and_quantiles(tmp_path, capsys):
    data = write(tmp_path, "s\nlow\nlow\nhigh\n")
    out = tmp_path / "f.json"
    code, _, err = run(["fit", data, "--states", "low,mid,high", "--draws", "0", "-o", out], capsys)
    assert code == 2  # 'mid' and 'high' never left
    assert load_chain(out).ids == ("low", "mid", "high")
    nums = write(tmp_path, "x\n" + "\n".join(str(v) for v in [3, 1, 4, 1, 5, 9, 2, 6, 5, 3, 5, 8]) + "\n", "n.csv")
    out2 = tmp_path / "q.json"
    code, stdout, err = run(["fit", nums, "--quantiles", "2", "--draws", "0", "-o", out2], capsys)
    assert code == 0, err
    chain = load_chain(out2)
    # median of the 12 values is 4.5 (numpy linear quantile): labels from that cut point
    assert [s.display_name for s in chain.states] == ["below 4.5", "4.5 and above"]


@pytest.mark.parametrize(
    "text, extra, message",
    [
        ("r\n0.1\nbad\n0.3\n", ["--cuts", "0.2"], r"data\.csv: line 3: 'bad' in column 'r' is not a number"),
        ("s\nup\nside\n", ["--states", "up,down"], r"data\.csv: line 3: state 'side'"),
        ("id,s\n1,A\n2,B\n", ["--id-column", "id"], r"too short to count any transition"),
        ("t,s\n1,A\nnoon,B\n", ["--time-column", "t"], r"line 3: time 'noon'"),
        ("a,b\n1,2\n1,2,3\n", ["--column", "a"], r"line 3: the row has 3 values"),
        ("a,b\n1,2\n", [], r"2 candidate state columns"),
        ("a\n1\n2\n", ["--column", "zz"], r"--column 'zz'"),
        ("r\n1\n2\n", ["--cuts", "2,1"], r"increase strictly"),
    ],
)
def test_errors_exit_2_with_their_place(tmp_path, capsys, text, extra, message):
    import re

    data = write(tmp_path, text)
    out = tmp_path / "never.json"
    code, stdout, err = run(["fit", data, *extra, "-o", out], capsys)
    assert code == 2
    assert re.search(message, err), err
    assert err.startswith("longrun: error: ")
    assert "Traceback" not in err
    assert not out.exists()


def test_output_is_protected(tmp_path, capsys):
    data = write(tmp_path, "s\nA\nB\nA\n")
    out = tmp_path / "mine.json"
    out.write_text("{\"precious\": true}")
    code, _, err = run(["fit", data, "-o", out, "--draws", "0"], capsys)
    assert code == 2 and "--force" in err
    assert json.loads(out.read_text()) == {"precious": True}
    code, _, err = run(["fit", data, "-o", out, "--draws", "0", "--force"], capsys)
    assert code == 0, err
    code, _, err = run(["fit", data, "-o", tmp_path / "x.csv"], capsys)
    assert code == 2 and "must end in .json" in err
    code, _, err = run(["fit", tmp_path / "missing.csv", "-o", tmp_path / "m.json"], capsys)
    assert code == 2 and "no such file" in err


def test_bad_option_values_are_argparse_errors(tmp_path, capsys):
    data = write(tmp_path, "s\nA\nB\nA\n")
    for argv in (["--prior", "-1"], ["--prior", "zero"], ["--quantiles", "0"], ["--level", "1.5"]):
        with pytest.raises(SystemExit) as exc:
            main(["fit", str(data), "-o", str(tmp_path / "o.json"), *argv])
        assert exc.value.code == 2
        capsys.readouterr()
