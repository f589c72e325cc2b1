"""Performance measures of a simulation study (Morris, White & Crowther 2019, Stat Med 38:2074, Table 6), checked
against hand computations written out in plain arithmetic, the standard library's ``statistics`` and a seeded
simulation drawn with scipy.
"""

from __future__ import annotations

import doctest
import math
import statistics

import numpy as np
import pytest
from scipy import stats

from regimewise.errors import UserInputError
from regimewise.selfcheck import performance as performance_module
from regimewise.selfcheck.performance import MEASURES, coverage_mcse, performance

# A small fixed study of 5 cohorts with one truth, θ = 1.5.
ESTIMATES = [1.0, 3.0, 2.0, 4.0, 0.0]
TRUTH = 1.5
SES = [1.0, 2.0, 1.0, 2.0, 2.0]
LOWER = [0.0, 1.0, 1.6, 3.0, -1.0]
UPPER = [2.0, 5.0, 3.0, 5.0, 1.0]


def test_accuracy_measures_by_hand():
    result = performance(ESTIMATES, TRUTH)
    # mean θ̂ = (1 + 3 + 2 + 4 + 0)/5 = 2; deviations -1, 1, 0, 2, -2; their squares sum to 1+1+0+4+4 = 10.
    # Morris et al. 2019 Table 6: bias = mean θ̂ − θ = 2 − 1.5 = 0.5; MCSE = sqrt(10/(5·4)) = sqrt(0.5).
    assert result["bias"] == pytest.approx(0.5)
    assert result["bias_mcse"] == pytest.approx(math.sqrt(0.5))
    # Table 6: EmpSE = sqrt(10/4) = sqrt(2.5); MCSE = EmpSE/sqrt(2·4) = sqrt(2.5/8).
    assert result["empirical_se"] == pytest.approx(math.sqrt(2.5))
    assert result["empirical_se_mcse"] == pytest.approx(math.sqrt(2.5 / 8))
    # Errors θ̂ − θ: -0.5, 1.5, 0.5, 2.5, -1.5; squared 0.25, 2.25, 0.25, 6.25, 2.25 (sum 11.25): MSE = 2.25.
    # Table 6: MCSE of MSE from (squared − MSE) = -2, 0, -2, 4, 0, whose squares sum to 24: sqrt(24/(5·4)).
    assert result["mse"] == pytest.approx(2.25)
    assert result["rmse"] == pytest.approx(1.5)
    assert result["mse_mcse"] == pytest.approx(math.sqrt(24 / 20))
    assert (result["n_used"], result["n_missing"]) == (5, 0)


def test_model_se_measures_by_hand():
    result = performance(ESTIMATES, TRUTH, standard_errors=SES)
    # SE² = 1, 4, 1, 4, 4, mean 14/5 = 2.8: ModSE = sqrt(2.8) (Morris et al. 2019 Table 6).
    assert result["model_se"] == pytest.approx(math.sqrt(2.8))
    # Var(SE²): deviations -1.8, 1.2, -1.8, 1.2, 1.2; squares 3.24 + 1.44 + 3.24 + 1.44 + 1.44 = 10.8; /4 = 2.7.
    # Table 6: MCSE of ModSE = sqrt(Var(SE²)/(4 R ModSE²)) = sqrt(2.7/(4·5·2.8)).
    assert result["model_se_mcse"] == pytest.approx(math.sqrt(2.7 / 56))
    # Table 6: relative error 100(ModSE/EmpSE − 1) with EmpSE = sqrt(2.5): 100(sqrt(2.8/2.5) − 1) = 5.83 %;
    # MCSE = 100 (ModSE/EmpSE) sqrt(Var(SE²)/(4 R ModSE⁴) + 1/(2(R − 1))) = 100 sqrt(1.12) sqrt(2.7/156.8 + 1/8).
    assert result["relative_error_model_se"] == pytest.approx(100 * (math.sqrt(1.12) - 1))
    assert result["relative_error_model_se"] == pytest.approx(5.8301, abs=1e-4)
    assert result["relative_error_model_se_mcse"] == pytest.approx(
        100 * math.sqrt(1.12) * math.sqrt(2.7 / 156.8 + 0.125)
    )
    assert result["relative_error_model_se_mcse"] == pytest.approx(39.911, abs=1e-3)


