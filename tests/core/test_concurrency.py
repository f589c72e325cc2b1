"""Independent fits on several threads: results in task order, errors raised, BLAS on one thread, and the regime
and evaluate stages' outputs identical byte for byte with one thread and with two, the behaviour stage's whether it
writes behaviour.json itself or in a job of its own, the regime stage's whether it
learns the cross-fitted fold regimes itself or reads them from the crossfit job, and the evaluate stage's whether it
evaluates usual care and the fixed strategies itself or reads them from the evaluate_fixed job, and whether it
evaluates every regime in one job or in the evaluate_learned, evaluate_fixed and evaluate_side jobs (the project's own
rule: the numbers must not depend on the cores or on how the work is split into jobs; no outside reference
applies)."""

from __future__ import annotations

import platform
import time

import numpy as np
import pytest
import yaml
from support.tiny import REPOSITORY
from threadpoolctl import threadpool_info

from regimewise.core.concurrency import (
    keep_freed_memory,
    run_concurrently,
    run_in_processes,
    share_allocator_arenas,
)
from regimewise.data.records import clean_decisions
from regimewise.demo.simulate import simulate_cohort
from regimewise.errors import UserInputError
from regimewise.evaluation.values import FIXED_PART, LEARNED_PART, fixed_regime_names, regime_targets
from regimewise.io import dumps_json, read_json, read_parquet, write_parquet
from regimewise.protocol import load_protocol
from regimewise.sensitivity import analysis
from regimewise.workflow.stages import (
    behaviour_diagnostics_stage,
    behaviour_fit_stage,
    behaviour_stage,
    bootstrap_shard_stage,
    bootstrap_stage,
    combine_stage,
    crossfit_stage,
    evaluate_fixed_stage,
    evaluate_join_stage,
    evaluate_learned_stage,
    evaluate_side_stage,
    evaluate_stage,
    headline_contrast,
    regime_fit_stage,
    regime_join_stage,
    regime_stage,
    sensitivity_curves_stage,
    sensitivity_stage,
)


def test_results_come_back_in_task_order_whatever_finishes_first():
    delays = [0.2, 0.0, 0.1, 0.0]
    tasks = [lambda i=i, d=d: (time.sleep(d), i)[1] for i, d in enumerate(delays)]
    assert run_concurrently(tasks, threads=2) == [0, 1, 2, 3]
    assert run_concurrently(tasks, threads=1) == [0, 1, 2, 3]
    assert run_concurrently([], threads=2) == []


def test_an_error_in_a_task_is_raised_to_the_caller():
    def fails():
        raise ValueError("singular design at step 3")

    with pytest.raises(ValueError, match="singular design at step 3"):
        run_concurrently([lambda: 1, fails], threads=2)


def test_processes_return_results_in_task_order_and_run_in_other_processes():
    import os

    delays = [0.2, 0.0, 0.1, 0.0]
    tasks = [lambda i=i, d=d: (time.sleep(d), i, os.getpid())[1:] for i, d in enumerate(delays)]
    results = run_in_processes(tasks, processes=2)
    assert [i for i, _ in results] == [0, 1, 2, 3]
    assert os.getpid() not in {pid for _, pid in results}  # forked workers (Linux, where the suite runs)
    assert [i for i, _ in run_in_processes(tasks, processes=1)] == [0, 1, 2, 3]
    assert {pid for _, pid in run_in_processes(tasks, processes=1)} == {os.getpid()}
    assert run_in_processes([], processes=2) == []


def test_an_error_in_a_process_is_raised_to_the_caller():
    def fails():
        raise ValueError("no figure for an empty curve")

    with pytest.raises(ValueError, match="no figure for an empty curve"):
        run_in_processes([lambda: 1, fails], processes=2)


def test_blas_runs_on_one_thread_inside_the_tasks():
    np.ones((2, 2)) @ np.ones((2, 2))  # loads the BLAS library, so threadpoolctl sees it

    def blas_threads():
        return [pool["num_threads"] for pool in threadpool_info() if pool["user_api"] == "blas"]

    seen = run_concurrently([blas_threads, blas_threads], threads=2)
    assert seen[0] and all(n == 1 for threads in seen for n in threads)


