"""`regimewise selfcheck` end to end on a small made-up study: files, summary arithmetic and refusals."""

import json
import math

import pytest
from support.tiny import tiny_decisions, tiny_protocol_dict, write_tiny

from regimewise.cli import main


@pytest.fixture(scope="module")
def finished(tmp_path_factory):
    folder = tmp_path_factory.mktemp("selfcheck")
    protocol = tiny_protocol_dict()
    protocol["evaluation"] = {"estimators": ["pdwis", "wdr"]}
    path = write_tiny(folder / "study", protocol=protocol, decisions=tiny_decisions(120, 1))
    out = folder / "out"
    argv = ["selfcheck", str(path), "--cohorts", "3", "--replicates", "20", "--truth-episodes", "1000"]
    assert main([*argv, "--out", str(out), "--cores", "1"]) == 0
    return path, out, json.loads((out / "selfcheck.json").read_text(encoding="utf-8"))


def test_prints_a_line_per_cohort(tmp_path, capsys):
    protocol = tiny_protocol_dict()
    protocol["evaluation"] = {"estimators": ["wdr"]}
    path = write_tiny(tmp_path / "study", protocol=protocol, decisions=tiny_decisions(100, 4))
    argv = ["selfcheck", str(path), "--cohorts", "2", "--replicates", "20", "--truth-episodes", "1000"]
    assert main([*argv, "--out", str(tmp_path / "out"), "--cores", "1"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert any(line.startswith("[1/2] look-alike cohort 0 done") for line in lines)
    assert any(line.startswith("[2/2] look-alike cohort 1 done") for line in lines)
    assert any(line.startswith("self-check done in") for line in lines)


def test_writes_the_page_and_the_details(finished):
    _, out, document = finished
    assert document["settings"]["cohorts"] == 3 and document["settings"]["replicates"] == 20
    assert [c["cohort"] for c in document["cohorts"]] == [0, 1, 2]
    page = (out / "selfcheck.html").read_text(encoding="utf-8")
    assert "Research use only" in page and "not medical advice" in page
    assert "licensed clinicians" in page and "<script" not in page


def test_usual_care_coverage_is_the_share_of_intervals_holding_the_truth(finished):
    # Hand computation from the stored cohorts; MCSE √(p(1−p)/R) (Morris, White & Crowther 2019, Table 6).
    _, _, document = finished
    estimator = document["summary"]["estimator"]
    hits = []
    for cohort in document["cohorts"]:
        low, high = cohort["estimates"]["usual_care"][estimator]["value_interval"]
        hits.append(low <= cohort["truths"]["usual_care"]["value"] <= high)
    measured = document["summary"]["usual_care_value"]["all"]
    p = sum(hits) / len(hits)
    assert measured["coverage"] == pytest.approx(p)
    assert measured["coverage_mcse"] == pytest.approx(math.sqrt(p * (1 - p) / len(hits)))
    assert measured["n_used"] == 3


def test_the_same_command_gives_the_same_bytes(finished, tmp_path):
    path, out, _ = finished
    again = tmp_path / "again"
    argv = ["selfcheck", str(path), "--cohorts", "3", "--replicates", "20", "--truth-episodes", "1000"]
    assert main([*argv, "--out", str(again), "--cores", "2"]) == 0
    first = json.loads((out / "selfcheck.json").read_text(encoding="utf-8"))
    second = json.loads((again / "selfcheck.json").read_text(encoding="utf-8"))
    assert first == second  # one or two worker processes: the same cohorts
    assert (out / "selfcheck.html").read_bytes() == (again / "selfcheck.html").read_bytes()


def test_too_small_a_cohort_is_refused_in_one_line(tmp_path, capsys):
    path = write_tiny(tmp_path / "study", decisions=tiny_decisions(5, 2))
    assert main(["selfcheck", str(path), "--cohorts", "2", "--out", str(tmp_path / "out")]) == 1
    err = capsys.readouterr().err.strip()
    assert "needs at least" in err and "decision point 0" in err and "\n" not in err
    assert not (tmp_path / "out" / "selfcheck.json").exists()


def test_bad_settings_are_refused(tmp_path, capsys):
    path = write_tiny(tmp_path / "study", decisions=tiny_decisions(40, 3))
    assert main(["selfcheck", str(path), "--cohorts", "1", "--out", str(tmp_path / "out")]) == 1
    assert "cohorts" in capsys.readouterr().err
