"""Discrete-time competing-risk hazard models, fitted exactly and out of core.

Outcome ``Y`` of a loan-month is 0 (continue), 1 (default) or 2 (prepay).

``kind="multinomial"``
    One multinomial logit with ``continue`` as the reference and a separate
    coefficient vector per cause: ``h_k = exp(eta_k) / (1 + sum_j exp(eta_j))``
    (Allison 1982). Same likelihood as ``statsmodels.api.MNLogit``.
``kind="cause_specific"``
    One binary logit per cause: the cause against every other outcome of the
    month, the other cause's event month counted as a month without this
    cause. Each logit then estimates the cause's own monthly probability
    among the loans at risk, h_k = P(Y = k | at risk), the quantity the
    projection combines as S(u) = S(u-1) (1 - h_d - h_p). (Dropping the other
    cause's months instead would estimate h_k / (1 - h_other), the hazard
    with the other cause removed, which that combination overstates: with
    true monthly hazards of 1% and 3% it gives 1.031% for default. The
    binomial maximum-likelihood estimate of an event probability is the
    event share of all the trials; see the discrete-time competing-risk
    decomposition in Tutz & Schmid 2016, *Modeling Discrete Time-to-Event
    Data*, chapter 8, cited from memory.) Same likelihood as
    ``statsmodels.api.GLM(..., family=Binomial())`` on every row with the
    cause as the response. The two logits share no parameters, so the
    covariance is block diagonal.

With ``causes=("default",)`` (or ``("prepay",)``) only that cause is modelled:
rows of the other outcome are left out and both kinds reduce to one binary logit.

The fit is Newton-Raphson with step halving on the (penalised)
log-likelihood. A first pass streams the raw rows from the engine, evaluates the
design with :meth:`FeatureSpec.design` and keeps each row in its cell form
(:class:`CellDesign`: a cell code for the discrete values, the
numeric values as they are) in fixed blocks of ``block_rows`` rows; each Newton
pass sums the likelihood, score and information over the blocks by cell, in
parallel threads, and adds the blocks' sums in block order. Memory is bounded by
a few blocks, not by the number of loan-months, and the results are the same
bits for any batch size and number of threads. When every term is discrete (age
bands or indicators, bins, categoricals), the rows are first collapsed to
covariate-pattern counts with SQL ``GROUP BY`` (exact, fewer rows) and fitted
with frequency weights.

The ridge penalty ``ridge * ||beta||^2 / 2`` applies to every coefficient
except the intercepts; with a penalty the reported covariance is the inverse of
the penalised information.
"""

from __future__ import annotations

import json
import math
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import linalg, stats

from ..data import CAUSE_CODES
from ..errors import (
    ConvergenceError,
    FewEventsWarning,
    ModelError,
    SeparationError,
    SingularDesignError,
    problem_list,
)
from ..sql import quote_ident
from ._cells import FIT_BLOCK_ROWS
from ._features import FeatureSpec, SpecInputs

__all__ = [
    "CAUSES", "MULTI_STATE_FORMAT", "STABLE_EVENTS_PER_PARAMETER", "TRUST_LIMITS", "HazardResults", "check_saved_model", "fit_hazard",
    "fit_model", "fit_outcomes", "loosened_limits", "read_model_file", "results_from_dict",
]  # fmt: skip

CAUSES = CAUSE_CODES  # cause name -> outcome code of loan_months, defined once in data
_FORMAT = "creditsurv.hazard_model"
_FORMAT_VERSION = 1
STABLE_EVENTS_PER_PARAMETER = 10  # below: FewEventsWarning (common practice, Peduzzi et al. 1996, from memory)

TRUST_LIMITS = {"min_events_per_parameter": 5.0, "max_scaled_coefficient": 10.0, "max_scaled_std_error": 5.0}
"""The defaults of the limits a fitted model must keep to be used (``model.fit`` in the config).

Common practice, not a standard: fewer than 5 events per parameter of a cause gives biased, unstable
logit coefficients (Vittinghoff and McCulloch 2007, from memory); on the log-odds scale a coefficient
times its column's standard deviation above 10 (odds multiplied by e^10 for one standard deviation) or a
standard error times it above 5 means the fit ran off, not that the data say so.
"""


def _multinomial(eta: np.ndarray) -> np.ndarray:
    """Probabilities exp(eta_k) / (1 + sum_j exp(eta_j)) of each outcome against the reference, stable for large eta."""
    m = np.maximum(eta.max(axis=1), 0.0)
    e = np.exp(eta - m[:, None])
    return e / (np.exp(-m) + e.sum(axis=1))[:, None]


