"""A solver-neutral linear (mixed-integer) program described as sparse blocks.

The formulation fills one of these; emitters hand it to HiGHS in bulk or turn it into a
Pyomo model. Every variable family and every constraint family is added once, as arrays.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp


@dataclass(frozen=True)
class Block:
    name: str
    start: int
    size: int

    @property
    def slice(self) -> slice:
        return slice(self.start, self.start + self.size)

    def idx(self, local=None) -> np.ndarray:
        """Global indices of the block's members (all, or those at the local positions)."""
        if local is None:
            return np.arange(self.start, self.start + self.size)
        return self.start + np.asarray(local, dtype=np.int64)


@dataclass
class LinearProgram:
    """min c'x  s.t.  row_lo <= A x <= row_hi,  col_lo <= x <= col_hi,  x_j integer for j in I."""

    var_blocks: dict[str, Block] = field(default_factory=dict)
    row_blocks: dict[str, Block] = field(default_factory=dict)
    _col_lo: list[np.ndarray] = field(default_factory=list)
    _col_hi: list[np.ndarray] = field(default_factory=list)
    _cost: list[np.ndarray] = field(default_factory=list)
    _integer: list[np.ndarray] = field(default_factory=list)
    _rows: list[np.ndarray] = field(default_factory=list)
    _cols: list[np.ndarray] = field(default_factory=list)
    _vals: list[np.ndarray] = field(default_factory=list)
    _row_lo: list[np.ndarray] = field(default_factory=list)
    _row_hi: list[np.ndarray] = field(default_factory=list)
    n_cols: int = 0
    n_rows: int = 0
    objective_offset: float = 0.0
    _A: sp.csr_matrix | None = None

    # ---------------------------------------------------------------- building
    def add_vars(self, name: str, size: int, lo=0.0, hi=np.inf, cost=0.0,
                 integer: bool = False) -> Block:
        if name in self.var_blocks:
            raise ValueError(f"variable block {name!r} exists")
        b = Block(name, self.n_cols, int(size))
        self._col_lo.append(np.broadcast_to(np.asarray(lo, float), (size,)).copy())
        self._col_hi.append(np.broadcast_to(np.asarray(hi, float), (size,)).copy())
        self._cost.append(np.broadcast_to(np.asarray(cost, float), (size,)).copy())
        self._integer.append(np.full(size, integer, dtype=bool))
        self.var_blocks[name] = b
        self.n_cols += int(size)
        self._A = None
        return b

    def add_rows(self, name: str, size: int, rows, cols, vals, lo=-np.inf, hi=np.inf) -> Block:
        """Add a constraint family: entries (rows[k], cols[k], vals[k]) with rows local to the
        family (0..size-1) and cols global; duplicate entries are summed."""
        if name in self.row_blocks:
            raise ValueError(f"row block {name!r} exists")
        rows = np.asarray(rows, dtype=np.int64)
        if rows.size and (rows.min() < 0 or rows.max() >= size):
            raise ValueError(f"row block {name!r}: row index out of range")
        b = Block(name, self.n_rows, int(size))
        self._rows.append(rows + self.n_rows)
        self._cols.append(np.asarray(cols, dtype=np.int64))
        self._vals.append(np.asarray(vals, dtype=float))
        self._row_lo.append(np.broadcast_to(np.asarray(lo, float), (size,)).copy())
        self._row_hi.append(np.broadcast_to(np.asarray(hi, float), (size,)).copy())
        self.row_blocks[name] = b
        self.n_rows += int(size)
        self._A = None
        return b

    def set_cost(self, name: str, cost) -> None:
        """Replace the objective coefficients of one variable block."""
        b = self.var_blocks[name]
        k = list(self.var_blocks).index(name)
        self._cost[k] = np.broadcast_to(np.asarray(cost, float), (b.size,)).copy()

    def zero_costs(self) -> None:
        for k, c in enumerate(self._cost):
            self._cost[k] = np.zeros_like(c)

    # ---------------------------------------------------------------- views
    @property
    def col_lo(self) -> np.ndarray:
        return np.concatenate(self._col_lo) if self._col_lo else np.zeros(0)

    @property
    def col_hi(self) -> np.ndarray:
        return np.concatenate(self._col_hi) if self._col_hi else np.zeros(0)

    @property
    def cost(self) -> np.ndarray:
        return np.concatenate(self._cost) if self._cost else np.zeros(0)

    @property
    def integer(self) -> np.ndarray:
        return np.concatenate(self._integer) if self._integer else np.zeros(0, bool)

    @property
    def row_lo(self) -> np.ndarray:
        return np.concatenate(self._row_lo) if self._row_lo else np.zeros(0)

    @property
    def row_hi(self) -> np.ndarray:
        return np.concatenate(self._row_hi) if self._row_hi else np.zeros(0)

    @property
    def A(self) -> sp.csr_matrix:
        if self._A is None:
            if self._rows:
                r = np.concatenate(self._rows)
                c = np.concatenate(self._cols)
                v = np.concatenate(self._vals)
            else:
                r = c = np.zeros(0, np.int64)
                v = np.zeros(0)
            A = sp.coo_matrix((v, (r, c)), shape=(self.n_rows, self.n_cols)).tocsr()
            A.sum_duplicates()
            A.eliminate_zeros()
            self._A = A
        return self._A

    @property
    def is_mip(self) -> bool:
        return bool(self.integer.any())

    def value(self, x: np.ndarray, name: str) -> np.ndarray:
        return np.asarray(x)[self.var_blocks[name].slice]

    def activity(self, x: np.ndarray, name: str) -> np.ndarray:
        return (self.A[self.row_blocks[name].slice] @ np.asarray(x))

    def objective(self, x: np.ndarray) -> float:
        return float(self.cost @ np.asarray(x)) + self.objective_offset
