"""The multi-state model of arrears: one multinomial logit per origin state, fitted exactly and out of core.

Before default a loan is in one of the transient arrears states (``current``, ``30-59``,
``60-89``, from ``arrears.starts``); each month it stays, moves to another of them, defaults
or prepays (see :mod:`creditsurv.data`). From each origin state ``j`` the monthly
probabilities of the end states ``k`` follow a multinomial logit with "stay" as the reference,

    P_jk(t | x) = exp(eta_jk) / sum_m exp(eta_jm),   eta_jj = 0,   eta_jk = beta_jk' x_t,

with the same feature spec (age baseline, covariates, macro lags) for every origin state
(a Markov chain with loan-specific, time-varying transition matrices; Aalen & Johansen 1978
for its non-parametric form). Each origin state is fitted on its own months with the exact
Newton fit of :func:`~creditsurv.model.fit_outcomes`, so its coefficients and standard errors
are those of ``statsmodels.api.MNLogit`` on the same rows. With one transient state the model
is the multinomial competing-risk model.

A move seen fewer than ``min_transition_events`` times, or with fewer than 10 events per
parameter of the full design (the level below which a fit warns; or the configured limit if higher), is fitted with intercept and age baseline only, or, too rare for
that, with the intercept only (its observed rate, from any number of moves; also when a band of the age
baseline holds none of its moves); a move never seen is fixed at zero probability. Every choice is listed in
:attr:`MultiStateResults.transitions`. An origin state whose loans never stayed put takes its
most frequent end state as the reference instead.
"""

from __future__ import annotations

import hashlib
import json
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from ..data import ABSORBING_STATES, DESTINATION_MOVE
from ..errors import CreditsurvError, ModelError
from ._features import FeatureSpec, SpecInputs
from ._hazard import (
    MULTI_STATE_FORMAT,
    STABLE_EVENTS_PER_PARAMETER,
    TRUST_LIMITS,
    fit_outcomes,
    loosened_limits,
    results_from_dict,
)

__all__ = ["DESIGNS", "MultiStateResults", "fit_multi_state", "state_codes"]

_FORMAT_VERSION = 1

DESIGNS = {
    "full": "every term",
    "baseline": "intercept and age baseline",
    "intercept": "intercept only",
    "none": "never seen: fixed at zero",
}
"""How a move between states is fitted (the ``design`` column of :attr:`MultiStateResults.transitions`)."""


def state_codes(labels) -> dict[str, int]:
    """Destination code of every end state seen from origin state 0: stay 0, default 1, prepaid 2, moves 3 + k.

    From origin ``j`` the code of state ``j`` itself is 0 (stay) and of state 0 is ``3 + 0``;
    :func:`_end_codes` gives the codes from any origin.
    """
    return _end_codes(labels, 0)


def _end_codes(labels, origin: int) -> dict[str, int]:
    out = {}
    for k, name in enumerate(labels):
        out[name] = 0 if k == origin else DESTINATION_MOVE + k
    out.update(ABSORBING_STATES)
    return out


