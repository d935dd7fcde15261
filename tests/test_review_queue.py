"""The review queue's logic, as plain Python: order, decisions, undo, filter, clusters, resume."""

import os
import signal
import sqlite3
import subprocess
import sys
import textwrap
from datetime import datetime, timezone
from pathlib import Path

import networkx as nx
import pytest
from review_workspace import make_review_workspace

from curate.review_queue import (
    DECISION_WORDS,
    DECISIONS,
    ReviewSession,
    current_decisions,
    record_decision,
    uncertainty,
)


@pytest.fixture
def ws(tmp_path):
    return make_review_workspace(tmp_path)


def keys(session):
    return [tuple(map(int, k)) for k in session.pairs()[["image_a", "image_b"]].to_numpy()]


def test_queue_puts_the_most_uncertain_pair_first(ws):
    s = ReviewSession(ws, reviewer="ana")
    # scores: (1,9) 0.55, (3,5) 0.3, the four turned copies 0.9 -> uncertainty 0.9, 0.6, 0.2
    assert keys(s) == [(1, 9), (3, 5), (1, 2), (3, 4), (5, 6), (7, 8)]
    assert s.current.key == (1, 9)
    assert s.current.conflict == "label" and s.current.verdict == "possible"
    assert s.current.distances == {
        "ahash": 4, "dhash": 6, "phash": 8, "whash": 5, "colorhash": 2, "crop": None}


def test_every_decision_code_has_words_of_its_own():
    assert set(DECISION_WORDS) == set(DECISIONS) == {
        "same_image", "same_lesion", "different_lesions", "skip"}
    assert len(set(DECISION_WORDS.values())) == len(DECISIONS)


def test_uncertainty_is_highest_in_the_middle():
    u = uncertainty([0.0, 0.25, 0.5, 0.75, 1.0])
    assert u.tolist() == [0.0, 0.5, 1.0, 0.5, 0.0]


def test_a_decision_is_in_the_database_before_decide_returns(ws):
    s = ReviewSession(ws, reviewer="ana")
    s.decide("different_lesions")
    # read with a fresh sqlite3 connection, outside curate
    con = sqlite3.connect(ws.db_path)
    rows = con.execute("SELECT image_a, image_b, decision, reviewer, decided_at, undone "
                       "FROM decisions").fetchall()
    con.close()
    assert len(rows) == 1
    a, b, decision, reviewer, decided_at, undone = rows[0]
    assert (a, b, decision, reviewer, undone) == (1, 9, "different_lesions", "ana", 0)
    when = datetime.fromisoformat(decided_at)
    assert when.tzinfo is not None and when.utcoffset().total_seconds() == 0
    assert abs((datetime.now(timezone.utc) - when).total_seconds()) < 120
    assert s.current.key == (3, 5)


def test_bad_arguments_are_refused(ws):
    with pytest.raises(ValueError, match="reviewer"):
        ReviewSession(ws, reviewer="  ")
    s = ReviewSession(ws, reviewer="ana")
    with pytest.raises(ValueError, match="decision must be one of"):
        s.decide("duplicate")
    with pytest.raises(ValueError, match="two different images"):
        record_decision(ws, 3, 3, "same_image", reviewer="ana")
    with pytest.raises(ValueError, match="column must be"):
        s.options("patient")
    assert len(current_decisions(ws)) == 0


def test_pairs_given_in_either_order_are_stored_smaller_id_first(ws):
    record_decision(ws, 9, 1, "same_lesion", reviewer="ana")
    cur = current_decisions(ws)
    assert cur[["image_a", "image_b", "decision"]].values.tolist() == [[1, 9, "same_lesion"]]


def test_a_new_session_resumes_at_the_first_undecided_pair(ws):
    s = ReviewSession(ws, reviewer="ana")
    for code in ("different_lesions", "different_lesions", "same_image"):
        s.decide(code)
    assert s.current.key == (3, 4)
    again = ReviewSession(ws, reviewer="ben")
    assert again.current.key == (3, 4)
    assert (again.progress().decided, again.progress().total) == (3, 6)


def test_undo_goes_back_and_the_earlier_decision_counts_again(ws):
    s = ReviewSession(ws, reviewer="ana")
    s.decide("same_lesion")  # (1, 9)
    s.go_to(0)
    s.decide("different_lesions")  # (1, 9) again: the later one counts
    assert current_decisions(ws)["decision"].tolist() == ["different_lesions"]
    undone = s.undo()
    assert undone.key == (1, 9) and s.current.key == (1, 9)
    assert current_decisions(ws)["decision"].tolist() == ["same_lesion"]
    assert s.current.decision == "same_lesion"
    assert s.undo().key == (1, 9)
    assert len(current_decisions(ws)) == 0 and s.current.decision is None
    assert s.undo() is None  # nothing left
    # rows are flagged, never deleted: the history stays
    assert ws.read_sql("SELECT undone FROM decisions ORDER BY decision_id")["undone"].tolist() == [1, 1]


def test_undo_works_after_a_restart_and_only_for_the_same_reviewer(ws):
    ReviewSession(ws, reviewer="ana").decide("same_image")
    ReviewSession(ws, reviewer="ben").decide("different_lesions")  # on the next pair
    later = ReviewSession(ws, reviewer="ana")
    assert later.undo().key == (1, 9)
    cur = current_decisions(ws)
    assert cur[["image_a", "image_b", "reviewer"]].values.tolist() == [[3, 5, "ben"]]