def test_the_allocator_takes_one_shared_arena_where_the_c_library_is_glibc():
    # glibc's mallopt returns 1 when it takes a setting; elsewhere nothing changes and the call says so
    took = share_allocator_arenas()
    assert took is (platform.libc_ver()[0] == "glibc")
    assert run_concurrently([lambda: np.ones(10**6).sum()] * 2, threads=2) == [10**6, 10**6]


def test_the_allocator_keeps_large_arrays_on_its_heap_where_the_c_library_is_glibc():
    took = keep_freed_memory()
    assert took is (platform.libc_ver()[0] == "glibc")
    # arrays above glibc's largest mapping threshold (32 MB), freed and made again, hold the same numbers
    assert [float(np.full(5 * 10**6, 0.5).sum()) for _ in range(3)] == [2.5e6] * 3


@pytest.fixture(scope="module")
def cohort(tmp_path_factory):
    folder = tmp_path_factory.mktemp("threads")
    raw = yaml.safe_load((REPOSITORY / "config" / "protocol.yaml").read_text(encoding="utf-8"))
    raw["data"] = {"root": ".", "decisions": "decisions.parquet"}
    raw.pop("survival", None)  # no episodes table here
    # a smaller pessimism ensemble keeps the test quick; a support threshold of 0.1 keeps every fold's regime to
    # actions each fold has seen at every step, so that every estimator is defined (as tests/bootstrap/test_sweep.py)
    raw["constraints"].update(ensemble_size=5, support_threshold=0.1)
    (folder / "protocol.yaml").write_text(yaml.safe_dump(raw, sort_keys=False), encoding="utf-8")
    pf = load_protocol(folder / "protocol.yaml")
    write_parquet(folder / "decisions.parquet", clean_decisions(pf, simulate_cohort(600, seed=5).decisions))
    behaviour_stage(folder / "protocol.yaml", folder / "decisions.parquet", folder / "proba.parquet", folder / "b.json")
    return folder, pf


def test_the_behaviour_fit_and_diagnostics_jobs_write_the_behaviour_stages_bytes(cohort):
    # the workflow fits usual care in one job and writes behaviour.json in another, beside the later jobs
    folder, _ = cohort
    protocol, decisions = folder / "protocol.yaml", folder / "decisions.parquet"
    behaviour_fit_stage(protocol, decisions, folder / "proba_fit.parquet", folder / "model.json")
    behaviour_diagnostics_stage(
        protocol, decisions, folder / "proba_fit.parquet", folder / "model.json", folder / "b_split.json"
    )
    assert (folder / "proba_fit.parquet").read_bytes() == (folder / "proba.parquet").read_bytes()
    assert (folder / "b_split.json").read_bytes() == (folder / "b.json").read_bytes()
    # probabilities of other decisions are refused
    write_parquet(folder / "proba_other.parquet", read_parquet(folder / "proba_fit.parquet").iloc[:-1])
    with pytest.raises(UserInputError, match="does not hold the probabilities of these decisions"):
        behaviour_diagnostics_stage(
            protocol, decisions, folder / "proba_other.parquet", folder / "model.json", folder / "b_x.json"
        )


def test_the_regime_stage_writes_the_same_bytes_with_two_threads(cohort):
    folder, pf = cohort
    assert pf.protocol.evaluation.cross_fit_folds > 1 and pf.protocol.constraints.pessimism > 0  # every fit kind runs
    written = {}
    for threads in (1, 2):
        table, regime = folder / f"table{threads}.parquet", folder / f"regime{threads}.json"
        regime_stage(
            folder / "protocol.yaml",
            folder / "decisions.parquet",
            folder / "proba.parquet",
            table,
            regime,
            threads=threads,
        )
        written[threads] = (table.read_bytes(), regime.read_bytes())
    assert written[1] == written[2]


