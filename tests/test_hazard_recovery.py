"""Statistical recovery tests of the hazard fit on books whose true hazard is known.

Each check names its independent reference beside it:

* the simulator's truth record (``true_parameters.json`` / :func:`book_truth`): the
  coefficients of the multinomial-logit hazard that generated the book;
* large-sample maximum-likelihood theory: estimates within a few standard errors
  of the truth, a Wald statistic distributed chi-square, standard errors that
  shrink like ``1 / sqrt(n)``;
* the published PSA prepayment standard, written out in :func:`_standard_smm`.

Thresholds are set so that a correct fit fails with probability below about 1e-3
per test, while a coefficient a few standard errors off on the largest book, or
a prepayment curve at 100% instead of 150% PSA, fails (see the negative checks).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from creditsurv.config import Config, config_from_dict
from creditsurv.demo import psa_hazard, simulate_small_book, write_demo_book
from creditsurv.engines import label_events, open_panel
from creditsurv.model import feature_spec, fit_hazard, fit_model

CAUSES = ("default", "prepay")

# Tail probability of each chi-square check under a correct fit.
CHI2_LEVEL = 1e-4
# Largest |estimate - true| / SE accepted for one coefficient; P(|N(0,1)| > 4) = 6e-5.
Z_LIMIT = 4.0


# --------------------------------------------------------------------------- books and fits


def _book_config(folder: Path, model: dict, *, macro: bool = True) -> Config:
    """A config dict over a simulated book, with the column mapping of configs/demo.yaml."""
    inputs = {
        "panel": {
            "path": str(folder / "panel.parquet"),
            "columns": {
                "loan_id": "loan_id",
                "month": "month",
                "age": "age",
                "balance": "balance",
                "days_past_due": "days_past_due",
                "status": "status",
            },
        },
        "loans": {
            "path": str(folder / "loans.parquet"),
            "rate_unit": "percent",
            "columns": {
                "loan_id": "loan_id",
                "origination_month": "origination_month",
                "original_balance": "original_balance",
                "note_rate": "note_rate",
                "term": "term_months",
                "property_value": "property_value",
            },
        },
    }
    if macro:
        inputs["macro"] = {"path": str(folder / "macro_history.csv"), "columns": {"month": "month"}}
    data = {
        "name": "hazard-recovery",
        "as_of": "2024-12",
        "inputs": inputs,
        "default_definition": {"days_past_due": 90, "status_codes": ["charged_off"]},
        "windows": {"development": {"start": "2016-01", "end": "2024-12"}},
        "collateral": {"region_column": "region", "hpi_series": "hpi_{region}", "market_rate_series": "mortgage_rate"},
        "model": model,
    }
    return config_from_dict(data, base_dir=folder)


# The true model's design (simulate.LogitHazard): raw covariate units, no standardising,
# log(age) and age as two numeric terms on the loan age, unemployment at lag 0.
TRUE_DESIGN = {
    "kind": "multinomial",
    "baseline": {"kind": "none"},
    "covariates": [
        {"name": "log_age", "column": "age", "transform": "log"},
        {"name": "age", "column": "age"},
        {"name": "credit_score", "column": "credit_score"},
        {"name": "current_ltv", "column": "current_ltv"},
        {"name": "dti", "column": "dti"},
        {"name": "rate_incentive", "column": "rate_incentive"},
        {"name": "unemployment_rate", "macro": "unemployment_rate", "lag": 1},
    ],
}

# The simulator turns prepayment off in the month a loan reaches its term (truth record:
# mechanics.prepay_at_maturity = false), so that month does not follow the logit; the
# events stage counts it as a loan-month without event. Leave it out of every fit.
NOT_AT_TERM = "(loan_id, age) NOT IN (SELECT loan_id, term FROM loans)"


def _fit_true_design(folder: Path, min_age: int):
    """Fit the true model's design on ages >= ``min_age``; return (results, early defaults)."""
    cfg = _book_config(folder, TRUE_DESIGN)
    with open_panel(cfg) as panel:
        label_events(panel)
        early_defaults = panel.con.execute(
            "SELECT count(*) FROM loan_months WHERE outcome = 1 AND age < ?", [min_age]
        ).fetchall()[0][0]
        results = fit_model(panel, cfg.model, cfg.collateral, where_sql=f"age >= ? AND {NOT_AT_TERM}", params=(min_age,))
    return results, int(early_defaults)


