"""The fit's design by cells: the likelihood sums of a batch without the dense design matrix.

Most columns of a design are functions of a few discrete values of the row: the intercept and
the age baseline (age bands, age indicators, a spline: functions of the loan age), the indicators
of categoricals and bins, and their products. A *cell* is one combination of those values (loan
age, then the level of each discrete term), numbered in mixed radix; :attr:`CellDesign.table`
holds the value of every such *cell column* in every cell. The other columns (*row columns*:
numeric terms, and their products with anything) are computed per row from the stored *atoms*
(the numeric terms' values, and the indicators of a discrete term left out of the cell when the
cells would be too many) and the cell.

So a row of the design is ``X[i] = [table[c_i], R_i]`` and every sum the fit needs splits into
per-cell sums (``np.bincount`` over the cell codes) and small products of the row columns:

* ``eta = (table @ beta_C)[c] + beta_R @ R`` (one gather per cause);
* ``X' diag(v) X``: the cell block is ``table' diag(bincount(c, v)) table``, the cell-by-row block
  ``table' bincount(c, v R_j)``, the row block ``R diag(v) R'``;
* the score likewise with the residuals for ``v``.

:func:`block_sums` (a Newton pass) and :func:`block_first_sums` (the first pass: rows by cell and
outcome, X'WX, the 0/1 columns, the fingerprint's digest) are the per-batch kernels both engines
share; the partial sums of batches are added in batch order with ``+=`` and turned into the score
and information by :meth:`CellDesign.finish` / :meth:`CellDesign.first_pass`. Summing a fixed
sequence of blocks in a fixed order gives the same bits whatever the number of threads that
computed them (see :func:`creditsurv.model.ordered_map`).
"""

from __future__ import annotations

import hashlib
import math
from dataclasses import dataclass

import numpy as np

from ..errors import DataError, ModelError

__all__ = [
    "FIT_BLOCK_ROWS", "FIT_GROUP_BLOCKS", "KERNEL_ROWS", "MAX_CELLS", "N_CODES", "CellBlock", "CellDesign", "FirstPass", "FirstSums", "PassSums",
    "block_first_sums", "block_sums", "cell_design", "fit_fingerprint",
]  # fmt: skip

N_CODES = 16
"""Outcome codes the fit accepts: 0 (the reference), 1 default, 2 prepay, 3 + k a move to arrears state k."""

FIT_BLOCK_ROWS = 65_536
"""Rows per block of the fit's sums: the blocks are summed in order, so the results depend on this
number but not on the batch size of the reads or on the number of threads."""

FIT_GROUP_BLOCKS = 4
"""Blocks whose Newton-pass sums are added together before they join the pass's total: a worker process
sends back a group's sums once (a block's sums by cell are about two megabytes), and the threads add the
same groups the same way, so the results depend on this number but not on the threads or processes."""

KERNEL_ROWS = 8_192
"""Rows the kernels take at a time within a block: their temporaries (a few dozen float64 a row) then stay
in the processor's cache and are reused, instead of megabytes of fresh memory for every block. The
chunks' sums are added in order, so the results depend on this number too, not on the threads."""

MAX_CELLS = 65_536
"""Most cells a design keeps: discrete terms that would make more stay out of the cell (their indicators
become row columns). The cell code then fits in 16 bits."""