def test_the_regime_stage_writes_the_same_bytes_from_the_crossfit_jobs_table(cohort):
    # the workflow learns the fold regimes in their own job (beside the behaviour stage); the regime stage's outputs
    # must be those it writes when it learns them itself
    folder, pf = cohort
    protocol, decisions, proba = folder / "protocol.yaml", folder / "decisions.parquet", folder / "proba.parquet"
    crossfit_stage(protocol, decisions, folder / "crossfit.parquet", threads=2)
    table = read_parquet(folder / "crossfit.parquet")
    labels = pf.protocol.action_labels
    assert list(table.columns) == ["step", "evaluated", *[f"evaluated_q_{a}" for a in labels]]
    written = {}
    for name, crossfit in (("alone", None), ("split", folder / "crossfit.parquet")):
        out, regime = folder / f"table_{name}.parquet", folder / f"regime_{name}.json"
        regime_stage(protocol, decisions, proba, out, regime, crossfit=crossfit)
        written[name] = (out.read_bytes(), regime.read_bytes())
    assert written["alone"] == written["split"]
    evaluated = read_parquet(folder / "table_split.parquet", ["evaluated"])["evaluated"]
    assert (evaluated.to_numpy() == np.asarray(labels, dtype=object)[table["evaluated"].to_numpy()]).all()


def _join(folder, protocol, fitted, crossfit, out, summary=None):
    """The regime join job on ``<fitted>.parquet`` (with ``<summary or fitted>.json``) and ``<crossfit>.parquet``,
    writing ``<out>.parquet`` and ``<out>.json``."""
    regime_join_stage(
        protocol,
        folder / "decisions.parquet",
        folder / f"{fitted}.parquet",
        folder / f"{summary or fitted}.json",
        folder / f"{crossfit}.parquet",
        folder / f"{out}.parquet",
        folder / f"{out}.json",
    )


def test_the_regime_fit_and_join_jobs_write_the_regime_stages_bytes(cohort):
    # the workflow learns the side-by-side regimes in a job beside the crossfit job and joins the two afterwards;
    # the outputs must be those the regime stage writes in one job
    folder, _ = cohort
    protocol, decisions, proba = folder / "protocol.yaml", folder / "decisions.parquet", folder / "proba.parquet"
    crossfit_stage(protocol, decisions, folder / "crossfit_j.parquet")
    regime_stage(protocol, decisions, proba, folder / "t_one.parquet", folder / "r_one.json")
    regime_fit_stage(protocol, decisions, proba, folder / "fitted.parquet", folder / "fitted.json")
    _join(folder, protocol, "fitted", "crossfit_j", "two")
    assert (folder / "t_one.parquet").read_bytes() == (folder / "two.parquet").read_bytes()
    assert (folder / "r_one.json").read_bytes() == (folder / "two.json").read_bytes()
    # a fitted table of other decisions is refused, not joined
    write_parquet(folder / "fitted_other.parquet", read_parquet(folder / "fitted.parquet").iloc[1:])
    with pytest.raises(UserInputError, match="does not hold the side-by-side regimes of these decisions"):
        _join(folder, protocol, "fitted_other", "crossfit_j", "x", summary="fitted")


def test_the_regime_fit_and_join_jobs_write_the_regime_stages_bytes_when_nothing_is_learned(cohort):
    folder, _ = cohort
    raw = yaml.safe_load((folder / "protocol.yaml").read_text(encoding="utf-8"))
    raw.pop("strategies")  # strategies built on the learned regime need one (tests/workflow/test_compare_only_run.py)
    raw["analysis"] = {"learn_regime": False}
    raw["evaluation"]["reference"] = "always_hold"
    (folder / "no_learning.yaml").write_text(yaml.safe_dump(raw, sort_keys=False), encoding="utf-8")
    protocol, decisions, proba = folder / "no_learning.yaml", folder / "decisions.parquet", folder / "proba.parquet"
    assert not load_protocol(protocol).protocol.analysis.learn_regime
    regime_stage(protocol, decisions, proba, folder / "n_one.parquet", folder / "n_one.json")
    crossfit_stage(protocol, decisions, folder / "n_cross.parquet")
    regime_fit_stage(protocol, decisions, proba, folder / "n_fitted.parquet", folder / "n_fitted.json")
    _join(folder, protocol, "n_fitted", "n_cross", "n_two")
    assert (folder / "n_one.parquet").read_bytes() == (folder / "n_two.parquet").read_bytes()
    assert (folder / "n_one.json").read_bytes() == (folder / "n_two.json").read_bytes()