def _stacked(frame: pd.DataFrame, terms) -> np.ndarray:
    """Cause-major vector (all default terms first), the order of ``HazardResults.cov``."""
    return np.concatenate([frame.loc[list(terms), c].to_numpy(dtype=float) for c in CAUSES])


def _true_vector(coefficients: dict, terms) -> np.ndarray:
    return np.array([coefficients[c][t] for c in CAUSES for t in terms], dtype=float)


def _comparison(results, coefficients: dict) -> pd.DataFrame:
    terms = list(results.params.index)
    est, se, true = _stacked(results.params, terms), _stacked(results.bse, terms), _true_vector(coefficients, terms)
    return pd.DataFrame(
        {"estimate": est, "std_error": se, "true": true, "z": (est - true) / se},
        index=pd.MultiIndex.from_product([CAUSES, terms], names=["cause", "term"]),
    )


def _wald(results, coefficients: dict) -> float:
    """(b - beta)' cov^-1 (b - beta): chi-square with K*p degrees of freedom at the truth."""
    terms = list(results.params.index)
    err = _stacked(results.params, terms) - _true_vector(coefficients, terms)
    return float(err @ np.linalg.solve(results.cov, err))


@pytest.fixture(scope="module")
def truth(competing_demo_book):
    return json.loads((competing_demo_book / "true_parameters.json").read_text())


@pytest.fixture(scope="module")
def demo_fit(truth, competing_demo_book):
    """The true design fitted on the demo-sized 20,000-loan book of the competing-risk hazard."""
    return _fit_true_design(competing_demo_book, truth["mechanics"]["default_min_age"])


# --------------------------------------------------------------------------- 1. recovery on the demo book


def test_design_is_the_true_models_terms(demo_fit, truth):
    # Reference: the truth record's list of terms, in order.
    results, _ = demo_fit
    assert list(results.params.index) == truth["hazard"]["terms"]
    assert results.causes == tuple(truth["hazard"]["causes"])
    assert results.kind == "multinomial" and results.converged


def test_no_defaults_before_the_minimum_default_age(demo_fit):
    # Reference: truth record, mechanics.default_min_age. Dropping younger ages loses no default.
    _, early_defaults = demo_fit
    assert early_defaults == 0


def test_every_true_coefficient_lies_within_four_standard_errors(demo_fit, truth):
    # Reference: truth record, hazard.coefficients; asymptotic normality of the MLE.
    results, _ = demo_fit
    table = _comparison(results, truth["hazard"]["coefficients"])
    assert (table["z"].abs() < Z_LIMIT).all(), table.round(4).to_string()


def test_joint_wald_statistic_is_consistent_with_chi_square(demo_fit, truth):
    # Reference: truth record; the Wald statistic at the true parameters is chi-square(16).
    results, _ = demo_fit
    wald = _wald(results, truth["hazard"]["coefficients"])
    dof = results.cov.shape[0]
    assert dof == 16
    assert wald < stats.chi2.isf(CHI2_LEVEL, dof), wald


# --------------------------------------------------------------------------- 2. convergence as the book grows

# Book sizes and seeds. The 20,000-loan point is the demo-sized competing-risk book (seed 20261202);
# the others are written to a temporary folder. Seeds differ, so the books are independent.
GROWING_BOOKS = {5_000: 41, 60_000: 43}


@pytest.fixture(scope="module")
def growing_fits(tmp_path_factory, demo_fit, truth):
    """Fits of the true design on books of 5,000, 20,000 and 60,000 loans, by size."""
    min_age = truth["mechanics"]["default_min_age"]
    fits = {truth["book"]["n_loans"]: demo_fit[0]}
    for n_loans, seed in GROWING_BOOKS.items():
        folder = tmp_path_factory.mktemp(f"book_{n_loans}")
        written = write_demo_book(folder, n_loans, seed)
        own_truth = json.loads((folder / "true_parameters.json").read_text())
        assert written["loans"] == n_loans and own_truth["hazard"] == truth["hazard"]
        fits[n_loans] = _fit_true_design(folder, min_age)[0]
    return dict(sorted(fits.items()))


