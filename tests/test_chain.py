"""Tests of creditsurv.forecast's Markov chain: the projection of the multi-state model.

Independent references: the state vector multiplied by each month's transition matrix with
numpy's matrix product, one loan at a time (the Chapman-Kolmogorov product of a Markov chain),
and the competing-risk curves of :class:`~creditsurv.forecast.Curves` from the hazards it implies.
"""

from __future__ import annotations

import numpy as np
import pytest

from creditsurv.forecast import Curves, markov_chain

T, A = 3, 2  # transient and absorbing states


def _random_matrices(n, H, seed):
    """Transition rows from each transient state: random, rows summing to 1, absorbing rows implicit."""
    rng = np.random.default_rng(seed)
    P = rng.gamma(0.5, size=(T, n, H, T + A))
    P[..., T:] *= 0.2  # absorption rarer than moves, as in a book
    return P / P.sum(axis=-1, keepdims=True)


def _full_matrix(P, i, u):
    """Loan i's (T + A) x (T + A) matrix of month u: transient rows from P, absorbing states stay put."""
    M = np.zeros((T + A, T + A))
    M[:T] = P[:, i, u]
    M[T:, T:] = np.eye(A)
    return M


def test_the_chain_equals_the_product_of_the_monthly_matrices():
    # pi(u) = pi(0) P(1) ... P(u): the Markov chain's state distribution (Chapman-Kolmogorov), one loan at a time.
    n, H = 7, 30
    P = _random_matrices(n, H, seed=1)
    start = np.array([0, 1, 2, 0, 1, 2, 0])
    chain = markov_chain(P, start)
    for i in range(n):
        pi = np.zeros(T + A)
        pi[start[i]] = 1.0
        for u in range(H):
            pi = pi @ _full_matrix(P, i, u)
            np.testing.assert_allclose(chain.transient[i, u + 1], pi[:T], rtol=1e-12, atol=1e-15)
            np.testing.assert_allclose(chain.absorbed[i, u + 1], pi[T:], rtol=1e-12, atol=1e-15)


def test_every_state_vector_sums_to_one_and_absorbed_mass_never_falls():
    P = _random_matrices(50, 120, seed=2)
    start = np.random.default_rng(3).integers(0, T, size=50)
    chain = markov_chain(P, start)
    total = chain.transient.sum(axis=2) + chain.absorbed.sum(axis=2)
    np.testing.assert_allclose(total, 1.0, rtol=0, atol=1e-12)
    assert (np.diff(chain.absorbed, axis=1) >= 0).all()
    assert (np.diff(chain.survival, axis=1) <= 1e-15).all()


def test_the_implied_hazards_give_back_the_chain_through_the_competing_risk_curves():
    # The run's tables come from Curves.from_hazards: with the chain's hazards, its survival and cumulative
    # incidence must be the chain's own (S(u) = S(u-1)(1 - hD - hP), F_k(u) = sum S(v-1) h_k(v)).
    P = _random_matrices(20, 60, seed=4)
    chain = markov_chain(P, np.zeros(20, dtype=int))
    h = chain.hazards()
    curves = Curves.from_hazards(h[:, :, 0], h[:, :, 1])
    np.testing.assert_allclose(curves.survival, chain.survival[:, 1:], rtol=1e-12)
    np.testing.assert_allclose(curves.cum_default, chain.absorbed[:, 1:, 0], rtol=1e-12, atol=1e-16)
    np.testing.assert_allclose(curves.cum_prepay, chain.absorbed[:, 1:, 1], rtol=1e-12, atol=1e-16)


def test_bad_start_states_are_refused():
    P = _random_matrices(2, 3, seed=5)
    with pytest.raises(ValueError, match="start states must be 2 integers in 0..2"):
        markov_chain(P, np.array([0, 3]))