@dataclass
class MultiStateResults(SpecInputs):
    """A fitted multi-state model.

    Attributes
    ----------
    labels : tuple of str
        The transient states, in code order (``current``, ``30-59``, ``60-89``).
    origins : dict of str to HazardResults
        Per origin state, its multinomial logit: ``causes`` are the end states fitted
        against the reference (``references``), coefficients one column per end state.
    references : dict of str to str
        Per origin state, the end state of the reference category (the origin itself:
        "stay", unless its loans never stayed).
    transitions : DataFrame
        One row per origin and end state: ``origin``, ``destination``, ``loan_months``
        (moves seen), ``design`` (a key of :data:`DESIGNS`, or ``reference``) and
        ``parameters`` estimated.
    spec : FeatureSpec
        The learned feature spec, shared by every origin state.
    """

    labels: tuple
    origins: dict
    references: dict
    transitions: pd.DataFrame
    spec: FeatureSpec
    kind: str = "multi_state"

    @property
    def states(self) -> list[str]:
        """Every state: the transient ones, then ``default`` and ``prepaid``."""
        return [*self.labels, *ABSORBING_STATES]

    @property
    def n_rows(self) -> int:
        return int(sum(m.n_rows for m in self.origins.values()))

    @property
    def loglik(self) -> float:
        return float(sum(m.loglik for m in self.origins.values()))

    @property
    def n_parameters(self) -> int:
        return int(self.transitions["parameters"].sum())

    @property
    def converged(self) -> bool:
        return all(m.converged for m in self.origins.values())

    @property
    def iterations(self) -> int:
        return max(m.iterations for m in self.origins.values())

    @property
    def trust_limits(self) -> dict:
        return next(iter(self.origins.values())).trust_limits

    @property
    def data_fingerprint(self) -> str:
        text = "|".join(f"{o}:{m.data_fingerprint}" for o, m in self.origins.items())
        return hashlib.sha256(f"creditsurv-multi-state|{text}".encode()).hexdigest()

    risk_set_inputs = ("origin_state",)
    """Columns of ``loan_months`` that :meth:`hazards` reads besides the feature spec's inputs."""

    def hazards(self, raw) -> tuple[np.ndarray, np.ndarray]:
        """One-month probabilities of default and prepayment of observed months, from their origin state.

        ``raw["origin_state"]`` gives each month's state at its start (code order of :attr:`labels`);
        a month without it, or with it unknown (NaN), starts current. The projection does not use
        this: it runs each loan's chain from its state (:mod:`creditsurv.forecast`).
        """
        n = np.asarray(raw["age"]).shape[0]
        origin = np.asarray(raw.get("origin_state", np.zeros(n)), dtype=float)
        origin = np.where(np.isnan(origin), 0, origin).astype(np.int64)
        states = self.states
        hd, hp = np.zeros(n), np.zeros(n)
        for j, label in enumerate(self.labels):
            rows = np.flatnonzero(origin == j)
            if rows.size:
                P = self.transition_probabilities({k: np.asarray(v)[rows] for k, v in raw.items()}, label)
                hd[rows], hp[rows] = P[:, states.index("default")], P[:, states.index("prepaid")]
        return hd, hp

    def transition_probabilities(self, raw, origin: str) -> np.ndarray:
        """Monthly probabilities of every end state (:attr:`states` order) for months starting in ``origin``.

        Parameters
        ----------
        raw : dict of str to ndarray
            The raw inputs of the months (see :meth:`FeatureSpec.design`).
        origin : str
            The state the months start in.

        Returns
        -------
        ndarray, shape (n, len(states))
            Rows sum to 1; a move never seen has probability 0.
        """
        model = self.origins[origin]
        fitted = model.probabilities(raw)
        states = self.states
        out = np.zeros((fitted.shape[0], len(states)))
        for i, name in enumerate(model.causes):
            out[:, states.index(name)] = fitted[:, i]
        out[:, states.index(self.references[origin])] = 1.0 - fitted.sum(axis=1)
        return out

    def grid_transitions(self, grid, origin: str) -> dict[int, np.ndarray]:
        """Monthly probabilities (n, H) of each end state reachable from ``origin``, for a block of loans x months ahead.

        The projection's fast route (see :meth:`HazardResults.grid_probabilities`): keyed by the end state's
        position in :attr:`states`; an end state never reached from ``origin`` is left out (probability 0).
        Equal to :meth:`transition_probabilities` on the cells up to rounding.
        """
        model = self.origins[origin]
        fitted = model.grid_probabilities(grid)
        states = self.states
        out = {states.index(name): fitted[i] for i, name in enumerate(model.causes)}
        out[states.index(self.references[origin])] = 1.0 - fitted.sum(axis=0)
        return out

    def summary(self, alpha: float = 0.05) -> pd.DataFrame:
        """Tidy coefficients: origin, destination, cause (the move, ``<origin> to <destination>``), term, estimate,
        std_error, z, p_value, ci_lo, ci_hi; terms held at zero are left out."""
        frames = []
        for origin, model in self.origins.items():
            table = model.summary(alpha)
            table.insert(0, "destination", table["cause"])
            table.insert(0, "origin", origin)
            table["cause"] = origin + " to " + table["destination"]
            frames.append(table)
        return pd.concat(frames, ignore_index=True)

    def describe(self) -> str:
        return (
            f"multi-state model, {len(self.labels)} arrears states, {self.n_parameters} parameters, "
            f"{self.n_rows:,} loan-months"
        )

    def record(self) -> dict:
        """The fit's headline numbers for a run's manifest."""
        k = self.n_parameters
        return {
            "kind": self.kind,
            "states": list(self.labels),
            "references": dict(self.references),
            "transitions": self.transitions.to_dict(orient="records"),
            "n_rows": self.n_rows,
            "loglik": self.loglik,
            "aic": -2 * self.loglik + 2 * k,
            "bic": -2 * self.loglik + k * math.log(max(self.n_rows, 1)),
            "iterations": self.iterations,
            "converged": self.converged,
            "data_fingerprint": self.data_fingerprint,
            **({"limits_loosened": loosened} if (loosened := loosened_limits(self.trust_limits)) else {}),
        }

    def to_dict(self) -> dict:
        from ..version import __version__

        return {
            "format": MULTI_STATE_FORMAT,
            "format_version": _FORMAT_VERSION,
            "creditsurv_version": __version__,
            "kind": self.kind,
            "states": list(self.labels),
            "references": dict(self.references),
            "transitions": self.transitions.to_dict(orient="records"),
            "origins": {o: m.to_dict() for o, m in self.origins.items()},
        }

    def save(self, path) -> Path:
        """Write the model as readable JSON (indent 2, sorted keys); return the path."""
        path = Path(path)
        path.write_text(json.dumps(self.to_dict(), indent=2, sort_keys=True, allow_nan=False) + "\n", encoding="utf-8")
        return path

    @classmethod
    def from_dict(cls, data: dict, path) -> "MultiStateResults":
        """The model :meth:`to_dict` describes; ``path`` names it in errors."""
        if data.get("format_version") != _FORMAT_VERSION:
            raise ModelError(f"{path}: multi-state model format version {data.get('format_version')} is not {_FORMAT_VERSION}")
        try:
            labels = tuple(data["states"])
            origins = {o: results_from_dict(data["origins"][o], f"{path} (origin state {o})") for o in labels}
            transitions = pd.DataFrame(data["transitions"], columns=["origin", "destination", "loan_months", "design", "parameters"])
            references = {o: data["references"][o] for o in labels}
        except (KeyError, TypeError, ValueError) as exc:
            raise ModelError(f"{path}: multi-state model JSON is missing or has a bad entry: {exc!r}") from None
        return cls(labels=labels, origins=origins, references=references, transitions=transitions, spec=origins[labels[0]].spec)