def outcome_probabilities(eta: np.ndarray, kind: str) -> np.ndarray:
    """Probabilities of the outcomes from linear predictors ``eta`` (K, ...), outcome on the first axis, in place.

    ``multinomial``: exp(eta_k) / (1 + sum_j exp(eta_j)) (as :func:`_multinomial`); ``cause_specific``:
    each outcome's own logistic 1 / (1 + exp(-eta_k)).
    """
    if kind != "multinomial":
        np.negative(eta, out=eta)
        np.exp(eta, out=eta)
        eta += 1.0
        return np.reciprocal(eta, out=eta)
    m = np.maximum(eta.max(axis=0), 0.0)
    np.subtract(eta, m, out=eta)
    np.exp(eta, out=eta)
    np.negative(m, out=m)
    den = np.exp(m, out=m)
    for k in range(eta.shape[0]):
        den += eta[k]
    eta /= den
    return eta


def check_saved_model(model, limits: dict, path) -> None:
    """Raise ``ModelError`` when a saved model (``model.path``) has fewer events per parameter than ``limits``.

    The model's coefficients were checked against the limits it was fitted under (recorded in its file,
    and flagged in the report when looser than the defaults); its events are checked against today's.
    """
    parts = getattr(model, "origins", {"": model})  # a multi-state model: each origin state's logit
    few = []
    for origin, part in parts.items():
        for c in part.causes:
            n_par = len(part.params.index) - len(part.fixed_terms.get(c, []))
            if part.events.get(c, 0) < limits["min_events_per_parameter"] * n_par:
                few.append(f"{origin + ' to ' if origin else ''}{c}: {part.events.get(c, 0):,} events for {n_par} parameters")
    if few:
        text = "; ".join(few)
        raise ModelError(
            f"model.path: {path}: too few events behind the saved model: {text}; at least "
            f"{limits['min_events_per_parameter']:g} per parameter are needed (model.fit.min_events_per_parameter)"
        )


def loosened_limits(limits: dict) -> dict:
    """The limits of ``limits`` set looser than :data:`TRUST_LIMITS`, as ``{name: value}``."""
    out = {}
    for name, default in TRUST_LIMITS.items():
        value = limits.get(name, default)
        looser = value < default if name.startswith("min_") else value > default
        if looser:
            out[name] = value
    return out


# --------------------------------------------------------------------------- results