@dataclass
class CellBlock:
    """One block of stored rows, sorted by cell: cell codes ``c`` (n,) uint16, outcomes ``y`` (n,) int8,
    weights ``w`` (n,) or None (all 1) and the atoms ``Z`` (A, n) float64."""

    c: np.ndarray
    y: np.ndarray
    w: np.ndarray | None
    Z: np.ndarray

    @property
    def n(self) -> int:
        return int(self.c.shape[0])

    def weights(self) -> np.ndarray:
        return np.ones(self.n) if self.w is None else self.w

    def chunks(self, rows: int = KERNEL_ROWS):
        """The block in consecutive pieces of ``rows`` rows (views; the last one shorter)."""
        for lo in range(0, self.n, rows):
            hi = lo + rows
            yield CellBlock(self.c[lo:hi], self.y[lo:hi], None if self.w is None else self.w[lo:hi], self.Z[:, lo:hi])

    def runs(self) -> tuple[np.ndarray, np.ndarray]:
        """The cells present in the block and where each one's run of rows starts."""
        starts = np.flatnonzero(np.r_[True, self.c[1:] != self.c[:-1]])
        return self.c[starts].astype(np.intp), starts


class CellDesign:
    """The cell form of a learned :class:`FeatureSpec`'s design (see the module docstring).

    Attributes
    ----------
    names : list of str
        The design columns (``spec.columns``), p of them.
    cell_cols, row_cols : ndarray of int
        Indices of the cell columns and of the row columns in the design.
    table : ndarray, shape (n_cells, len(cell_cols))
        The cell columns' values in each cell.
    atom_cols : ndarray of int
        The design columns stored per row (atoms).
    recipe : list of (int, int)
        Per row column, its two factors: an atom ``k`` as ``k``, a cell column ``j`` as ``-1 - j``,
        none as ``None``; the value is their product (an interaction) or the one factor.
    """

    def __init__(self, spec):
        self.spec = spec
        self.names = list(spec.columns)
        p = len(self.names)
        idx = {n: i for i, n in enumerate(self.names)}
        groups = {term: cols for term, _ref, cols in spec.indicator_groups()}
        terms, discrete = {}, []
        for c in spec.covariates:
            if c.get("kind", "numeric") == "numeric":
                terms[c["name"]] = [idx[c["name"]]]
            else:
                terms[c["name"]] = list(groups[c["name"]])
                discrete.append(c["name"])

        # the age factor: one code per distinct row of the baseline columns over the ages
        learned = spec.learned
        self.age_lo = min(0, int(learned["age_min"]))
        self.age_hi = int(learned["age_max"])
        ages = np.arange(self.age_lo, self.age_hi + 1, dtype=np.float64)
        base = spec.baseline_design(ages)
        age_table, self.age_code = np.unique(base, axis=0, return_inverse=True)
        self.age_code = self.age_code.ravel().astype(np.int64)
        sizes = [age_table.shape[0]]
        if sizes[0] > MAX_CELLS:
            raise ModelError(f"the loan ages {self.age_lo} to {self.age_hi} give {sizes[0]:,} baseline cells, more than {MAX_CELLS:,}")
        in_cell = []
        for name in discrete:  # spec order, while the cells stay few enough
            size = len(terms[name]) + 1
            if math.prod(sizes) * size <= MAX_CELLS:
                in_cell.append(name)
                sizes.append(size)
        self.cell_terms = in_cell
        self.sizes = sizes
        self.n_cells = math.prod(sizes)

        # every cell's factor codes, age fastest
        codes = np.indices(sizes[::-1]).reshape(len(sizes), -1)[::-1]  # (factors, n_cells)
        values = {}  # design column -> its values over the cells
        for j in range(base.shape[1]):
            values[j] = age_table[codes[0], j]
        for f, name in enumerate(in_cell, start=1):
            for k, j in enumerate(terms[name]):
                values[j] = (codes[f] == k + 1).astype(np.float64)
        atoms = [j for c in spec.covariates for j in terms[c["name"]] if j not in values]
        recipe = {j: (a, None) for a, j in enumerate(atoms)}
        for a, b in spec.interactions:
            for x in terms[a]:
                for y in terms[b]:
                    j = idx[f"{self.names[x]}:{self.names[y]}"]
                    if x in values and y in values:
                        values[j] = values[x] * values[y]  # the design's product, cell by cell
                    else:
                        recipe[j] = (atoms.index(x) if x in recipe else -1 - x, atoms.index(y) if y in recipe else -1 - y)
        self.cell_cols = np.array(sorted(values), dtype=np.int64)
        self.row_cols = np.array(sorted(recipe), dtype=np.int64)
        assert len(self.cell_cols) + len(self.row_cols) == p
        self.table = np.column_stack([values[j] for j in self.cell_cols]) if len(self.cell_cols) else np.zeros((self.n_cells, 0))
        self._cell_pos = {int(j): k for k, j in enumerate(self.cell_cols)}
        self.atom_cols = np.array(atoms, dtype=np.int64)
        self.recipe = [recipe[int(j)] for j in self.row_cols]
        self._cell_term_cols = [terms[name] for name in in_cell]

    @property
    def p(self) -> int:
        return len(self.names)

    def digest(self) -> str:
        """SHA-256 of what maps stored rows to the design: the cell table and the row recipe."""
        h = hashlib.sha256(np.ascontiguousarray(self.table).tobytes())
        h.update(repr((self.sizes, self.cell_cols.tolist(), self.atom_cols.tolist(), self.recipe)).encode())
        return h.hexdigest()

    # ----------------------------------------------------------------- rows

    def block(self, raw: dict, collapse: bool, dropped) -> CellBlock | None:
        """The stored form of a batch of raw rows (see :meth:`FeatureSpec.raw_query`), or None if empty.

        Evaluates the design with :meth:`FeatureSpec.design` (its checks and errors), then keeps the cell
        codes and the atoms, and checks that they give that design back exactly.
        """
        y = np.asarray(raw["outcome"])
        valid = np.arange(N_CODES)
        if y.dtype.kind == "f" and np.isnan(y).any() or not np.isin(y, valid).all():
            bad = sorted(set(np.unique(y[~np.isin(y, valid)]).tolist()))[:5]
            raise DataError(f"loan_months outcome codes must be integers 0 to {N_CODES - 1}; found {bad}")
        y = y.astype(np.int8)
        w = np.asarray(raw["_cs_weight"], dtype=np.float64) if collapse else None
        if dropped:
            keep = ~np.isin(y, dropped)
            raw = {k: v[keep] for k, v in raw.items()}
            y = y[keep]
            w = w[keep] if w is not None else None
        if y.shape[0] == 0:
            return None
        age = np.asarray(raw["age"], dtype=np.float64)
        a = age.astype(np.int64)
        outside = (a != age) | (a < self.age_lo) | (a > self.age_hi)
        if outside.any():
            raise ModelError(
                f"loan age {age[outside][0]:g} is outside the whole ages {self.age_lo} to {self.age_hi} the feature spec was "
                "learned on; learn the spec on the rows of the fit"
            )
        X, _ = self.spec.design(raw)
        c, Z = self._cell_form(X, a)
        order = np.argsort(c, kind="stable")  # rows by cell: the sums by cell are sums over runs
        return CellBlock(c[order], y[order], None if w is None else w[order], Z[:, order])

    def _cell_form(self, X: np.ndarray, a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """The cell codes (n,) and atoms (A, n) of the dense design ``X`` of rows of whole loan ages ``a``,
        checked to give every column of ``X`` back bit for bit."""
        c = self.age_code[a - self.age_lo]
        stride = self.sizes[0]
        for cols, size in zip(self._cell_term_cols, self.sizes[1:]):
            c = c + stride * (X[:, cols] @ np.arange(1, size, dtype=np.float64)).astype(np.int64)
            stride *= size
        c = c.astype(np.uint16)
        Z = np.ascontiguousarray(np.take(X, self.atom_cols, axis=1).T)
        same = np.array_equal(self.table[c], np.take(X, self.cell_cols, axis=1))
        same = same and np.array_equal(self.rows(CellBlock(c, None, None, Z)), np.take(X, self.row_cols, axis=1).T)
        if not same:  # pragma: no cover - a term whose columns are not what the cells assume
            raise ModelError("the cell form of the design differs from the design; this is a bug in creditsurv")
        return c, Z

    def rows(self, block: CellBlock) -> np.ndarray:
        """The row columns of a block, shape (len(row_cols), n), each row contiguous."""
        R = np.empty((len(self.row_cols), block.n))
        for k, (a, b) in enumerate(self.recipe):
            R[k] = self._factor(a, block)
            if b is not None:
                R[k] *= self._factor(b, block)
        return R

    def _factor(self, f: int, block: CellBlock) -> np.ndarray:
        return block.Z[f] if f >= 0 else self.table[block.c, self._cell_pos[-1 - f]]

    # ----------------------------------------------------------------- from cell sums to the design

    def _spread(self, cell: np.ndarray, cross: np.ndarray, rows: np.ndarray) -> np.ndarray:
        """``X' diag(v) X`` (p, p) from ``bincount(c, v)`` (cells,), ``bincount(c, v R_j)`` (r, cells) and ``R diag(v) R'``."""
        T, C, Rc = self.table, self.cell_cols, self.row_cols
        out = np.zeros((self.p, self.p))
        out[np.ix_(C, C)] = T.T @ (cell[:, None] * T)
        tr = T.T @ cross.T
        out[np.ix_(C, Rc)] = tr
        out[np.ix_(Rc, C)] = tr.T
        out[np.ix_(Rc, Rc)] = rows
        return np.triu(out) + np.triu(out, 1).T

    def finish(self, sums: "PassSums", K: int, need_hess: bool):
        """Log-likelihood, score (K, p) and observed information (K*p, K*p) from a pass's summed blocks."""
        p = self.p
        g = np.zeros((K, p))
        g[:, self.cell_cols] = sums.g_cell @ self.table
        g[:, self.row_cols] = sums.g_rows
        if not need_hess:
            return sums.ll, g, None
        H = np.zeros((K * p, K * p))
        for k, (a, b) in enumerate(sums.pairs):
            block = self._spread(sums.h_cell[k], sums.h_cross[k], sums.h_rows[k])
            H[a * p:(a + 1) * p, b * p:(b + 1) * p] = block
            if a != b:
                H[b * p:(b + 1) * p, a * p:(a + 1) * p] = block.T
        return sums.ll, g, H

    def first_pass(self, sums: "FirstSums") -> "FirstPass":
        """The first-pass sums over the design (:class:`FirstPass`) from the summed blocks."""
        first = FirstPass(self.p)
        first.S[self.cell_cols] = self.table.T @ sums.counts
        first.S[self.row_cols] = sums.S_rows
        first.xtx = self._spread(sums.counts.sum(axis=1), sums.x_cross, sums.x_rows)
        seen = sums.counts.sum(axis=1) > 0
        T = self.table[seen]
        first.is01[self.cell_cols] = ((T == 0) | (T == 1)).all(axis=0)
        first.is01[self.row_cols] = sums.is01_rows
        first.n = sums.n
        first.digests = sums.digests
        return first

    def prepare(self, beta: np.ndarray) -> np.ndarray:
        """Each cause's part of eta that the cell gives, per cell: (K, n_cells)."""
        return beta[:, self.cell_cols] @ self.table.T


def cell_design(spec) -> CellDesign:
    """The cell form of a learned feature spec's design (see :class:`CellDesign`)."""
    return CellDesign(spec)


# --------------------------------------------------------------------------- the per-block kernels


class PassSums:
    """Partial sums of one Newton pass over some blocks; ``+=`` adds the next blocks' (in order)."""

    def __init__(self, ll, g_cell, g_rows, pairs, h_cell, h_cross, h_rows):
        self.ll, self.g_cell, self.g_rows = ll, g_cell, g_rows
        self.pairs, self.h_cell, self.h_cross, self.h_rows = pairs, h_cell, h_cross, h_rows

    def __iadd__(self, other: "PassSums") -> "PassSums":
        self.ll += other.ll
        self.g_cell += other.g_cell
        self.g_rows += other.g_rows
        if self.h_cell is not None:
            self.h_cell += other.h_cell
            self.h_cross += other.h_cross
            self.h_rows += other.h_rows
        return self


def _by_cell(chunk: CellBlock, R, resid, V, by_cell, g_rows, h_rows) -> None:
    """Add a chunk's sums by cell of the residuals (K, n), the weights ``V`` (P, n) and ``V`` times each row
    column to ``by_cell`` (K + P + P*r, n_cells), and the row columns' own products to ``g_rows`` (K, r) and
    ``h_rows`` (P, r, r).

    The rows of a block are sorted by cell, so a cell's sum is the sum over its run of rows
    (``np.add.reduceat``, in row order); the products of the row columns are one matrix product.
    """
    K, P, r = resid.shape[0], V.shape[0], R.shape[0]
    M = np.empty((K + P + P * r, chunk.n))
    M[:K] = resid
    M[K:K + P] = V
    np.multiply(V[:, None, :], R[None, :, :], out=M[K + P:].reshape(P, r, chunk.n))
    cells, starts = chunk.runs()
    by_cell[:, cells] += np.add.reduceat(M, starts, axis=1)  # each cell once in a chunk
    g_rows += M[:K] @ R.T
    h_rows += (M[K + P:] @ R.T).reshape(P, r, r)


def block_sums(design: CellDesign, block: CellBlock, eta_cell, beta, codes, kind, need_hess) -> PassSums:
    """Log-likelihood, score and information sums of one block at ``beta`` (K, p), by cell.

    ``eta_cell`` is :meth:`CellDesign.prepare` of ``beta``. The kernel both engines share. The block is
    taken :data:`KERNEL_ROWS` rows at a time; per-cause quantities are (K, n) rows so that each
    elementwise step runs over contiguous memory.
    """
    K, r = beta.shape[0], len(design.row_cols)
    if kind == "multinomial":
        pairs = [(a, b) for a in range(K) for b in range(a, K)]
    else:  # every month is a trial of every cause
        pairs = [(a, a) for a in range(K)]
    P = len(pairs) if need_hess else 0
    by_cell = np.zeros((K + P + P * r, design.n_cells))
    g_rows, h_rows = np.zeros((K, r)), np.zeros((P, r, r))
    beta_rows = beta[:, design.row_cols]
    ll = 0.0
    for chunk in block.chunks():
        c = chunk.c.astype(np.intp)
        w = chunk.w
        R = design.rows(chunk)
        E = beta_rows @ R  # (K, n), rows contiguous (``eta_cell[:, c]`` alone would be column-major)
        E += eta_cell[:, c]
        Y = chunk.y[None, :] == codes[:, None]
        if kind == "multinomial":
            m = np.maximum(E.max(axis=0), 0.0)
            Pr = np.exp(E - m)
            den = np.exp(-m) + Pr.sum(axis=0)
            Pr /= den
            part = np.where(Y, E, 0.0).sum(axis=0) - m - np.log(den)
        else:
            Pr = 0.5 * (1.0 + np.tanh(0.5 * E))  # logistic, stable for large |eta|
            part = (np.where(Y, E, 0.0) - np.logaddexp(0.0, E)).sum(axis=0)
        ll += float(part.sum() if w is None else w @ part)
        resid = Y - Pr
        if w is not None:
            resid *= w
        V = np.empty((P, chunk.n))
        for k, (a, b) in enumerate(pairs[:P]):
            np.multiply(Pr[a], (1.0 - Pr[b]) if a == b else -Pr[b], out=V[k])
            if w is not None:
                V[k] *= w
        _by_cell(chunk, R, resid, V, by_cell, g_rows, h_rows)
    g_cell, h_cell, h_cross = by_cell[:K], by_cell[K:K + P], by_cell[K + P:].reshape(P, r, design.n_cells)
    if not need_hess:
        return PassSums(ll, g_cell, g_rows, pairs, None, None, None)
    return PassSums(ll, g_cell, g_rows, pairs, h_cell, h_cross, h_rows)


class FirstSums:
    """Partial sums of the first pass over some blocks; ``+=`` adds the next blocks' (in order).

    ``counts`` (n_cells, N_CODES) weighs the rows by cell and outcome; the rest is the row columns'
    share of the events by column, X'WX and the 0/1 check, and the row count. ``block_digest`` is the
    SHA-256 of one block's stored bytes (computed where the block is, in parallel), ``hash`` the
    SHA-256 of the blocks' digests in block order: the blocks are fixed, so it does not depend on the
    batches of the read or on the threads.
    """

    def __init__(self, counts, S_rows, x_cross, x_rows, is01_rows, n, block_digest: bytes):
        self.counts, self.S_rows, self.x_cross, self.x_rows = counts, S_rows, x_cross, x_rows
        self.is01_rows, self.n, self.block_digest = is01_rows, n, block_digest
        self.hash = hashlib.sha256(block_digest)

    def __iadd__(self, other: "FirstSums") -> "FirstSums":
        self.counts += other.counts
        self.S_rows += other.S_rows
        self.x_cross += other.x_cross
        self.x_rows += other.x_rows
        self.is01_rows &= other.is01_rows
        self.n += other.n
        self.hash.update(other.block_digest)
        return self

    @property
    def digests(self) -> list[str]:
        return [self.hash.hexdigest()]


def block_first_sums(design: CellDesign, block: CellBlock) -> FirstSums:
    """The first pass's sums of one block (see :class:`FirstSums`), :data:`KERNEL_ROWS` rows at a time."""
    r = len(design.row_cols)
    counts = np.bincount(block.c.astype(np.intp) * N_CODES + block.y, block.w, minlength=design.n_cells * N_CODES)
    S_rows = np.zeros((r, N_CODES))
    by_cell, x_rows = np.zeros((1 + r, design.n_cells)), np.zeros((1, r, r))
    is01 = np.ones(r, dtype=bool)
    for chunk in block.chunks():
        w = chunk.weights()
        R = design.rows(chunk)
        for code in np.unique(chunk.y):
            rows = chunk.y == code
            S_rows[:, code] += R[:, rows] @ w[rows]
        _by_cell(chunk, R, np.zeros((0, chunk.n)), w[None, :], by_cell, np.zeros((0, r)), x_rows)
        is01 &= ((R == 0) | (R == 1)).all(axis=1)
    digest = hashlib.sha256(block.c.tobytes())
    for stream in (block.y, block.w, *block.Z):
        if stream is not None:
            digest.update(np.ascontiguousarray(stream).tobytes())
    counts = counts.reshape(design.n_cells, N_CODES)
    return FirstSums(counts, S_rows, by_cell[1:], x_rows[0], is01, block.n, digest.digest())


class FirstPass:
    """Sums of the first pass over the design: events by column, X'WX, 0/1 columns, row count.

    ``S[j, c]`` is the weighted sum of column ``j`` over the rows with outcome code ``c``;
    ``digests`` the SHA-256 of the stored blocks (the fingerprint's input).
    """

    def __init__(self, p: int):
        self.S = np.zeros((p, N_CODES))
        self.xtx = np.zeros((p, p))
        self.is01 = np.ones(p, dtype=bool)
        self.n = 0
        self.digests: list[str] = []

    def fingerprint(self, names, design_digest: str = "") -> str:
        return fit_fingerprint(self.n, names, [*self.digests, design_digest])


def fit_fingerprint(n: int, names, digests) -> str:
    return hashlib.sha256(f"creditsurv-design|{n}|{'|'.join(names)}|".encode() + "|".join(digests).encode()).hexdigest()
