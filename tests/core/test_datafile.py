"""Reading observation CSVs: layouts, sorting, bands, and every refusal with its line.

Expected values here are counted by hand from the small tables written in each
test (common practice: hand-checked fixtures), not produced by the code under test.
"""
from __future__ import annotations

import numpy as np
import pytest

from core import datafile
from core.datafile import (
    band_labels,
    observations_from_table,
    parse_cuts,
    parse_table,
    read_observations,
    read_table,
)
from core.errors import ChainFileError, LimitError, OptionError
from core.estimate import count_transitions


def obs_from(text, **kw):
    return observations_from_table(parse_table(text, source="data.csv"), **kw)


def counts_of(obs):
    return count_transitions(obs.sequences, obs.n)


# --------------------------------------------------------------------------
# layouts
# --------------------------------------------------------------------------
def test_single_column_of_labels():
    obs = obs_from("state\nA\nA\nB\nA\nB\nB\n")
    assert obs.states == ("A", "B")
    assert obs.rows == 6 and obs.n_transitions == 5
    # pairs AA, AB, BA, AB, BB
    assert counts_of(obs).tolist() == [[1, 2], [1, 1]]


def test_states_sorted_naturally():
    obs = obs_from("s\nstage10\nstage2\nstage1\nstage2\n")
    assert obs.states == ("stage1", "stage2", "stage10")


def test_other_columns_need_a_choice():
    text = "day,state,note\n1,A,x\n2,B,y\n3,A,z\n"
    with pytest.raises(OptionError, match="3 candidate state columns.*--column"):
        obs_from(text)
    obs = obs_from(text, column="state")
    assert obs.column == "state"
    assert counts_of(obs).tolist() == [[0, 1], [1, 0]]
    # by 1-based number and ignoring case
    assert obs_from(text, column="2").column == "state"
    assert obs_from(text, column="STATE").column == "state"


def test_unknown_column_lists_the_columns():
    with pytest.raises(OptionError, match=r"--column 'mode'.*'day', 'state'"):
        obs_from("day,state\n1,A\n2,B\n", column="mode")


def test_id_column_never_counts_across_sequences():
    # machine m1: A A B ; machine m2: C C A ; rows interleaved.
    # Read as one sequence the file order would give B->C or A->C pairs; per id it must not.
    text = "id,state\nm1,A\nm2,C\nm1,A\nm2,C\nm1,B\nm2,A\n"
    obs = obs_from(text, id_column="id")
    assert obs.states == ("A", "B", "C")
    assert obs.n_ids == 2 and len(obs.sequences) == 2
    C = counts_of(obs)
    # m1: A->A, A->B ; m2: C->C, C->A  (hand count)
    assert C.tolist() == [[1, 1, 0], [0, 0, 0], [1, 0, 1]]
    assert obs.n_transitions == 4


def test_many_sequences_boundaries_property():
    """Total transitions = rows - number of sequences, for random interleavings (common practice)."""
    rng = np.random.default_rng(1234)
    for _ in range(20):
        k = int(rng.integers(1, 6))
        lens = rng.integers(1, 15, size=k)
        rows = []
        for sid, m in enumerate(lens):
            rows += [(int(rng.integers(0, 1000)), f"u{sid}", "XYZ"[int(rng.integers(0, 3))]) for _ in range(m)]
        order = rng.permutation(len(rows))
        text = "t,unit,s\n" + "".join(f"{rows[i][0]},{rows[i][1]},{rows[i][2]}\n" for i in order)
        if all(m == 1 for m in lens):
            with pytest.raises(ChainFileError, match="too short"):
                obs_from(text, id_column="unit", time_column="t")
            continue
        obs = obs_from(text, id_column="unit", time_column="t")
        assert obs.n_transitions == int(lens.sum()) - k
        assert counts_of(obs).sum() == int(lens.sum()) - k