@dataclass
class HazardResults(SpecInputs):
    """A fitted hazard model.

    Attributes
    ----------
    params, bse : DataFrame
        Coefficients and standard errors; index the design column names,
        one column per cause (``default``, ``prepay``).
    cov : ndarray, shape (K*p, K*p)
        Covariance of the coefficients, cause-major (all of ``default`` first),
        the inverse of the observed (penalised) information.
    loglik, aic, bic : float
        Unpenalised log-likelihood at the estimates; AIC and BIC with
        ``K*p`` parameters and ``n_rows`` observations.
    n_rows : int
        Loan-months the fit used. ``events`` counts them by cause.
    iterations, converged, iteration_log
        Newton iterations, and per iteration ``loglik``, ``max_step`` and
        the step fraction kept by the line search.
    kind, ridge, causes, spec
        What was fitted: model kind, penalty, causes and the learned
        :class:`FeatureSpec`.
    data_fingerprint : str
        SHA-256 of the stored training rows (cell codes, outcomes, weights and
        numeric values, each stream in read order) and of the cell table that
        maps them to the design: identical data and spec give the same
        fingerprint, whatever the batch size, block size or threads.
    """

    params: pd.DataFrame
    bse: pd.DataFrame
    cov: np.ndarray
    loglik: float
    aic: float
    bic: float
    n_rows: int
    events: dict
    iterations: int
    converged: bool
    kind: str
    ridge: float
    causes: tuple
    spec: FeatureSpec
    data_fingerprint: str
    iteration_log: list = field(default_factory=list)
    collapsed: bool = False
    n_stored_rows: int = 0
    trust_limits: dict = field(default_factory=lambda: dict(TRUST_LIMITS))
    fixed_terms: dict = field(default_factory=dict)

    def summary(self, alpha: float = 0.05) -> pd.DataFrame:
        """Tidy table: cause, term, estimate, std_error, z, p_value, ci_lo, ci_hi."""
        q = stats.norm.ppf(1 - alpha / 2)
        frames = []
        for cause in self.causes:
            used = ~self.params.index.isin(self.fixed_terms.get(cause, []))  # terms held at zero are not estimates
            est = self.params[cause].to_numpy()[used]
            se = self.bse[cause].to_numpy()[used]
            z = est / se
            frames.append(
                pd.DataFrame(
                    {
                        "cause": cause,
                        "term": self.params.index[used].to_list(),
                        "estimate": est,
                        "std_error": se,
                        "z": z,
                        "p_value": 2 * stats.norm.sf(np.abs(z)),
                        "ci_lo": est - q * se,
                        "ci_hi": est + q * se,
                    }
                )
            )
        return pd.concat(frames, ignore_index=True)

    def predict_hazards(self, raw) -> tuple[np.ndarray, np.ndarray]:
        """Hazards of default and prepayment for raw rows (see :meth:`FeatureSpec.design`).

        A cause that was not fitted gets hazard 0. For ``cause_specific`` each
        hazard is its own binary logit's probability.
        """
        eta = self._linear_predictors(raw)
        h = _multinomial(eta) if self.kind == "multinomial" else 1.0 / (1.0 + np.exp(-eta))
        out = {c: h[:, i] for i, c in enumerate(self.causes)}
        zero = np.zeros(eta.shape[0])
        return out.get("default", zero), out.get("prepay", zero)

    def probabilities(self, raw) -> np.ndarray:
        """Multinomial probabilities of every outcome in :attr:`causes` order for raw rows, shape (n, K).

        The reference outcome (continue, or stay in the origin state) has ``1 - row sum``.
        """
        if self.kind != "multinomial":
            raise ModelError(f"probabilities() needs a multinomial model, not {self.kind}")
        return _multinomial(self._linear_predictors(raw))

    def _linear_predictors(self, raw) -> np.ndarray:
        X, _ = self.spec.design(raw)
        return X @ self.params[list(self.causes)].to_numpy()

    def hazards(self, raw) -> tuple[np.ndarray, np.ndarray]:
        """Alias of :meth:`predict_hazards` (the projection's hazard-source protocol)."""
        return self.predict_hazards(raw)

    def grid_probabilities(self, grid) -> np.ndarray:
        """Probabilities of the :attr:`causes` for a block of loans x months ahead, shape (K, n, H).

        ``grid`` is an :class:`~creditsurv.model.InputGrid`; each term is evaluated at its own grain
        (:meth:`FeatureSpec.grid_predictors`). Equal to :meth:`predict_hazards` (and :meth:`probabilities`)
        on the cells up to rounding.
        """
        params = self.params
        beta = params.to_numpy() if list(params.columns) == list(self.causes) else params[list(self.causes)].to_numpy()
        return outcome_probabilities(self.spec.grid_predictors(beta, grid), self.kind)

    def grid_hazards(self, grid) -> tuple[np.ndarray, np.ndarray]:
        """Hazards of default and prepayment, each (n, H), for a block of loans x months ahead (the projection's fast
        route; see :meth:`grid_probabilities`)."""
        h = self.grid_probabilities(grid)
        out = {c: h[i] for i, c in enumerate(self.causes)}
        zero = np.zeros(h.shape[1:])
        return out.get("default", zero), out.get("prepay", zero)

    def to_dict(self) -> dict:
        """The model as JSON-safe plain data (the layout :meth:`save` writes)."""
        from ..version import __version__

        terms = self.params.index.to_list()
        order = [f"{c}:{t}" for c in self.causes for t in terms]
        return {
            "format": _FORMAT,
            "format_version": _FORMAT_VERSION,
            "creditsurv_version": __version__,
            "kind": self.kind,
            "causes": list(self.causes),
            "ridge": self.ridge,
            "terms": terms,
            "coefficients": {c: dict(zip(terms, map(float, self.params[c]))) for c in self.causes},
            "std_errors": {c: dict(zip(terms, map(float, self.bse[c]))) for c in self.causes},
            "covariance": {"order": order, "matrix": [[float(v) for v in row] for row in self.cov]},
            "fit": {
                "loglik": self.loglik,
                "aic": self.aic,
                "bic": self.bic,
                "n_rows": self.n_rows,
                "n_stored_rows": self.n_stored_rows,
                "collapsed": self.collapsed,
                "events": dict(self.events),
                "iterations": self.iterations,
                "converged": self.converged,
                "iteration_log": self.iteration_log,
                "data_fingerprint": self.data_fingerprint,
                "trust_limits": dict(self.trust_limits),
            },
            "features": self.spec.to_dict(),
            **({"fixed_terms": {c: list(t) for c, t in self.fixed_terms.items()}} if self.fixed_terms else {}),
        }

    def describe(self) -> str:
        """One line for the screen: which model, how many terms, on how many loan-months."""
        return f"{self.kind} model, {len(self.params.index)} terms per cause, {self.n_rows:,} loan-months"

    def record(self) -> dict:
        """The fit's headline numbers for a run's manifest."""
        return {
            "kind": self.kind,
            "causes": list(self.causes),
            "terms": len(self.params.index),
            "n_rows": self.n_rows,
            "events": self.events,
            "loglik": self.loglik,
            "aic": self.aic,
            "bic": self.bic,
            "iterations": self.iterations,
            "converged": self.converged,
            "data_fingerprint": self.data_fingerprint,
            **({"limits_loosened": loosened} if (loosened := loosened_limits(self.trust_limits)) else {}),
        }

    def save(self, path) -> Path:
        """Write the model as readable JSON (indent 2, sorted keys); return the path."""
        path = Path(path)
        text = json.dumps(self.to_dict(), indent=2, sort_keys=True, allow_nan=False)
        path.write_text(text + "\n", encoding="utf-8")
        return path


