"""Projection of a multi-state model: a Markov chain with loan-specific, time-varying transition matrices.

Each loan starts in its arrears state at the reporting month with probability 1; month by month
the vector of state probabilities moves with pi(u) = pi(u-1) P(u), where row j of P(u) holds the
loan's probabilities of moving from transient state j to every state in month u. Default and
prepayment are absorbing: the mass that enters them in month u is the marginal PD (and marginal
prepayment) of that month; the mass still in the transient states is the survival S(u). The
hazards this implies, h_k(u) = (mass entering k in u) / S(u-1), give back exactly the same
survival and cumulative incidence through :class:`~creditsurv.forecast.Curves`, so every table of
the competing-risk projection serves the multi-state model unchanged.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["ChainResult", "chain_of_moves", "markov_chain"]


@dataclass(frozen=True)
class ChainResult:
    """The state probabilities of a projected chain.

    Attributes
    ----------
    transient : ndarray, shape (n, H + 1, T)
        Probability of each transient state at the end of month u ahead (u = 0 is the start).
    entered : ndarray, shape (n, H, A)
        Probability mass entering each absorbing state in month u + 1 ahead.
    """

    transient: np.ndarray
    entered: np.ndarray

    @property
    def survival(self) -> np.ndarray:
        """S(u), u = 0 ... H: the probability of still being in a transient state, shape (n, H + 1)."""
        return self.transient.sum(axis=2)

    @property
    def absorbed(self) -> np.ndarray:
        """Cumulative mass in each absorbing state at the end of month u, u = 0 ... H, shape (n, H + 1, A)."""
        n, H, A = self.entered.shape
        out = np.zeros((n, H + 1, A))
        np.cumsum(self.entered, axis=1, out=out[:, 1:])
        return out

    def hazards(self) -> np.ndarray:
        """Monthly hazard of each absorbing state, mass entering it over S(u-1), shape (n, H, A); 0 where S(u-1) is 0."""
        s_prev = self.survival[:, :-1, None]
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(s_prev > 0, self.entered / np.where(s_prev > 0, s_prev, 1.0), 0.0)


def markov_chain(P: np.ndarray, start: np.ndarray) -> ChainResult:
    """Run the chain of each loan from its start state.

    Parameters
    ----------
    P : ndarray, shape (T, n, H, T + A)
        ``P[j, i, u]`` is loan i's row of transition probabilities from transient state j in month
        u + 1 ahead: the first T entries to the transient states, the last A to the absorbing ones.
        Rows sum to 1.
    start : ndarray of int, shape (n,)
        Each loan's transient state at the start.

    Returns
    -------
    ChainResult
    """
    T, n, H, S = P.shape
    start = np.asarray(start, dtype=np.int64)
    if start.shape != (n,) or ((start < 0) | (start >= T)).any():
        raise ValueError(f"start states must be {n} integers in 0..{T - 1}")
    transient = np.zeros((n, H + 1, T))
    entered = np.zeros((n, H, S - T))
    pi = np.zeros((n, T))
    pi[np.arange(n), start] = 1.0
    transient[:, 0] = pi
    for u in range(H):
        step = pi[:, 0, None] * P[0, :, u]
        for j in range(1, T):
            step += pi[:, j, None] * P[j, :, u]
        pi = step[:, :T]
        transient[:, u + 1] = pi
        entered[:, u] = step[:, T:]
    return ChainResult(transient=transient, entered=entered)


def chain_of_moves(moves, start: np.ndarray, states: int) -> ChainResult:
    """Run the chain of each loan from the probabilities of the moves that can happen.

    The same chain as :func:`markov_chain`, without the moves that cannot happen, and faster: each
    month reads every move's probabilities of all loans in one contiguous row.

    Parameters
    ----------
    moves : mapping of (origin j, destination s) -> ndarray, shape (n, H)
        Loans' probabilities of moving from transient state j to state s (``s`` in 0 ... states - 1,
        the first T transient) in month u + 1 ahead; a move that is not given has probability 0.
        For each origin the probabilities sum to 1.
    start : ndarray of int, shape (n,)
        Each loan's transient state at the start.
    states : int
        T + A, the number of states.

    Returns
    -------
    ChainResult
        Its arrays are views in the (n, H + 1, T) and (n, H, A) shapes :func:`markov_chain` gives.
    """
    start = np.asarray(start, dtype=np.int64)
    T = int(start.max()) + 1 if start.size else 1
    T = max([T, *(j + 1 for j, _ in moves)])
    n, H = next(iter(moves.values())).shape if moves else (start.shape[0], 0)
    if start.shape != (n,) or ((start < 0) | (start >= T)).any():
        raise ValueError(f"start states must be {n} integers in 0..{T - 1}")
    # P[u, j, s] holds every loan's probability of the move j -> s in month u + 1: one contiguous block a month
    P = np.zeros((H, T, states, n))
    for (j, s), value in moves.items():
        P[:, j, s, :] = value.T
    # mass[u, s]: every loan's probability of being in state s at the end of month u (absorbing: entering it in u)
    mass = np.zeros((H + 1, states, n))
    mass[0, start, np.arange(n)] = 1.0
    product = np.empty((T, states, n))
    for u in range(H):
        # pi(u) = pi(u - 1) P(u): the sum over origins runs j = 0, 1, ... as in markov_chain (a move left out adds 0)
        np.multiply(mass[u, :T, None, :], P[u], out=product)
        if T == 1:
            mass[u + 1] = product[0]
            continue
        np.add(product[0], product[1], out=mass[u + 1])
        for j in range(2, T):
            mass[u + 1] += product[j]
    return ChainResult(transient=mass[:, :T].transpose(2, 0, 1), entered=mass[1:, T:].transpose(2, 0, 1))