def test_time_column_sorts_each_sequence_and_keeps_ties_in_file_order():
    text = (
        "when,state\n"
        "2024-03-03,C\n"
        "2024-03-01,A\n"
        "2024-03-02,B\n"
        "2024-03-02,A\n"  # tie with the B row: B stays first (file order)
    )
    obs = obs_from(text, time_column="when")
    assert obs.time_ties == 1
    assert [obs.states[i] for i in obs.sequences[0]] == ["A", "B", "A", "C"]
    assert any("file order" in s for s in obs.notes())


def test_time_column_with_date_times_and_zones():
    text = "ts,s\n2024-03-01T10:00:00+01:00,B\n2024-03-01T09:30:00Z,A\n2024-03-01T08:59:00Z,C\n"
    obs = obs_from(text, time_column="ts")
    # 10:00+01:00 is 09:00Z, so the order is C (08:59Z), B (09:00Z), A (09:30Z)
    assert [obs.states[i] for i in obs.sequences[0]] == ["C", "B", "A"]


def test_numeric_time_column():
    obs = obs_from("t,s\n3,C\n1.5,A\n2,B\n", time_column="t")
    assert [obs.states[i] for i in obs.sequences[0]] == ["A", "B", "C"]


@pytest.mark.parametrize(
    "text, line, message",
    [
        ("t,s\n1,A\nsoon,B\n", 3, "not a number"),
        ("t,s\n2024-01-01,A\n01/02/2024,B\n", 3, "neither a number nor an ISO 8601"),
        ("t,s\n2024-01-01T00:00Z,A\n2024-01-02T00:00,B\n", 3, "no time zone"),
        ("t,s\n2024-01-01,A\n,B\n", 3, "time cell .* is empty"),
    ],
)
def test_bad_times_name_the_line(text, line, message):
    with pytest.raises(ChainFileError, match=message) as err:
        obs_from(text, time_column="t")
    assert err.value.where == f"line {line}"


def test_gap_splits_a_sequence():
    obs = obs_from("day,s\n1,A\n2,B\n3,\n4,B\n5,A\n", column="s")
    # A B | B A : pairs AB, BA, and no B->B across the gap
    assert obs.gaps == 1 and len(obs.sequences) == 2
    assert counts_of(obs).tolist() == [[0, 1], [1, 0]]
    assert obs.sequence_ids == ("", " (part 2)")


def test_gap_in_a_row_with_an_id():
    obs = obs_from("id,s\nk,A\nk,\nk,A\nk,A\n", id_column="id")
    assert obs.gaps == 1
    assert counts_of(obs).tolist() == [[1]]
    assert obs.short_sequences == 1


def test_fixed_state_list_keeps_unseen_states_and_refuses_others():
    obs = obs_from("s\nup\nup\ndown\n", states=["down", "flat", "up"])
    assert obs.states == ("down", "flat", "up")
    assert counts_of(obs).tolist() == [[0, 0, 0], [0, 0, 0], [1, 0, 1]]
    with pytest.raises(ChainFileError, match=r"state 'sideways' .* not in the given state list") as err:
        obs_from("s\nup\nsideways\ndown\n", states=["down", "flat", "up"])
    assert err.value.where == "line 3"


def test_delimiters_comments_bom_and_quotes():
    text = "\ufeff# a comment line\n\nid;state\n# another\nx;\"A\"\nx;B\n\nx;A\n"
    obs = obs_from(text, column="state", id_column="id")
    assert counts_of(obs).tolist() == [[0, 1], [1, 0]]
    tab = obs_from("s\tother\nA\t1\nB\t2\n", column="s")
    assert tab.n_transitions == 1


def test_no_header_mode():
    t = parse_table("A,1\nB,2\nA,3\n", header=False)
    assert t.columns == ("1", "2")
    obs = observations_from_table(t, column="1")
    assert obs.rows == 3 and counts_of(obs).tolist() == [[0, 1], [1, 0]]