def read_model_file(path) -> dict:
    """The JSON of a saved model file as plain data; ``ModelError`` naming the file when it cannot be read."""
    path = Path(path)
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise ModelError(f"{path}: model file not found") from None
    except (OSError, ValueError) as exc:
        raise ModelError(f"{path}: not a readable model JSON ({exc})") from None
    return data


MULTI_STATE_FORMAT = "creditsurv.multi_state_model"
"""The ``format`` of a saved multi-state model (one multinomial logit per origin state)."""


def results_from_dict(data, path) -> HazardResults:
    """A :class:`HazardResults` from the plain data :meth:`HazardResults.to_dict` gives; ``path`` names it in errors."""
    if not isinstance(data, dict) or data.get("format") != _FORMAT:
        raise ModelError(f"{path}: not a creditsurv hazard model (format should be {_FORMAT!r})")
    if data.get("format_version") != _FORMAT_VERSION:
        raise ModelError(f"{path}: model format version {data.get('format_version')} is not {_FORMAT_VERSION}")
    try:
        terms = list(data["terms"])
        causes = tuple(data["causes"])
        params = pd.DataFrame({c: [data["coefficients"][c][t] for t in terms] for c in causes}, index=terms)
        bse = pd.DataFrame({c: [data["std_errors"][c][t] for t in terms] for c in causes}, index=terms)
        fit = data["fit"]
        spec = FeatureSpec.from_dict(data["features"])
        if spec.learned is None or list(spec.learned.get("columns", [])) != terms:
            raise ModelError(f"{path}: the feature spec's columns do not match the coefficient terms")
        return HazardResults(
            params=params,
            bse=bse,
            cov=np.asarray(data["covariance"]["matrix"], dtype=np.float64),
            loglik=fit["loglik"],
            aic=fit["aic"],
            bic=fit["bic"],
            n_rows=fit["n_rows"],
            events=dict(fit["events"]),
            iterations=fit["iterations"],
            converged=fit["converged"],
            kind=data["kind"],
            ridge=data["ridge"],
            causes=causes,
            spec=spec,
            data_fingerprint=fit["data_fingerprint"],
            iteration_log=list(fit["iteration_log"]),
            collapsed=fit.get("collapsed", False),
            n_stored_rows=fit.get("n_stored_rows", 0),
            trust_limits={**TRUST_LIMITS, **fit.get("trust_limits", {})},
            fixed_terms={c: list(t) for c, t in data.get("fixed_terms", {}).items()},
        )
    except (KeyError, TypeError, ValueError) as exc:
        raise ModelError(f"{path}: model JSON is missing or has a bad entry: {exc!r}") from None


# --------------------------------------------------------------------------- checks


def _singular_columns(xtx: np.ndarray, names: list[str]) -> list[list[str]]:
    d = np.diag(xtx).copy()
    zero = [names[j] for j in np.nonzero(d <= 0)[0]]
    if zero:
        return [[z] for z in zero]
    s = 1.0 / np.sqrt(d)
    C = xtx * s[:, None] * s[None, :]
    vals, vecs = np.linalg.eigh(C)
    small = np.nonzero(vals < 1e-10 * vals.max())[0]
    groups = []
    for j in small:
        v = vecs[:, j]
        idx = [i for i in np.argsort(-np.abs(v)) if abs(v[i]) > 0.05]
        groups.append([names[i] for i in idx])
    return groups


def _separation_problems(S, is01, names, groups, causes, codes, free=None) -> list[str]:
    """Indicator columns (and reference levels) with no events of a cause, or only events.

    ``free`` (K, p) marks the coefficients estimated; a column fixed at zero for a cause cannot separate it.
    """
    problems = []
    totals = S[0]  # the intercept column: rows by outcome code
    free = np.ones((len(causes), len(names)), dtype=bool) if free is None else free

    def check(label, counts, cols):
        n_rows = counts.sum()
        if n_rows <= 0:
            return
        for a, (cause, code) in enumerate(zip(causes, codes)):
            if not free[a, cols].any():
                continue
            e = counts[code]
            eligible = n_rows
            if e == 0:
                problems.append(
                    f"{label} has no {cause} events ({_n(n_rows)} loan-months); the {cause} coefficient would run to "
                    "minus infinity: merge the level with another, drop the term, or fit with ridge > 0"
                )
            elif e == eligible:
                problems.append(f"{label} has only {cause} events ({_n(e)} loan-months); merge the level, drop the term, or fit with ridge > 0")

    for j, name in enumerate(names):
        if j == 0 or not is01[j]:
            continue
        check(f"column {name!r}", S[j], [j])
    for term, ref, cols in groups:
        if cols:
            check(f"reference level {ref!r} of {term!r}", totals - S[cols].sum(axis=0), cols)
    return problems


def _n(x) -> str:
    return f"{int(round(x)):,}"


# --------------------------------------------------------------------------- the fit