def _convergence_problems(fits: dict, coefficients: dict) -> list[str]:
    """Everything that contradicts consistent estimation of ``coefficients``, as text lines.

    Per book: each |estimate - true| / SE below Z_LIMIT and the Wald statistic below its
    chi-square critical value. Across books: the squared error measured in one fixed
    metric (the largest book's covariance scaled to one loan) falls from the smallest
    to the largest book by at least a sixth of the factor 1/n predicts. A wrong true value
    leaves a bias that does not shrink, so it shows on the largest book.
    """
    problems = []
    sizes = sorted(fits)
    largest = fits[sizes[-1]]
    terms = list(largest.params.index)
    dof = largest.cov.shape[0]
    critical = stats.chi2.isf(CHI2_LEVEL, dof)
    per_loan_cov = largest.cov * sizes[-1]
    squared_error = {}
    for n in sizes:
        table = _comparison(fits[n], coefficients)
        worst = table["z"].abs().idxmax()
        if abs(table.loc[worst, "z"]) >= Z_LIMIT:
            problems.append(f"{n} loans: {worst} is {table.loc[worst, 'z']:+.2f} standard errors from the truth")
        wald = _wald(fits[n], coefficients)
        if wald >= critical:
            problems.append(f"{n} loans: Wald statistic {wald:.1f} >= {critical:.1f} (chi-square {dof})")
        err = _stacked(fits[n].params, terms) - _true_vector(coefficients, terms)
        squared_error[n] = float(err @ np.linalg.solve(per_loan_cov, err))  # n * this ~ chi-square(dof)
    expected_fall = sizes[-1] / sizes[0]
    if squared_error[sizes[-1]] >= squared_error[sizes[0]] / (expected_fall / 6):
        # With 16 parameters P(F(16, 16) < 1/6) = 4e-4: a correct fit rarely falls this short.
        problems.append(
            f"squared error in a fixed metric fell only from {squared_error[sizes[0]]:.3g} to "
            f"{squared_error[sizes[-1]]:.3g} ({sizes[0]} -> {sizes[-1]} loans; 1/n predicts a factor {expected_fall:.0f})"
        )
    return problems


def test_standard_errors_shrink_like_one_over_root_n(growing_fits):
    # Reference: loans are drawn independently, so the information grows like n and SE * sqrt(n) stays put.
    sizes = sorted(growing_fits)
    terms = list(growing_fits[sizes[-1]].params.index)
    scaled = pd.DataFrame({n: _stacked(growing_fits[n].bse, terms) * np.sqrt(n) for n in sizes})
    ratio = scaled.div(scaled[sizes[-1]], axis=0)
    # Seen within 0.85..1.30 over eight seed pairs: a 5,000-loan book has only about 130
    # defaults, so its default SEs vary with the realised count. Without the 1/sqrt(n)
    # shrinkage the ratio would be sqrt(12) = 3.5 at 5,000 loans.
    assert ((ratio > 1 / 1.5) & (ratio < 1.5)).all().all(), ratio.round(3).to_string()
    se_ratio = _stacked(growing_fits[sizes[0]].bse, terms) / _stacked(growing_fits[sizes[-1]].bse, terms)
    exponent = np.log(se_ratio) / np.log(sizes[-1] / sizes[0])
    assert 0.45 < np.median(exponent) < 0.55, exponent


def test_estimates_converge_to_the_truth(growing_fits, truth):
    # Reference: the truth record, the same for every book (checked in growing_fits).
    problems = _convergence_problems(growing_fits, truth["hazard"]["coefficients"])
    assert problems == [], "\n".join(problems)