# --------------------------------------------------------------------------
# numeric series cut into bands
# --------------------------------------------------------------------------
def test_boundary_values_fall_in_the_band_above():
    """Bands are closed on the left, [a, b): a value on a cut point goes up (documented rule)."""
    text = "r\n-0.02\n-0.01\n0.0\n0.01\n0.02\n-0.0100001\n0.0099999\n"
    obs = obs_from(text, cuts="-1%,1%")
    assert obs.labels == ("below -1%", "-1% to 1%", "1% and above")
    assert obs.states == ("band1", "band2", "band3")
    bands = [obs.states[i] for i in obs.sequences[0]]
    assert bands == ["band1", "band2", "band2", "band3", "band3", "band1", "band2"]
    assert obs.binning.closed == "left"
    assert "band above" in obs.binning.describe()


def test_cut_points_in_plain_numbers_and_percent_cells():
    obs = obs_from("r\n-1.5%\n0.5%\n2%\n1%\n", cuts=[-0.01, 0.01])
    assert obs.labels == ("below -0.01", "-0.01 to 0.01", "0.01 and above")
    assert [int(i) for i in obs.sequences[0]] == [0, 1, 2, 2]


def test_quantile_bands():
    # values 1..100 in a scrambled order; quartile cuts at numpy's linear quantiles 25.75, 50.5, 75.25
    vals = np.random.default_rng(7).permutation(np.arange(1, 101))
    obs = obs_from("x\n" + "\n".join(map(str, vals)) + "\n", quantiles=4)
    assert obs.binning.method == "quantiles"
    assert obs.binning.cuts == pytest.approx((25.75, 50.5, 75.25), abs=1e-12)
    codes = obs.sequences[0]
    assert np.bincount(codes).tolist() == [25, 25, 25, 25]
    # 26 is the first value at or above 25.75
    assert codes[list(vals).index(26)] == 1 and codes[list(vals).index(25)] == 0


def test_quantiles_with_repeated_values_make_fewer_bands():
    obs = obs_from("x\n0\n0\n0\n0\n0\n0\n1\n2\n", quantiles=4)
    assert len(obs.labels) < 4
    assert any("only" in s for s in obs.notes())
    with pytest.raises(ChainFileError, match="single repeated value"):
        obs_from("x\n3\n3\n3\n", quantiles=3)


def test_band_labels_and_cut_parsing():
    assert band_labels([-0.01, 0.0, 0.01], percent=True) == (
        "below -1%",
        "-1% to 0%",
        "0% to 1%",
        "1% and above",
    )
    assert parse_cuts("-1%, 1%") == ((-0.01, 0.01), True)
    assert parse_cuts("2;5") == ((2.0, 5.0), False)
    with pytest.raises(OptionError, match="increase strictly"):
        parse_cuts("1,1")
    with pytest.raises(OptionError, match="not a number"):
        parse_cuts("low,high")
    with pytest.raises(OptionError, match="at least one"):
        parse_cuts("")


def test_numeric_options_conflict():
    with pytest.raises(OptionError, match="not both"):
        obs_from("x\n1\n2\n", cuts="1", quantiles=2)
    with pytest.raises(OptionError, match="--states"):
        obs_from("x\n1\n2\n", cuts="1", states=["a"])


def test_non_number_in_numeric_column_names_the_line():
    with pytest.raises(ChainFileError, match=r"'n/a' in column 'r' is not a number") as err:
        obs_from("r\n0.1\n0.2\nn/a\n0.3\n", cuts="0.15")
    assert err.value.where == "line 4"
    assert "data.csv: line 4" in str(err.value)


# --------------------------------------------------------------------------
# refusals
# --------------------------------------------------------------------------
def test_sequences_too_short():
    with pytest.raises(ChainFileError, match="too short to count any transition.*--id-column"):
        obs_from("id,s\n1,A\n2,B\n3,A\n", id_column="id")
    with pytest.raises(ChainFileError, match="too short"):
        obs_from("s\nA\n")


def test_row_with_too_many_values():
    with pytest.raises(ChainFileError, match="3 values but the header has 2") as err:
        parse_table("a,b\n1,2\n1,2,3\n", source="f.csv")
    assert err.value.where == "line 3"