def _is_discrete(spec: FeatureSpec) -> bool:
    if spec.baseline.get("kind", "age_bands") not in ("age_bands", "age_indicators", "none"):
        return False
    return all(c.get("kind", "numeric") in ("categorical", "bins") for c in spec.covariates)


def fit_hazard(
    engine,
    spec: FeatureSpec,
    *,
    where_sql: str = "TRUE",
    params=(),
    kind: str = "multinomial",
    causes=("default", "prepay"),
    ridge: float = 0.0,
    batch_size: int = 250_000,
    max_iter: int = 50,
    tol: float = 1e-8,
    collapse: bool | str = "auto",
    temp_dir=None,
    limits: dict | None = None,
    block_rows: int = FIT_BLOCK_ROWS,
) -> HazardResults:
    """Fit a discrete-time competing-risk hazard model on the risk set.

    Parameters
    ----------
    engine : creditsurv.engines.Engine
        Holds the ``loan_months``, ``panel``, ``loans`` and ``macro`` views;
        reads the raw rows and returns the likelihood sums
        (:meth:`~creditsurv.engines.Engine.design_sums`).
    spec : FeatureSpec
        The feature spec; learned from the same rows first if not learned yet.
    where_sql, params
        Row filter over the raw-input columns (e.g. ``"month_idx BETWEEN ? AND ?"``)
        and its bound values.
    kind : {"multinomial", "cause_specific"}
    causes : tuple of {"default", "prepay"}
        Causes to model; a single cause drops the rows of the other outcome.
    ridge : float, default 0
        Penalty ``ridge * ||beta||^2 / 2`` on the non-intercept coefficients.
    batch_size : int
        Rows per batch read from the engine (no effect on the results).
    max_iter : int
        Newton iterations at most.
    tol : float
        Converged when the largest absolute Newton step is below ``tol``.
    collapse : bool or "auto"
        Collapse to covariate-pattern counts (only possible when every term
        is discrete; "auto" does so when possible).
    temp_dir : path, optional
        Folder for the engine's temporary design data (default: the system temp folder).
    limits : dict, optional
        Limits a model must keep to be used, by the names of :data:`TRUST_LIMITS` (its defaults
        fill the names not given): fewer events per parameter of a cause, or a coefficient or
        standard error absurd for its column's scale, is a ``ModelError``.
    block_rows : int
        Rows per block of the fit's sums (:data:`FIT_BLOCK_ROWS`): the blocks are added in order,
        which fixes the rounding of the sums.

    Returns
    -------
    HazardResults

    Raises
    ------
    SeparationError, SingularDesignError, ConvergenceError, ModelError
    """
    causes, codes, dropped = check_fit_arguments(kind, causes, ridge, batch_size, max_iter, tol)
    if spec.learned is None:
        spec = spec.learn(engine.con, where_sql, params)
    return fit_outcomes(
        engine, spec, causes=causes, codes=codes, dropped=dropped, kind=kind, where_sql=where_sql, params=params,
        ridge=ridge, batch_size=batch_size, max_iter=max_iter, tol=tol, collapse=collapse, temp_dir=temp_dir,
        limits=limits, stacklevel=4, block_rows=block_rows,
    )


def fit_outcomes(
    engine, spec, *, causes, codes, dropped=(), kind="multinomial", where_sql="TRUE", params=(), ridge=0.0,
    batch_size=250_000, max_iter=50, tol=1e-8, collapse="auto", temp_dir=None, limits=None, origin_state=None, free=None,
    reference=0, stacklevel=3, block_rows=FIT_BLOCK_ROWS,
) -> HazardResults:
    """Fit a learned ``spec`` to the outcomes ``codes`` (named ``causes``) against code 0, the reference.

    The step :func:`fit_hazard` and the multi-state fit share. ``dropped`` are outcome codes whose rows
    are left out; ``origin_state`` fits the months that start in that arrears state, with their
    destination as the outcome (``reference``: the destination code taken as the reference instead of
    "stay"); ``free`` (K, p) bool holds the unmarked coefficients at zero.
    """
    codes = np.asarray(codes, dtype=np.int8)
    collapse = resolve_collapse(spec, collapse)
    sql = raw_design_sql(engine.con, spec, where_sql, collapse, origin_state=origin_state, reference=reference)
    sums = engine.design_sums(
        spec, sql, list(params), collapse=collapse, dropped=list(dropped), codes=codes, kind=kind,
        batch_size=batch_size, temp_dir=temp_dir, block_rows=block_rows,
    )
    try:
        return fit_from_sums(
            sums.evaluate, sums.first, spec, kind=kind, causes=tuple(causes), codes=codes, ridge=ridge,
            max_iter=max_iter, tol=tol, collapse=collapse, where_sql=where_sql, fingerprint=sums.fingerprint,
            limits=limits, free=free, stacklevel=stacklevel,
        )
    finally:
        sums.close()