def test_the_regime_stage_refuses_a_crossfit_table_of_other_decisions(cohort):
    folder, _ = cohort
    crossfit_stage(folder / "protocol.yaml", folder / "decisions.parquet", folder / "crossfit_other.parquet")
    other = read_parquet(folder / "crossfit_other.parquet").iloc[:-1]
    write_parquet(folder / "crossfit_other.parquet", other)
    with pytest.raises(UserInputError, match="does not hold the cross-fitted regimes of these decisions"):
        regime_stage(
            folder / "protocol.yaml",
            folder / "decisions.parquet",
            folder / "proba.parquet",
            folder / "t.parquet",
            folder / "r.json",
            crossfit=folder / "crossfit_other.parquet",
        )


def test_the_crossfit_job_writes_only_keys_with_one_fold(cohort):
    folder, _ = cohort
    raw = yaml.safe_load((folder / "protocol.yaml").read_text(encoding="utf-8"))
    raw["evaluation"]["cross_fit_folds"] = 1
    (folder / "one_fold.yaml").write_text(yaml.safe_dump(raw, sort_keys=False), encoding="utf-8")
    crossfit_stage(folder / "one_fold.yaml", folder / "decisions.parquet", folder / "crossfit_one.parquet")
    assert list(read_parquet(folder / "crossfit_one.parquet").columns) == ["step"]


def test_the_evaluate_stage_writes_the_same_bytes_with_two_threads(cohort):
    folder, _ = cohort
    table = folder / "table_for_evaluate.parquet"
    regime_stage(
        folder / "protocol.yaml", folder / "decisions.parquet", folder / "proba.parquet", table, folder / "r.json"
    )
    written = {}
    for threads in (1, 2):
        values = folder / f"values{threads}.json"
        evaluate_stage(
            folder / "protocol.yaml",
            folder / "decisions.parquet",
            folder / "proba.parquet",
            table,
            values,
            threads=threads,
        )
        written[threads] = values.read_bytes()
    assert written[1] == written[2]
    assert b'"side_by_side"' in written[1] and b'"fqe"' in written[1]  # every part that runs on threads was run


def test_the_evaluate_stage_writes_the_same_bytes_from_the_fixed_strategies_file(cohort):
    # the workflow evaluates usual care, the fixed strategies and the comparators in their own job (beside the regime
    # stage); values.json must be the one the stage writes when it evaluates every regime itself
    folder, pf = cohort
    protocol, decisions, proba = folder / "protocol.yaml", folder / "decisions.parquet", folder / "proba.parquet"
    table = folder / "table_for_fixed.parquet"
    regime_stage(protocol, decisions, proba, table, folder / "r_f.json")
    evaluate_fixed_stage(protocol, decisions, proba, folder / "fixed.json")
    fixed = read_json(folder / "fixed.json")
    assert [r["name"] for r in fixed["regimes"]] == fixed_regime_names(pf.protocol)
    assert pf.protocol.comparators and pf.protocol.evaluation.fixed_strategies  # every kind of fixed regime is there
    evaluate_stage(protocol, decisions, proba, table, folder / "values_alone.json")
    evaluate_stage(protocol, decisions, proba, table, folder / "values_split.json", fixed=folder / "fixed.json")
    assert (folder / "values_alone.json").read_bytes() == (folder / "values_split.json").read_bytes()