def test_skipped_pairs_come_back_after_the_rest(ws):
    s = ReviewSession(ws, reviewer="ana")
    s.skip()  # (1, 9)
    seen = []
    while s.progress().remaining:
        seen.append(s.current.key)
        s.decide("same_image")
    assert (1, 9) not in seen and len(seen) == 5
    assert s.current.key == (1, 9) and s.current.decision == "skip"
    assert str(s.progress()) == "5 of 6 decided, 1 skipped"
    s.decide("different_lesions")
    assert s.done


@pytest.mark.parametrize(
    "filters, expected",
    [
        ({"verdict": "possible"}, [(1, 9), (3, 5)]),
        ({"verdict": ["near"], "source": "south"}, [(3, 4), (7, 8)]),
        ({"conflict": True}, [(1, 9)]),
        ({"conflict": False, "verdict": "possible"}, [(3, 5)]),
        ({"conflict": "label"}, [(1, 9)]),
        ({"node": "melanoma"}, [(1, 9)]),
        ({"node": "benign"}, [(1, 9), (3, 5), (1, 2), (3, 4), (5, 6), (7, 8)]),
        ({"source": "nowhere"}, []),
    ],
)
def test_filter(ws, filters, expected):
    s = ReviewSession(ws, reviewer="ana", **filters)
    assert keys(s) == expected
    assert s.progress().total == len(expected)
    if not expected:
        assert s.current is None
        with pytest.raises(ValueError, match="empty"):
            s.decide("skip")


def test_filter_options_and_changing_the_filter(ws):
    s = ReviewSession(ws, reviewer="ana")
    assert s.options("verdict") == ["near", "possible"]
    assert s.options("source") == ["north", "south"]
    assert s.options("conflict") == ["label"]
    assert s.options("node") == ["compound_naevus", "melanoma"]
    s.set_filter(verdict="near")
    assert s.current.key == (1, 2)
    s.decide("same_image")
    s.set_filter()
    assert s.progress().decided == 1 and s.current.key == (1, 9)


def test_image_info_holds_the_metadata_that_matters(ws):
    s = ReviewSession(ws, reviewer="ana")
    info = s.image_info(9)
    assert info["source"] == "south" and info["patient_id"] == "P99"
    assert info["label"] == "melanoma" and info["node"] == "melanoma"
    assert info["capture_date"] == "2020-01-02" and (info["width"], info["height"]) == (200, 200)
    with pytest.raises(ValueError, match="not in the catalog"):
        s.image_info(12345)


def test_clusters_match_networkx_components_and_split_off_cuts_members(ws):
    s = ReviewSession(ws, reviewer="ana")

    def reference(session):
        # networkx connected_components on the same links (networkx 3.x, algorithms.components)
        g = nx.Graph()
        for (a, b), d in zip(keys(session), session.pairs()["decision"]):
            g.add_nodes_from([a, b])
            if d != "different_lesions":
                g.add_edge(a, b)
        comps = [sorted(c) for c in nx.connected_components(g) if len(c) >= 2]
        return sorted(comps, key=lambda c: (-len(c), c[0]))

    assert s.clusters() == reference(s) == [[3, 4, 5, 6], [1, 2, 9], [7, 8]]
    ids = s.split_off([1, 2, 9], [9])
    assert len(ids) == 2
    cur = current_decisions(ws)
    assert cur[["image_a", "image_b", "decision"]].values.tolist() == [
        [1, 9, "different_lesions"], [2, 9, "different_lesions"]]
    assert s.clusters() == reference(s) == [[3, 4, 5, 6], [1, 2], [7, 8]]
    with pytest.raises(ValueError, match="not in the cluster"):
        s.split_off([1, 2], [7])
    with pytest.raises(ValueError, match="whole cluster"):
        s.split_off([1, 2], [1, 2])
    # confirming the rest of a cluster decides its undecided candidate pairs only
    assert len(s.confirm_cluster([3, 4, 5, 6])) == 3
    assert len(s.confirm_cluster([3, 4, 5, 6])) == 0


KILL_SCRIPT = textwrap.dedent(
    """
    import sys, time
    from curate.review_queue import ReviewSession
    s = ReviewSession(sys.argv[1], reviewer="night shift")
    codes = ["same_image", "different_lesions", "same_lesion"]
    n = 0
    while s.current is not None and not s.done:
        key = s.current.key
        s.decide(codes[n % 3])
        n += 1
        print("decided", key[0], key[1], flush=True)
        time.sleep(0.2 if n < 3 else 30)   # the third decision is followed by a long pause
    """
)


def test_killing_the_process_mid_review_loses_nothing(ws, tmp_path):
    script = tmp_path / "reviewer.py"
    script.write_text(KILL_SCRIPT)
    proc = subprocess.Popen(
        [sys.executable, str(script), str(ws.path)],
        stdout=subprocess.PIPE, text=True, cwd=tmp_path,
        env={**os.environ, "PYTHONPATH": str(Path(__file__).parent.parent)},
    )
    decided = []
    try:
        for _ in range(3):
            line = proc.stdout.readline()
            assert line.startswith("decided"), line
            decided.append(tuple(int(x) for x in line.split()[1:]))
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=30)
    assert proc.returncode == -signal.SIGKILL
    # the database is intact and holds every decision printed before the kill
    con = sqlite3.connect(ws.db_path)
    assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    con.close()
    cur = current_decisions(ws)
    stored = [tuple(map(int, k)) for k in cur[["image_a", "image_b"]].to_numpy()]
    assert sorted(stored) == sorted(decided) == [(1, 2), (1, 9), (3, 5)]
    assert set(cur["reviewer"]) == {"night shift"}
    # and a new session carries on with the next pair in the queue
    resumed = ReviewSession(ws, reviewer="night shift")
    assert resumed.current.key == (3, 4)
    assert resumed.progress().decided == 3