# --------------------------------------------------------------------------- steps of a fit (shared by the engines)


def check_fit_arguments(kind, causes, ridge, batch_size, max_iter, tol):
    """Validate the fit settings; return the causes in canonical order, their codes and the dropped codes."""
    if kind not in ("multinomial", "cause_specific"):
        hint = "; the multi-state model is fitted by fit_multi_state" if kind == "multi_state" else ""
        raise ModelError(f"kind must be 'multinomial' or 'cause_specific', got {kind!r}{hint}")
    causes = tuple(causes)
    if not causes or any(c not in CAUSES for c in causes) or len(set(causes)) != len(causes):
        raise ModelError(f"causes must be a non-empty subset of {list(CAUSES)}, got {list(causes)}")
    causes = tuple(c for c in CAUSES if c in causes)
    codes = np.array([CAUSES[c] for c in causes], dtype=np.int8)
    dropped = [code for code in CAUSES.values() if code not in codes]
    if ridge < 0 or not math.isfinite(ridge):
        raise ModelError(f"ridge must be a finite number >= 0, got {ridge}")
    if batch_size < 1 or max_iter < 1 or not tol > 0:
        raise ModelError("batch_size and max_iter must be >= 1 and tol > 0")
    return causes, codes, dropped


def resolve_collapse(spec: FeatureSpec, collapse) -> bool:
    if collapse == "auto":
        return _is_discrete(spec)
    if collapse and not _is_discrete(spec):
        raise ModelError("collapse=True needs a fully discrete design (age bands or indicators, bins, categoricals)")
    return bool(collapse)


def raw_design_sql(
    con, spec: FeatureSpec, where_sql: str, collapse: bool, origin_state: int | None = None, reference: int = 0
) -> str:
    """The raw-input query of the fit; with ``collapse``, grouped to covariate-pattern counts."""
    sql = spec.raw_query(con, where_sql, order=not collapse, origin_state=origin_state, reference=reference)
    if collapse:
        keys = [i.key for i in spec.inputs() if i.key != "log_age"]
        group = ", ".join(quote_ident(k) for k in ["age", "outcome", *keys])
        sql = f"WITH data AS (\n{sql}\n)\nSELECT {group}, count(*) AS \"_cs_weight\"\nFROM data\nGROUP BY ALL\nORDER BY ALL"
    return sql


def fit_from_sums(
    evaluate, first, spec, *, kind, causes, codes, ridge, max_iter, tol, collapse, where_sql, fingerprint, limits=None,
    free=None, stacklevel=3,
):
    """Checks on the first-pass sums, the Newton iterations and the results object.

    ``first`` holds ``S``, ``xtx``, ``is01`` and ``n`` summed over all the data;
    ``evaluate`` is the engine's likelihood pass (see :func:`_newton`); ``limits`` as
    :func:`fit_hazard` takes them. ``free`` (K, p) bool marks the coefficients to estimate;
    the others are held at zero (a cause fitted on part of the design). Default: all.
    """
    limits = {**TRUST_LIMITS, **(limits or {})}
    names = spec.columns
    p, K = len(names), len(causes)
    free = np.ones((K, p), dtype=bool) if free is None else np.asarray(free, dtype=bool)
    if first.n == 0:
        raise ModelError(f"no loan-months to fit (filter: {where_sql})")
    S = first.S
    totals = S[0]
    n_rows = int(round(totals.sum()))
    events = {c: int(round(totals[code])) for c, code in zip(causes, codes)}

    groups = _singular_columns(first.xtx, names)
    if groups:
        text = "; ".join(
            f"column {g[0]!r} is zero in every row" if len(g) == 1 else "columns " + ", ".join(repr(x) for x in g) + " are collinear"
            for g in groups
        )
        raise SingularDesignError(
            f"the design is singular: {text}. Drop one of the collinear terms, merge levels or bands, or change the reference level"
        )
    missing = [c for c in causes if events[c] == 0]
    if missing:
        raise SeparationError(f"no {', '.join(missing)} events in the {n_rows:,} loan-months; remove the cause from causes or widen the data")
    if ridge == 0:
        problems = _separation_problems(S, first.is01, names, spec.indicator_groups(), causes, codes, free)
        if problems:
            raise SeparationError("quasi-complete separation: " + problem_list(problems, "the design"))
    n_par = {c: int(free[a].sum()) for a, c in enumerate(causes)}
    # An intercept alone is the outcome's observed rate: the events-per-parameter rule guards coefficients of terms.
    few = [c for c in causes if n_par[c] > 1 and events[c] < limits["min_events_per_parameter"] * n_par[c]]
    if few:
        text = "; ".join(
            f"{c}: {events[c]:,} events for {n_par[c]} parameters ({events[c] / n_par[c]:.1f} per parameter)" for c in few
        )
        raise ModelError(
            f"too few events to fit the model: {text}; at least {limits['min_events_per_parameter']:g} per parameter "
            "are needed (model.fit.min_events_per_parameter; common practice). Widen the development window, "
            "drop terms, or lower the limit explicitly"
        )
    for c in causes:
        if n_par[c] > 1 and events[c] < STABLE_EVENTS_PER_PARAMETER * n_par[c]:
            warnings.warn(
                FewEventsWarning(
                    f"{c}: {events[c]:,} events for {n_par[c]} parameters ({events[c] / n_par[c]:.1f} per parameter, "
                    f"fewer than {STABLE_EVENTS_PER_PARAMETER}); estimates may be unstable"
                ),
                stacklevel=stacklevel,
            )

    beta, ll, H, log, converged = _newton(evaluate, p, codes, totals, ridge, max_iter, tol, free)
    pen = np.tile(np.r_[0.0, np.full(p - 1, ridge)], K)
    idx = np.flatnonzero(free.ravel())
    try:
        inner = linalg.inv(H[np.ix_(idx, idx)] + np.diag(pen[idx]))
    except linalg.LinAlgError:
        raise SingularDesignError("the information matrix at the estimates is singular; fit with ridge > 0 or drop terms") from None
    cov = np.zeros((K * p, K * p))
    cov[np.ix_(idx, idx)] = 0.5 * (inner + inner.T)
    se = np.sqrt(np.clip(np.diag(cov), 0.0, None)).reshape(K, p)
    _raise_for_absurd(beta, cov, first, spec, causes, limits)
    k_par = len(idx)
    return HazardResults(
        params=pd.DataFrame(beta.T, index=names, columns=list(causes)),
        bse=pd.DataFrame(se.T, index=names, columns=list(causes)),
        cov=cov,
        loglik=ll,
        aic=-2 * ll + 2 * k_par,
        bic=-2 * ll + k_par * math.log(n_rows),
        n_rows=n_rows,
        events=events,
        iterations=len(log) - 1,
        converged=converged,
        kind=kind,
        ridge=float(ridge),
        causes=causes,
        spec=spec,
        data_fingerprint=fingerprint,
        iteration_log=log,
        collapsed=bool(collapse),
        n_stored_rows=first.n,
        trust_limits=limits,
        fixed_terms={c: [names[j] for j in np.flatnonzero(~free[a])] for a, c in enumerate(causes) if not free[a].all()},
    )