def test_the_evaluate_stage_refuses_a_fixed_strategies_file_of_other_decisions_or_protocol(cohort):
    folder, _ = cohort
    protocol, decisions, proba = folder / "protocol.yaml", folder / "decisions.parquet", folder / "proba.parquet"
    table = folder / "table_for_fixed.parquet"
    if not table.is_file():
        regime_stage(protocol, decisions, proba, table, folder / "r_f.json")
    evaluate_fixed_stage(protocol, decisions, proba, folder / "fixed_other.json")
    document = read_json(folder / "fixed_other.json")
    (folder / "fixed_other.json").write_text(dumps_json({**document, "decisions": 7}), encoding="utf-8")
    with pytest.raises(UserInputError, match="holds the values of 7 decisions"):
        evaluate_stage(protocol, decisions, proba, table, folder / "v.json", fixed=folder / "fixed_other.json")
    # a file of another protocol's regimes (a comparator renamed since): refused, not spliced in
    document["regimes"][-1]["name"] = "renamed"
    (folder / "fixed_other.json").write_text(dumps_json(document), encoding="utf-8")
    with pytest.raises(UserInputError, match="not this protocol's"):
        evaluate_stage(protocol, decisions, proba, table, folder / "v.json", fixed=folder / "fixed_other.json")


def _evaluate_in_jobs(folder, protocol, tag, one_fold=False):
    """The workflow's jobs from the regime stage's to values.json: crossfit, regime_fit and the join, then
    evaluate_fixed, evaluate_learned (on the crossfit job's table, or with ``one_fold`` on regime_fit's),
    evaluate_side and the evaluate join; writes ``<tag>_*`` files and returns the join's table and values.json."""
    decisions, proba = folder / "decisions.parquet", folder / "proba.parquet"
    f = {name: folder / f"{tag}_{name}" for name in ("crossfit.parquet", "fitted.parquet", "fitted.json")}
    crossfit_stage(protocol, decisions, f["crossfit.parquet"])
    regime_fit_stage(protocol, decisions, proba, f["fitted.parquet"], f["fitted.json"])
    table = folder / f"{tag}_table.parquet"
    regime_join_stage(
        protocol, decisions, f["fitted.parquet"], f["fitted.json"], f["crossfit.parquet"], table, folder / "r.json"
    )
    parts = {name: folder / f"{tag}_{name}.json" for name in ("fixed", "learned", "side")}
    evaluate_fixed_stage(protocol, decisions, proba, parts["fixed"])
    regime = {"fitted": f["fitted.parquet"]} if one_fold else {"crossfit": f["crossfit.parquet"]}
    evaluate_learned_stage(protocol, decisions, proba, parts["learned"], **regime)
    evaluate_side_stage(protocol, decisions, proba, f["fitted.parquet"], parts["side"])
    values = folder / f"{tag}_values.json"
    evaluate_join_stage(protocol, decisions, parts["learned"], parts["fixed"], parts["side"], values)
    return table, values


def test_the_evaluate_jobs_write_the_evaluate_stages_bytes(cohort):
    # the workflow evaluates the learned regime (as soon as the fold regimes are learned), the fixed regimes and the
    # side-by-side regimes in three jobs and joins them; values.json must be the one the stage writes alone
    folder, _ = cohort
    protocol, decisions, proba = folder / "protocol.yaml", folder / "decisions.parquet", folder / "proba.parquet"
    table, values = _evaluate_in_jobs(folder, protocol, "jobs")
    evaluate_stage(protocol, decisions, proba, table, folder / "jobs_alone.json")
    assert (folder / "jobs_alone.json").read_bytes() == values.read_bytes()
    document = read_json(values)
    assert (
        document["side_by_side"]
        and document["learned_weight_histograms"]
        and document["regimes"][0]["name"] == ("learned")
    )