def test_interval_measures_by_hand():
    result = performance(ESTIMATES, TRUTH, lower=LOWER, upper=UPPER)
    # θ = 1.5 lies in [0, 2] and [1, 5], not in [1.6, 3], [3, 5] or [-1, 1]: coverage 2/5 (Morris et al. 2019
    # Table 6), MCSE sqrt(0.4·0.6/5).
    assert result["coverage"] == pytest.approx(0.4)
    assert result["coverage_mcse"] == pytest.approx(math.sqrt(0.4 * 0.6 / 5))
    # 0 lies outside [1, 5], [1.6, 3] and [3, 5]: power 3/5, MCSE sqrt(0.6·0.4/5) (Table 6, rejection %).
    assert result["power"] == pytest.approx(0.6)
    assert result["power_mcse"] == pytest.approx(math.sqrt(0.6 * 0.4 / 5))
    # Widths 2, 4, 1.4, 2, 2: mean 11.4/5.
    assert result["mean_width"] == pytest.approx(2.28)


def test_bias_and_empirical_se_agree_with_statistics():
    estimates = [0.31, -0.12, 0.55, 0.08, 0.97, 0.42, -0.35]
    result = performance(estimates, 0.2)
    # Morris et al. 2019 Table 6: bias = mean θ̂ − θ; EmpSE = the sample SD of the estimates (divisor R − 1);
    # MCSE of bias = EmpSE/sqrt(R).
    assert result["bias"] == pytest.approx(statistics.mean(estimates) - 0.2)
    assert result["empirical_se"] == pytest.approx(statistics.stdev(estimates))
    assert result["bias_mcse"] == pytest.approx(statistics.stdev(estimates) / math.sqrt(7))
    assert result["empirical_se_mcse"] == pytest.approx(statistics.stdev(estimates) / math.sqrt(12))


def test_measures_not_asked_for_are_none_and_every_key_is_there():
    result = performance(ESTIMATES, TRUTH)
    assert set(result) == set(MEASURES)
    assert all(result[key] is None for key in MEASURES if key.startswith(("model", "relative", "coverage", "power")))
    assert result["mean_width"] is None


def test_ratios_over_a_zero_se_are_none():
    result = performance([2.0, 2.0, 2.0], 1.0, standard_errors=[0.0, 0.0, 0.0])
    assert result["empirical_se"] == 0.0 and result["bias"] == pytest.approx(1.0)
    assert result["model_se"] == 0.0
    assert result["model_se_mcse"] is None
    assert result["relative_error_model_se"] is None and result["relative_error_model_se_mcse"] is None


def test_a_truth_per_cohort():
    # A data-adaptive target: the truth moves with the cohort and the estimates follow it.
    truths = [0.0, 10.0, 20.0, 30.0]
    estimates = [0.5, 10.0, 20.5, 30.0]
    result = performance(estimates, truths, lower=[-1.0, 10.2, 19.0, 29.0], upper=[1.0, 11.0, 21.0, 31.0])
    errors = [0.5, 0.0, 0.5, 0.0]
    assert result["bias"] == pytest.approx(statistics.mean(errors))
    # The MCSE of a mean of errors is the SD of the errors over sqrt(R), not the (large) SD of the estimates.
    assert result["bias_mcse"] == pytest.approx(statistics.stdev(errors) / 2)
    assert result["empirical_se"] == pytest.approx(statistics.stdev(estimates))
    assert result["mse"] == pytest.approx((0.25 + 0 + 0.25 + 0) / 4)
    # Each interval against its own cohort's truth: the second, [10.2, 11], misses 10.
    assert result["coverage"] == pytest.approx(0.75)


def test_one_truth_as_a_scalar_or_repeated_gives_the_same_measures():
    scalar = performance(ESTIMATES, TRUTH, SES, LOWER, UPPER)
    repeated = performance(np.array(ESTIMATES), [TRUTH] * 5, SES, LOWER, UPPER)
    assert scalar == pytest.approx(repeated)


def test_missing_estimates_are_dropped_from_every_measure_and_counted():
    # The hand example with a missing cohort (None) and a failed one (NaN) between its cohorts; their SEs and limits
    # may be missing too.
    estimates = [1.0, None, 3.0, 2.0, float("nan"), 4.0, 0.0]
    ses = [1.0, None, 2.0, 1.0, float("nan"), 2.0, 2.0]
    lower = [0.0, None, 1.0, 1.6, -9.0, 3.0, -1.0]
    upper = [2.0, None, 5.0, 3.0, 9.0, 5.0, 1.0]
    result = performance(estimates, TRUTH, ses, lower, upper)
    assert (result["n_used"], result["n_missing"]) == (5, 2)
    # The values worked out by hand above for the five cohorts with an estimate.
    assert result["bias"] == pytest.approx(0.5)
    assert result["bias_mcse"] == pytest.approx(math.sqrt(0.5))
    assert result["mse_mcse"] == pytest.approx(math.sqrt(24 / 20))
    assert result["model_se"] == pytest.approx(math.sqrt(2.8))
    assert result["coverage"] == pytest.approx(0.4)
    assert result["coverage_mcse"] == pytest.approx(math.sqrt(0.4 * 0.6 / 5))
    assert result["power"] == pytest.approx(0.6)