def _raise_for_absurd(beta, cov, first, spec, causes, limits) -> None:
    """``ModelError`` when a term's coefficients or standard errors are absurd for its columns' scale.

    A term is one design column, or the whole loan-age baseline (its basis columns are strongly
    correlated, so only their sum means anything). Its scale on the log-odds scale is the standard
    deviation over the fitted rows of its contribution x'b, sqrt(b' C b), and the mean standard error of
    that contribution, sqrt(trace(C V)), with C the weighted covariance of its columns (from the first
    pass's X'WX; the first column is the intercept, so its row holds the column sums) and V the block
    of the estimates' covariance. For one column these are |b| x sd and SE x sd.
    """
    names = list(spec.columns)
    p = len(names)
    n = first.xtx[0, 0]
    mean = first.xtx[0] / n
    C_all = first.xtx / n - np.outer(mean, mean)
    base = [j for j, nm in enumerate(names) if nm in set(spec.baseline_columns)]
    groups = ([base] if base else []) + [[j] for j in range(1, p) if j not in base]
    problems = []
    for k, c in enumerate(causes):
        for g in groups:
            C = C_all[np.ix_(g, g)]
            b = beta[k, g]
            idx = [k * p + j for j in g]
            V = cov[np.ix_(idx, idx)]
            scaled_b = math.sqrt(max(float(b @ C @ b), 0.0))
            scaled_se = math.sqrt(max(float(np.trace(C @ V)), 0.0))
            label = names[g[0]] if len(g) == 1 else "the age baseline (" + ", ".join(names[j] for j in g) + ")"
            if not (math.isfinite(scaled_b) and math.isfinite(scaled_se)):
                problems.append(f"{c} {label}: coefficients or standard errors are not finite")
            elif scaled_b > limits["max_scaled_coefficient"] or scaled_se > limits["max_scaled_std_error"]:
                detail = f"coefficient {b[0]:.4g} (standard error {math.sqrt(V[0, 0]):.4g})" if len(g) == 1 else "coefficients"
                problems.append(f"{c} {label}: {detail}: scaled coefficient {scaled_b:.3g}, scaled standard error {scaled_se:.3g}")
    if problems:
        raise ModelError(
            problem_list(problems, "the fitted coefficients")
            + f"\nThe limits are a scaled coefficient (|coefficient| x the column's sd) <= {limits['max_scaled_coefficient']:g} "
            f"and a scaled standard error <= {limits['max_scaled_std_error']:g} on the log-odds scale "
            "(model.fit.max_scaled_coefficient and max_scaled_std_error; common practice): the model cannot be trusted. "
            "Use more data, fewer terms, ridge > 0, or loosen the limits explicitly"
        )