def test_the_evaluate_jobs_write_the_evaluate_stages_bytes_with_one_fold_and_with_nothing_learned(cohort):
    folder, _ = cohort
    raw = yaml.safe_load((folder / "protocol.yaml").read_text(encoding="utf-8"))
    one_fold = {**raw, "evaluation": {**raw["evaluation"], "cross_fit_folds": 1}}
    nothing = {k: v for k, v in raw.items() if k != "strategies"}  # strategies need a learned regime
    nothing.update(analysis={"learn_regime": False}, evaluation={**raw["evaluation"], "reference": "always_hold"})
    decisions, proba = folder / "decisions.parquet", folder / "proba.parquet"
    for tag, changed in (("one_fold", one_fold), ("nothing", nothing)):
        protocol = folder / f"{tag}.yaml"
        protocol.write_text(yaml.safe_dump(changed, sort_keys=False), encoding="utf-8")
        table, values = _evaluate_in_jobs(folder, protocol, tag, one_fold=tag == "one_fold")
        evaluate_stage(protocol, decisions, proba, table, folder / f"{tag}_alone.json")
        assert (folder / f"{tag}_alone.json").read_bytes() == values.read_bytes(), tag
    assert "side_by_side" not in read_json(folder / "nothing_values.json")


def test_the_evaluate_jobs_refuse_parts_of_other_decisions_and_missing_regimes(cohort):
    folder, _ = cohort
    protocol, decisions, proba = folder / "protocol.yaml", folder / "decisions.parquet", folder / "proba.parquet"
    if not (folder / "jobs_values.json").is_file():
        _evaluate_in_jobs(folder, protocol, "jobs")
    parts = {name: folder / f"jobs_{name}.json" for name in ("learned", "fixed", "side")}
    for name, path in parts.items():
        stale = folder / f"stale_{name}.json"
        stale.write_text(dumps_json({**read_json(path), "decisions": 7}), encoding="utf-8")
        with pytest.raises(UserInputError, match="holds the values of 7 decisions"):
            evaluate_join_stage(protocol, decisions, *{**parts, name: stale}.values(), folder / "v.json")
    write_parquet(folder / "fitted_short.parquet", read_parquet(folder / "jobs_fitted.parquet").iloc[1:])
    with pytest.raises(UserInputError, match="does not hold the side-by-side regimes of these decisions"):
        evaluate_side_stage(protocol, decisions, proba, folder / "fitted_short.parquet", folder / "s.json")
    with pytest.raises(UserInputError, match="needs the cross-fitted regime's table"):
        evaluate_learned_stage(protocol, decisions, proba, folder / "l.json", fitted=folder / "jobs_fitted.parquet")


def test_the_two_parts_of_the_regimes_together_are_every_regime_in_order(cohort):
    folder, pf = cohort
    p = pf.protocol
    frame = read_parquet(folder / "decisions.parquet")
    proba = read_parquet(folder / "proba.parquet")[[f"p_{a}" for a in p.action_labels]].to_numpy()
    recommended = np.zeros(len(frame), dtype=np.int64)
    q = np.zeros((len(frame), len(p.action_labels)))

    def names(part):
        return [t["name"] for t in regime_targets(frame, proba, recommended, p, q, by_rows=True, part=part)]

    whole, fixed, learned = names(None), names(FIXED_PART), names(LEARNED_PART)
    assert fixed == fixed_regime_names(p)
    assert whole == [learned[0], *fixed, *learned[1:]] and learned[0] == "learned" and len(learned) > 1
    with pytest.raises(ValueError, match="part must be"):
        names("other")


