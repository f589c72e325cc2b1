"""`regimewise selfcheck` end to end on a small made-up study: files, summary arithmetic and refusals."""

import json
import math
import statistics

import numpy as np
import pytest
from support.tiny import tiny_decisions, tiny_protocol_dict, write_tiny

from regimewise.cli import main
from regimewise.protocol import load_protocol
from regimewise.selfcheck import cohort as cohort_module
from regimewise.selfcheck.cohort import cohort_seeds

# small settings for fast tests: 3 cohorts, 20 replicates, 1,000 truth episodes, a reference rule from 2,000
FAST = ["--cohorts", "3", "--replicates", "20", "--truth-episodes", "1000", "--reference-episodes", "2000"]


@pytest.fixture(scope="module")
def finished(tmp_path_factory):
    folder = tmp_path_factory.mktemp("selfcheck")
    protocol = tiny_protocol_dict()
    protocol["evaluation"] = {"estimators": ["pdwis", "wdr"]}
    path = write_tiny(folder / "study", protocol=protocol, decisions=tiny_decisions(120, 1))
    out = folder / "out"
    argv = ["selfcheck", str(path), *FAST]
    assert main([*argv, "--out", str(out), "--cores", "1"]) == 0
    return path, out, json.loads((out / "selfcheck.json").read_text(encoding="utf-8"))


def test_prints_a_line_per_cohort(tmp_path, capsys):
    protocol = tiny_protocol_dict()
    protocol["evaluation"] = {"estimators": ["wdr"]}
    path = write_tiny(tmp_path / "study", protocol=protocol, decisions=tiny_decisions(100, 4))
    argv = ["selfcheck", str(path), *FAST[2:], "--cohorts", "2"]
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
    argv = ["selfcheck", str(path), *FAST]
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
    assert main(["selfcheck", str(path), "--reference-episodes", "10", "--out", str(tmp_path / "out")]) == 1
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and "reference_episodes = 10" in err and "--reference-episodes" in err


def test_regret_is_the_reference_value_minus_the_learned_truth(finished):
    # Hand computation from the stored cohorts: each cohort's regret is the reference rule's true value minus the
    # learned rules' true value (both from the cohort's draws); the summary's mean, its Monte Carlo SE (sample SD
    # over √R: Morris, White & Crowther 2019, Table 6, for a mean) and the share of the reference's gain reached.
    _, _, document = finished
    regret = document["summary"]["regret"]
    rows = []
    for c in document["cohorts"]:
        learned, usual = c["truths"]["learned"]["value"], c["truths"]["usual_care"]["value"]
        assert c["regret"]["regret"] == pytest.approx(c["regret"]["reference_value"] - learned)
        rows.append((c["regret"]["reference_value"], learned, usual))
    regrets = [ref - learned for ref, learned, _ in rows]
    assert regret["cohorts"] == 3 and regret["reference_episodes"] == 2000
    assert regret["mean_regret"] == pytest.approx(statistics.fmean(regrets))
    assert regret["regret_mcse"] == pytest.approx(statistics.stdev(regrets) / math.sqrt(3))
    assert regret["median_regret"] == pytest.approx(statistics.median(regrets))
    gain = statistics.fmean(ref - usual for ref, _, usual in rows)
    assert regret["reference_gain"] == pytest.approx(gain)
    if gain > 0:
        assert regret["share_of_gain"] == pytest.approx(statistics.fmean(lrn - u for _, lrn, u in rows) / gain)
    assert regret["worse_than_usual_care"] == pytest.approx(statistics.fmean(lrn < u for _, lrn, u in rows))
    assert regret["reference_check"]["episodes"] == 1000
    assert regret["reference_check"]["full_value"] == document["cohorts"][0]["regret"]["reference_value"]


def _fail_on(cohorts, monkeypatch):
    """Make the analysis of the listed cohorts raise (the worker processes are forked, so they inherit it)."""
    real = cohort_module.run_cohort

    def run_cohort(world, protocol, cohort, *args):
        if cohort in cohorts:
            raise np.linalg.LinAlgError("Singular matrix\nsecond line")
        return real(world, protocol, cohort, *args)

    monkeypatch.setattr(cohort_module, "run_cohort", run_cohort)


def test_a_failing_cohort_is_recorded_and_left_out(tmp_path, capsys, monkeypatch):
    protocol = tiny_protocol_dict()
    protocol["evaluation"] = {"estimators": ["wdr"]}
    path = write_tiny(tmp_path / "study", protocol=protocol, decisions=tiny_decisions(100, 4))
    _fail_on({1}, monkeypatch)
    out = tmp_path / "out"
    assert main(["selfcheck", str(path), *FAST, "--out", str(out), "--cores", "1"]) == 0
    printed = capsys.readouterr().out
    assert "[2/3] look-alike cohort 1 failed: LinAlgError: Singular matrix (" in printed
    document = json.loads((out / "selfcheck.json").read_text(encoding="utf-8"))
    seed = cohort_seeds(load_protocol(path).protocol, 1)[0]
    assert document["failed_cohorts"] == [{"cohort": 1, "seed": seed, "error": "LinAlgError: Singular matrix"}]
    assert [c["cohort"] for c in document["cohorts"]] == [0, 2]
    assert document["settings"]["cohorts"] == 3 and document["settings"]["cohorts_completed"] == 2
    assert document["summary"]["usual_care_value"]["all"]["n_used"] == 2
    assert document["summary"]["regret"]["cohorts"] == 2
    page = (out / "selfcheck.html").read_text(encoding="utf-8")
    assert "The analysis failed on 1 of 3 look-alike cohorts" in page and "LinAlgError: Singular matrix" in page


def test_too_many_failing_cohorts_are_refused_in_one_line(tmp_path, capsys, monkeypatch):
    path = write_tiny(tmp_path / "study", decisions=tiny_decisions(100, 4))
    _fail_on({0, 1}, monkeypatch)
    out = tmp_path / "out"
    assert main(["selfcheck", str(path), *FAST, "--out", str(out), "--cores", "1"]) == 1
    err = capsys.readouterr().err.strip()
    assert "the analysis failed on 2 of 3 look-alike cohorts" in err and "cohort 0: LinAlgError" in err
    assert "\n" not in err and not (out / "selfcheck.json").exists()