def test_standard_errors_are_calibrated_across_books(growing_fits, truth):
    # Reference: the three books are independent, so their Wald statistics at the truth sum
    # to a chi-square with 3 * 16 degrees of freedom. Two-sided: standard errors that are
    # too large (a small sum) fail as well as ones that are too small.
    walds = [_wald(fit, truth["hazard"]["coefficients"]) for fit in growing_fits.values()]
    dof = sum(fit.cov.shape[0] for fit in growing_fits.values())
    assert stats.chi2.ppf(CHI2_LEVEL, dof) < sum(walds) < stats.chi2.isf(CHI2_LEVEL, dof), walds


@pytest.mark.parametrize(
    ("cause", "term", "wrong"),
    [
        ("prepay", "rate_incentive", 0.55),  # truth 0.5: about 2 SE at 5,000 loans, 8 at 60,000
        # truth -0.012: 1.5 SE at 5,000 loans, 5 at 60,000; the Wald statistic flags it on every
        # book, since with a fixed intercept a score shift moves every loan's hazard.
        ("default", "credit_score", -0.009),
    ],
)
def test_convergence_check_rejects_a_wrong_true_value(growing_fits, truth, cause, term, wrong):
    # Negative control: the same check with one deliberately wrong "true" value must fail,
    # and on the largest book, where the bias is many standard errors.
    coefficients = {c: dict(v) for c, v in truth["hazard"]["coefficients"].items()}
    coefficients[cause][term] = wrong
    problems = _convergence_problems(growing_fits, coefficients)
    largest = max(growing_fits)
    assert any(p.startswith(f"{largest} loans") for p in problems), problems


# --------------------------------------------------------------------------- 3. PSA prepayment benchmark

PSA_MULTIPLE = 1.5  # the book prepays at 150% PSA
PSA_LOANS, PSA_SEED = 20_000, 15
MAX_AGE = 60  # ages 60 and above share one indicator: the standard is flat after age 30


def _standard_smm(age, multiple: float) -> np.ndarray:
    """The published PSA standard, written out.

    100% PSA: CPR 0.2% at age 1, rising by 0.2% a month to 6% at age 30, flat after;
    ``multiple`` scales the CPR (1.5 = 150% PSA). SMM = 1 - (1 - CPR)^(1/12).
    """
    age = np.asarray(age, dtype=float)
    cpr = multiple * np.where(age < 30, 0.002 * age, 0.06)
    return 1.0 - (1.0 - cpr) ** (1.0 / 12.0)


@pytest.fixture(scope="module")
def psa_fit(tmp_path_factory):
    """A prepayment-only book at 150% PSA, its single-cause age-indicator fit, and counts by age.

    Returns ``(results, table)``: ``table`` is indexed by age (ages >= MAX_AGE pooled)
    with ``at_risk`` and ``prepaid`` counted directly from the simulated frames.
    """
    book = simulate_small_book(PSA_LOANS, PSA_SEED, hazard=psa_hazard(PSA_MULTIPLE))
    assert book.truth["hazard"]["kind"] == "psa" and book.truth["hazard"]["multiple"] == PSA_MULTIPLE
    folder = tmp_path_factory.mktemp("psa_book")
    book.panel.to_parquet(folder / "panel.parquet", index=False)
    book.loans.to_parquet(folder / "loans.parquet", index=False)
    model = {"kind": "multinomial", "baseline": {"kind": "age_indicators", "max_age": MAX_AGE}}
    cfg = _book_config(folder, model, macro=False)
    with open_panel(cfg) as panel:
        label_events(panel)
        spec = feature_spec(cfg.model, cfg.collateral)
        results = fit_hazard(panel, spec, where_sql=NOT_AT_TERM, causes=("prepay",))

    # Counts straight from the simulated panel: every month before the term is at risk.
    rows = book.panel.merge(book.loans[["loan_id", "term_months"]], on="loan_id", validate="many_to_one")
    rows = rows[rows["age"] < rows["term_months"]]
    table = (
        pd.DataFrame({"age": np.minimum(rows["age"].to_numpy(), MAX_AGE), "prepaid": rows["status"].eq("paid_off").to_numpy()})
        .groupby("age")
        .agg(at_risk=("prepaid", "size"), prepaid=("prepaid", "sum"))
    )
    _, table["fitted_smm"] = results.predict_hazards({"age": table.index.to_numpy(dtype=float)})
    return results, table