def test_coverage_mcse_by_hand_and_its_doctest():
    assert coverage_mcse(0.95, 50) == pytest.approx(math.sqrt(0.95 * 0.05 / 50))
    assert coverage_mcse(1.0, 10) == 0.0
    # Morris et al. 2019 section 5.2: near 95 %, about 1 point at R ≈ 500.
    assert round(coverage_mcse(0.95, 500), 4) == 0.0097
    failures, tried = doctest.testmod(performance_module)
    assert tried >= 2 and failures == 0


@pytest.mark.parametrize(
    ("arguments", "match"),
    [
        (dict(estimates=[1.0, 2.0, 3.0], truths=[1.0, 2.0]), r"truths has 2 entries but estimates has 3"),
        (dict(estimates=[1.0, 2.0], truths=0.0, standard_errors=[1.0]), r"standard_errors has 1 entries"),
        (dict(estimates=[1.0, 2.0], truths=0.0, lower=[0.0, 3.0], upper=[2.0, 2.5]), r"lower > upper in cohort 1"),
        (dict(estimates=[1.0, 2.0], truths=0.0, lower=[0.0, 1.0]), r"both lower and upper"),
        (dict(estimates=[1.0, None, float("nan")], truths=0.0), r"at least 2 cohorts with an estimate, got 1 of 3"),
        (dict(estimates=[], truths=0.0), r"at least 2 cohorts with an estimate, got 0 of 0"),
        (dict(estimates=[1.0, 2.0], truths=float("nan")), r"truth must be a finite number"),
        (dict(estimates=[1.0, 2.0], truths=math.inf), r"truth must be a finite number"),
        (dict(estimates=[1.0, 2.0, 3.0], truths=[0.0, math.inf, 0.0]), r"truths is missing or not finite in cohort 1"),
        (dict(estimates=[1.0, math.inf, 3.0], truths=0.0), r"estimates is infinite in cohort 1"),
        (dict(estimates=[1.0, 2.0], truths=0.0, standard_errors=[1.0, None]), r"standard_errors is missing"),
        (dict(estimates=[1.0, 2.0], truths=0.0, standard_errors=[1.0, -1.0]), r"standard_errors is negative"),
        (dict(estimates=[[1.0, 2.0]], truths=0.0), r"estimates must be one-dimensional"),
        (dict(estimates=["a", "b"], truths=0.0), r"estimates must be numbers"),
    ],
)
def test_refusals(arguments, match):
    with pytest.raises(UserInputError, match=match):
        performance(**arguments)


def test_a_lower_limit_above_the_upper_in_a_dropped_cohort_is_ignored():
    result = performance([1.0, None, 2.0], 0.0, lower=[0.0, 5.0, 1.0], upper=[2.0, 4.0, 3.0])
    assert result["n_used"] == 2 and result["coverage"] == 0.5


def test_coverage_of_exact_normal_intervals_is_95_percent():
    # 4000 cohorts whose estimates are N(θ, SD) with the SD known: the intervals θ̂ ± z_0.975·SD cover θ with
    # probability 0.95 exactly, so coverage lies within 3 MCSE of 0.95 (Morris et al. 2019 Table 6), as do the
    # bias (of 0) and the empirical SE (of SD).
    r, theta, sd = 4000, 2.0, 0.7
    estimates = stats.norm.rvs(loc=theta, scale=sd, size=r, random_state=np.random.default_rng(20190401))
    z = stats.norm.ppf(0.975)
    assert z == pytest.approx(1.96, abs=1e-3)
    result = performance(estimates, theta, np.full(r, sd), estimates - z * sd, estimates + z * sd)
    assert abs(result["coverage"] - 0.95) < 3 * result["coverage_mcse"]
    covered = sum(lo <= theta <= hi for lo, hi in zip(estimates - z * sd, estimates + z * sd))
    assert result["coverage"] == covered / r
    assert result["coverage_mcse"] == pytest.approx(math.sqrt(covered / r * (1 - covered / r) / r))
    assert abs(result["bias"]) < 3 * result["bias_mcse"]
    assert abs(result["empirical_se"] - sd) < 3 * result["empirical_se_mcse"]
    assert abs(result["relative_error_model_se"]) < 3 * result["relative_error_model_se_mcse"]
    # An interval excludes 0 when |θ̂| > z·SD, with probability P(θ̂ > z·SD) + P(θ̂ < −z·SD) under the normal law.
    expected_power = stats.norm.sf(z * sd, loc=theta, scale=sd) + stats.norm.cdf(-z * sd, loc=theta, scale=sd)
    assert abs(result["power"] - expected_power) < 3 * math.sqrt(expected_power * (1 - expected_power) / r)