def test_the_sensitivity_stage_writes_what_the_analysis_finds_from_the_curves_jobs_file(cohort):
    # the bounds curves are computed in their own job (beside the evaluate stage) and pass through a JSON file:
    # sensitivity.json must hold what the analysis finds from the records directly
    folder, _ = cohort
    raw = yaml.safe_load((folder / "protocol.yaml").read_text(encoding="utf-8"))
    raw["evaluation"].update(replicates=0, shards=1)  # intervals.json without replicates: no shard to run here
    (folder / "no_replicates.yaml").write_text(yaml.safe_dump(raw, sort_keys=False), encoding="utf-8")
    protocol, decisions, proba = folder / "no_replicates.yaml", folder / "decisions.parquet", folder / "proba.parquet"
    p = load_protocol(protocol).protocol
    table = folder / "table_for_sensitivity.parquet"
    regime_stage(protocol, decisions, proba, table, folder / "r_s.json")
    evaluate_stage(protocol, decisions, proba, table, folder / "values_s.json")
    bootstrap_stage(protocol, folder / "values_s.json", [], folder / "intervals_s.json")
    sensitivity_curves_stage(protocol, decisions, proba, table, folder / "curves.json")
    sensitivity_stage(protocol, folder / "curves.json", folder / "intervals_s.json", [], folder / "sens.json")

    frame, probabilities = read_parquet(decisions), read_parquet(proba)[[f"p_{a}" for a in p.action_labels]]
    evaluated = read_parquet(table, ["evaluated"])["evaluated"].map(p.action_labels.index).to_numpy()
    target = analysis.sensitivity_target(p)
    point = analysis.regime_curve(
        frame, probabilities.to_numpy(), analysis.bounded_actions(frame, p, evaluated), p, adoption=target["adoption"]
    )
    intervals = read_json(folder / "intervals_s.json")
    direct = analysis.summarise_sensitivity(point, [], p, headline_contrast(intervals, p, target["name"]), target)
    direct["comparators"] = analysis.comparator_sensitivity(
        analysis.comparator_curves(frame, probabilities.to_numpy(), p), [], p, intervals
    )
    assert (folder / "sens.json").read_text(encoding="utf-8") == dumps_json(direct)
    assert direct["comparators"]  # the demo protocol bounds its comparators too


def test_the_combine_job_writes_what_the_three_joins_write(cohort):
    # the workflow's combine rule runs the evaluate join, the bootstrap's intervals and the sensitivity summary in one
    # job, reading the shard files once for both: the three files must be those the three stage functions write one
    # by one (two shards of one replicate each, so that both uses of the shards are exercised)
    folder, _ = cohort
    raw = yaml.safe_load((folder / "protocol.yaml").read_text(encoding="utf-8"))
    raw["evaluation"].update(replicates=2, shards=2)
    protocol = folder / "combine.yaml"
    protocol.write_text(yaml.safe_dump(raw, sort_keys=False), encoding="utf-8")
    decisions, proba = folder / "decisions.parquet", folder / "proba.parquet"
    if not (folder / "jobs_values.json").is_file():
        _evaluate_in_jobs(folder, folder / "protocol.yaml", "jobs")
    parts = [folder / f"jobs_{name}.json" for name in ("learned", "fixed", "side")]
    curves = folder / "combine_curves.json"
    sensitivity_curves_stage(protocol, decisions, proba, folder / "jobs_table.parquet", curves)
    shards = [folder / f"combine_shard_{k}.json" for k in range(2)]
    for k, shard in enumerate(shards):
        bootstrap_shard_stage(protocol, decisions, k, shard, table=folder / "jobs_table.parquet")
    one_by_one = [folder / f"alone_{name}.json" for name in ("values", "intervals", "sensitivity")]
    evaluate_join_stage(protocol, decisions, *parts, one_by_one[0])
    bootstrap_stage(protocol, one_by_one[0], shards, one_by_one[1])
    sensitivity_stage(protocol, curves, one_by_one[1], shards, one_by_one[2])
    combined = [folder / f"combined_{name}.json" for name in ("values", "intervals", "sensitivity")]
    combine_stage(protocol, decisions, *parts, curves, shards, *combined)
    for alone, joined in zip(one_by_one, combined):
        assert joined.read_bytes() == alone.read_bytes(), joined.name
    intervals, sensitivity = read_json(combined[1]), read_json(combined[2])
    assert intervals["replicates"] == 2 and intervals["contrasts"]
    assert sensitivity["replicates_used"] == 2 and sensitivity["table"] and sensitivity["comparators"]