def _psa_discrepancy(table: pd.DataFrame, multiple: float) -> pd.DataFrame:
    """Binomial z of the fitted SMM against the standard at ``multiple``, ages with enough exposure."""
    smm = _standard_smm(table.index, multiple)
    out = table.assign(standard_smm=smm, expected=table["at_risk"] * smm)
    out["z"] = (out["fitted_smm"] - smm) / np.sqrt(smm * (1 - smm) / out["at_risk"])
    # Enough exposure: at least 10 expected prepayments, where the normal approximation holds.
    return out[out["expected"] >= 10]


def _psa_problems(table: pd.DataFrame, multiple: float) -> list[str]:
    """Everything that contradicts prepayment at ``multiple`` times PSA, as text lines.

    Per age: |z| below Z_LIMIT. Over ages: the sum of z^2 below its chi-square critical
    value (one degree of freedom per age), and the total of prepayments within Z_LIMIT
    standard errors of the total the standard expects (the sum of z^2 has little power
    against a speed that is off by the same factor at every age; the total has much more).
    """
    cmp = _psa_discrepancy(table, multiple)
    problems = [f"age {age}: z = {z:+.2f}" for age, z in cmp["z"].items() if abs(z) >= Z_LIMIT]
    chi2, critical = float((cmp["z"] ** 2).sum()), stats.chi2.isf(CHI2_LEVEL, len(cmp))
    if chi2 >= critical:
        problems.append(f"sum of z^2 over {len(cmp)} ages is {chi2:.1f} >= {critical:.1f}")
    variance = (cmp["expected"] * (1 - cmp["standard_smm"])).sum()
    total_z = (cmp["prepaid"].sum() - cmp["expected"].sum()) / np.sqrt(variance)
    if abs(total_z) >= Z_LIMIT:
        problems.append(f"total prepayments {cmp['prepaid'].sum()} against {cmp['expected'].sum():.1f} expected: z = {total_z:+.2f}")
    return problems


def test_psa_fit_reproduces_the_observed_rates(psa_fit):
    # Reference: a saturated binary model's MLE is the observed proportion at each age,
    # counted here from the simulated frames, not from the events stage.
    results, table = psa_fit
    assert results.converged and results.causes == ("prepay",)
    assert results.events == {"prepay": int(table["prepaid"].sum())}
    assert results.n_rows == int(table["at_risk"].sum())
    np.testing.assert_allclose(table["fitted_smm"], table["prepaid"] / table["at_risk"], rtol=1e-8, atol=1e-12)


def test_fitted_smm_by_age_matches_150_psa(psa_fit):
    # Reference: the PSA standard (_standard_smm) at 150%; binomial SE sqrt(smm (1 - smm) / n_at_risk).
    _, table = psa_fit
    cmp = _psa_discrepancy(table, PSA_MULTIPLE)
    assert len(cmp) >= 50 and cmp.index.max() == MAX_AGE
    problems = _psa_problems(table, PSA_MULTIPLE)
    assert problems == [], "\n".join(problems) + "\n" + cmp.round(5).to_string()


def test_100_psa_is_rejected_by_the_sum_over_ages(psa_fit):
    # Negative control: the per-age chi-square alone rejects the 100% PSA curve, far past chance.
    _, table = psa_fit
    cmp = _psa_discrepancy(table, 1.0)
    chi2 = float((cmp["z"] ** 2).sum())
    assert chi2 > stats.chi2.isf(1e-6, len(cmp)), chi2


@pytest.mark.parametrize("multiple", [1.0, 1.3, 1.7])
def test_other_psa_speeds_are_rejected(psa_fit, multiple):
    # Negative control: the full comparison against 100%, 130% or 170% PSA must fail.
    _, table = psa_fit
    assert _psa_problems(table, multiple) != []