def test_empty_and_header_only_files():
    with pytest.raises(ChainFileError, match="empty"):
        parse_table("# only a comment\n\n")
    with pytest.raises(ChainFileError, match="header but no data rows"):
        parse_table("state\n")


def test_duplicate_header_names():
    with pytest.raises(ChainFileError, match="'s' twice") as err:
        parse_table("# c\ns,s\nA,B\n")
    assert err.value.where == "line 2"


def test_empty_id_cell():
    with pytest.raises(ChainFileError, match="id cell") as err:
        obs_from("id,s\na,A\n,B\n", id_column="id")
    assert err.value.where == "line 3"


def test_same_column_twice():
    with pytest.raises(OptionError, match="different columns"):
        obs_from("id,s\na,A\na,B\n", column="s", id_column="s")


def test_size_bound(tmp_path, monkeypatch):
    import core.io

    p = tmp_path / "big.csv"
    p.write_text("s\n" + "A\n" * 600)
    monkeypatch.setattr(core.io, "MAX_FILE_BYTES", 1000)
    with pytest.raises(ChainFileError, match="larger than the limit"):
        read_table(p)


def test_row_bound(monkeypatch):
    monkeypatch.setattr(datafile, "MAX_ROWS", 5)
    with pytest.raises(LimitError, match="more than 5 data rows"):
        parse_table("s\n" + "A\n" * 6)


def test_state_bound(monkeypatch):
    monkeypatch.setattr(datafile, "MAX_STATES", 4)
    with pytest.raises(LimitError, match="5 different labels.*--cuts or --quantiles"):
        obs_from("x\n1\n2\n3\n4\n5\n")


def test_not_utf8(tmp_path):
    p = tmp_path / "latin.csv"
    p.write_bytes(b"s\nA\n\xe9t\xe9\n")
    with pytest.raises(ChainFileError, match="not UTF-8") as err:
        read_table(p)
    assert err.value.where == "line 3"


def test_read_observations_records_the_source(tmp_path):
    p = tmp_path / "log.csv"
    p.write_text("s\nA\nB\nA\n")
    obs = read_observations(p)
    rec = obs.to_json()
    assert rec["file"] == "log.csv" and len(rec["sha256"]) == 64
    assert rec["transitions"] == 2 and rec["sequences"] == 1


# --------------------------------------------------------------------------
# fuzz: any text gives observations or a LongrunError, never a traceback
# --------------------------------------------------------------------------
from hypothesis import given  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

from core.errors import LongrunError  # noqa: E402

_CELLS = st.sampled_from(["A", "B", "x y", "", "0", "-1", "0.5%", "1e3", "nan", "2024-01-02", "2024-01-02T03:04Z",
                          "\"q\"", "#c", " ", "é"])


@given(
    rows=st.lists(st.lists(_CELLS, min_size=0, max_size=4), min_size=0, max_size=12),
    delim=st.sampled_from([",", ";", "\t"]),
    header=st.booleans(),
    opts=st.fixed_dictionaries(
        {},
        optional={
            "column": st.sampled_from(["1", "2", "3", "zz"]),
            "id_column": st.sampled_from(["1", "2"]),
            "time_column": st.sampled_from(["2", "3"]),
            "cuts": st.sampled_from(["0", "-1%,1%", "1,0", "abc"]),
            "quantiles": st.integers(min_value=0, max_value=5),
            "states": st.sampled_from([["A"], ["A", "B"], ["A", "A"]]),
        },
    ),
)
def test_reader_never_raises_anything_but_user_errors(rows, delim, header, opts):
    text = "\n".join(delim.join(r) for r in rows)
    try:
        table = parse_table(text, header=header)
        obs = observations_from_table(table, **opts)
    except LongrunError:
        return
    assert obs.n_transitions >= 1
    assert all(len(s) >= 1 for s in obs.sequences)
    assert all(0 <= int(s.min()) and int(s.max()) < obs.n for s in obs.sequences)