def _newton(evaluate, p, codes, totals, ridge, max_iter, tol, free=None):
    """Newton-Raphson with step halving on the penalised log-likelihood.

    ``evaluate(beta, need_hess)`` returns the log-likelihood, score and
    information at ``beta`` (K, p); it is the only part that touches the data,
    so each engine passes its own (a loop over batches, or a Spark job over
    partitions) and the iteration itself is shared. Only the coefficients that
    ``free`` (K, p) marks move; the others stay at zero.
    """
    K = len(codes)
    idx = np.flatnonzero(np.ones(K * p, dtype=bool) if free is None else np.asarray(free, dtype=bool).ravel())
    beta = np.zeros((K, p))
    for a, code in enumerate(codes):
        base = totals[0]
        beta[a, 0] = math.log(totals[code] / base) if base > 0 else 0.0
    pen = np.tile(np.r_[0.0, np.full(p - 1, ridge)], K)

    def objective(ll, b):
        return ll - 0.5 * float(pen @ (b.ravel() ** 2))

    ll, g, H = evaluate(beta, True)
    obj = objective(ll, beta)
    log = [{"iteration": 0, "loglik": ll, "max_step": None, "step_fraction": None}]
    for it in range(1, max_iter + 1):
        grad = (g.ravel() - pen * beta.ravel())[idx]
        A = H[np.ix_(idx, idx)] + np.diag(pen[idx])
        try:
            inner = linalg.cho_solve(linalg.cho_factor(A), grad)
        except linalg.LinAlgError:
            try:
                inner = linalg.solve(A, grad, assume_a="sym")
            except linalg.LinAlgError:
                raise _convergence_error("the information matrix is singular at an iterate", log) from None
        step = np.zeros(K * p)
        step[idx] = inner
        step = step.reshape(K, p)
        t = 1.0
        new = beta + step
        ll_new, g_new, H_new = evaluate(new, True)
        obj_new = objective(ll_new, new)
        slack = 1e-12 * max(1.0, abs(obj))
        while not (obj_new >= obj - slack):
            t *= 0.5
            if t < 1e-10:
                break
            new = beta + t * step
            ll_new, _, _ = evaluate(new, False)
            obj_new = objective(ll_new, new)
            H_new = None
        max_step = float(np.max(np.abs(t * step)))
        if t < 1e-10:
            log.append({"iteration": it, "loglik": ll, "max_step": 0.0, "step_fraction": 0.0})
            if float(np.max(np.abs(step))) < math.sqrt(tol):
                return beta, ll, H, log, True
            raise _convergence_error("the line search could not increase the log-likelihood", log)
        if H_new is None:
            ll_new, g_new, H_new = evaluate(new, True)
        log.append({"iteration": it, "loglik": ll_new, "max_step": max_step, "step_fraction": t})
        change = abs(obj_new - obj)
        beta, ll, g, H, obj = new, ll_new, g_new, H_new, obj_new
        if max_step < tol or change <= 1e-15 * max(1.0, abs(obj)):
            return beta, ll, H, log, True
    raise _convergence_error(f"no convergence in {max_iter} iterations", log)


def _convergence_error(what: str, log: list) -> ConvergenceError:
    err = ConvergenceError(_convergence_text(what, log))
    err.iteration_log = list(log)
    return err


def _convergence_text(what: str, log: list) -> str:
    lines = [f"Newton-Raphson failed: {what}.", "  iteration        loglik      max|step|"]
    for row in log:
        step = "" if row["max_step"] is None else f"{row['max_step']:.3e}"
        lines.append(f"  {row['iteration']:>9d}  {row['loglik']:>14.6f}  {step:>12}")
    lines.append(
        "Try: a ridge penalty (model.ridge > 0), fewer terms or merged levels, "
        "or a larger model.fit.max_iter."
    )
    return "\n".join(lines)


def fit_model(engine, model, collateral=None, *, where_sql: str = "TRUE", params=(), temp_dir=None) -> HazardResults:
    """Fit the model a config describes: ``model`` is the config's ``ModelSpec``.

    Builds the feature spec from ``model`` and ``collateral``, learns it on the
    rows ``where_sql`` selects and fits with ``model.kind``, ``model.ridge``
    and ``model.fit`` (batch size, iterations, tolerance) on ``engine``.
    """
    from ._features import feature_spec

    spec = feature_spec(model, collateral).learn(engine.con, where_sql, params)
    return fit_hazard(
        engine,
        spec,
        where_sql=where_sql,
        params=params,
        kind=model.kind,
        ridge=model.ridge,
        batch_size=model.fit.batch_size,
        max_iter=model.fit.max_iter,
        tol=model.fit.tol,
        temp_dir=temp_dir,
        limits={name: getattr(model.fit, name) for name in TRUST_LIMITS},
    )