def _end_state_counts(engine, spec, where_sql, params, labels) -> dict[int, pd.DataFrame]:
    """Per origin state, loan-months by loan age (rows) and end state (columns), over the rows the fit reads.

    One query for every origin state: the moves each origin's fit will see.
    """
    body = spec.raw_query(engine.con, where_sql, order=False, carry=("origin_state", "destination"))
    counts = engine.frame(
        f"SELECT origin_state, age, destination, count(*) AS n FROM ({body}) AS r\n"
        "WHERE origin_state IS NOT NULL GROUP BY origin_state, age, destination",
        list(params) or None,
    )
    out = {}
    for j in range(len(labels)):
        codes = _end_codes(labels, j)
        rows = counts[counts["origin_state"] == j]
        table = rows.pivot_table(index="age", columns="destination", values="n", aggfunc="sum", fill_value=0)
        table = table.reindex(columns=list(codes.values()), fill_value=0).astype(np.int64)
        table.columns = list(codes)
        out[j] = table.sort_index()
    return out


def _baseline_separates(spec, by_age: pd.DataFrame, name: str) -> bool:
    """Whether an indicator of the age baseline (or its reference band) holds none or only of the moves to ``name``.

    A move fitted on intercept and baseline alone would then run off to infinity
    (quasi-complete separation); it is fitted on its intercept instead.
    """
    if by_age.empty:
        return False
    X = spec.baseline_design(by_age.index.to_numpy())[:, 1:]
    indicator = ((X == 0) | (X == 1)).all(axis=0)
    if not indicator.any():
        return False
    X = X[:, indicator]
    cells = np.column_stack([X, 1.0 - X.sum(axis=1)])  # each indicator, and the reference band
    moves = by_age[name].to_numpy() @ cells
    rows = by_age.to_numpy().sum(axis=1) @ cells
    return bool(((rows > 0) & ((moves == 0) | (moves == rows))).any())


def fit_multi_state(
    engine,
    spec: FeatureSpec,
    labels,
    *,
    where_sql: str = "TRUE",
    params=(),
    ridge: float = 0.0,
    batch_size: int = 250_000,
    max_iter: int = 50,
    tol: float = 1e-8,
    collapse="auto",
    temp_dir=None,
    limits: dict | None = None,
    min_transition_events: int = 50,
) -> MultiStateResults:
    """Fit one multinomial logit per arrears state on the months that start in it.

    Parameters
    ----------
    engine : creditsurv.engines.Engine
        Holds ``loan_months`` with ``origin_state`` and ``destination`` (see :mod:`creditsurv.data`).
    spec : FeatureSpec
        The feature spec; learned on the rows ``where_sql`` selects when not learned yet.
    labels : sequence of str
        The transient states in code order (``Arrears.labels``).
    min_transition_events : int
        Moves seen fewer times get intercept and age baseline only.
    where_sql, params, ridge, batch_size, max_iter, tol, collapse, temp_dir, limits
        As :func:`~creditsurv.model.fit_hazard`; the events-per-parameter limit applies to each
        origin state and end state.

    Raises
    ------
    ModelError
        When no months start in one of the states (it cannot be projected), or when an origin
        state's fit fails (the message names the state).
    """
    labels = tuple(labels)
    limits = {**TRUST_LIMITS, **(limits or {})}
    if spec.learned is None:
        spec = spec.learn(engine.con, where_sql, params)
    p = len(spec.columns)
    baseline = set(spec.baseline_columns)
    in_baseline = np.array([name == "intercept" or name in baseline for name in spec.columns])
    # The design of each move: the largest whose estimates are stable, at least 10 events per parameter
    # (common practice; Peduzzi et al. 1996, from memory), or the configured limit if higher.
    per_parameter = max(limits["min_events_per_parameter"], STABLE_EVENTS_PER_PARAMETER)
    origins, references, rows = {}, {}, []
    moves = _end_state_counts(engine, spec, where_sql, params, labels)
    for j, origin in enumerate(labels):
        by_age = moves[j]
        counts = {name: int(by_age[name].sum()) for name in by_age.columns}
        if sum(counts.values()) == 0:
            raise ModelError(
                f"no loan-months start in arrears state {origin!r} in the rows fitted ({where_sql}); its loans could not "
                "be projected. Merge it with its neighbour (arrears.starts) or widen the development window"
            )
        reference = origin if counts[origin] > 0 else max(counts, key=lambda k: (counts[k], -list(counts).index(k)))
        codes_from = _end_codes(labels, j)
        reference_code = codes_from[reference]
        names, codes, free = [], [], []
        for name, code in sorted(codes_from.items(), key=lambda kv: kv[1]):
            if name == reference:
                rows.append((origin, name, counts[name], "reference", 0))
                continue
            n = counts[name]
            if n == 0:
                rows.append((origin, name, 0, "none", 0))
                continue
            if n >= max(min_transition_events, per_parameter * p):
                design, mask = "full", np.ones(p, dtype=bool)
            elif n >= per_parameter * in_baseline.sum() and not _baseline_separates(spec, by_age, name):
                design, mask = "baseline", in_baseline.copy()
            else:
                design, mask = "intercept", np.arange(p) == 0
            # the reference's code and 0 trade places in the outcome (see FeatureSpec.raw_query)
            names.append(name)
            codes.append(0 if code == reference_code else reference_code if code == 0 else code)
            free.append(mask)
            rows.append((origin, name, n, design, int(mask.sum())))
        if not names:
            raise ModelError(f"arrears state {origin!r}: every month in it ends in {reference!r}; nothing to fit")
        order = np.argsort(codes, kind="stable")  # the fit wants the outcome codes in increasing order
        try:
            origins[origin] = fit_outcomes(
                engine, spec, causes=[names[i] for i in order], codes=[codes[i] for i in order], kind="multinomial",
                where_sql=where_sql, params=params, ridge=ridge, batch_size=batch_size, max_iter=max_iter, tol=tol,
                collapse=collapse, temp_dir=temp_dir, limits=limits, origin_state=j, reference=reference_code,
                free=np.array([free[i] for i in order]), stacklevel=4,
            )
        except CreditsurvError as exc:
            raise type(exc)(f"arrears state {origin!r}: {exc}") from None
        references[origin] = reference
    transitions = pd.DataFrame(rows, columns=["origin", "destination", "loan_months", "design", "parameters"])
    return MultiStateResults(labels=labels, origins=origins, references=references, transitions=transitions, spec=spec)
