"""A bus-by-bus DC grid: the reduced susceptance matrix, factorised once, and flows and PTDF
rows from it without ever forming the full PTDF.

DC power-flow rules (lossless, flat voltages, small angles): a branch l from bus f to bus t
with reactance x_l carries b_l (theta_f - theta_t), b_l = 1 / x_l. With the branch-by-bus
incidence C (+1 at from, -1 at to) the bus susceptance matrix is B = C^T diag(b) C. It is
singular (angles are relative), so the slack bus's row and column are removed: B_r theta_r =
p_r, and flows = diag(b) C theta. For injections that sum to zero the flows do not depend on
which bus is the slack.

Negative reactances (series compensation) make B indefinite, so B_r is factorised by a sparse
LU (scipy's SuperLU), never by Cholesky.

The PTDF Phi = diag(b) C B_r^-1 (slack column 0) is branches x buses and dense: on a large grid
it would not fit. A model only needs the rows of the branches it monitors, and only at the
buses where something can inject, so `ptdf_rows` solves B_r^T y = b_l c_l for the requested
rows only.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from scipy.sparse import csgraph

from ...errors import CaseError, Problem

# Injections of a flow request must sum to zero per column, up to round-off of this size
# relative to the largest injection (a mismatch would silently land at the slack bus).
BALANCE_RTOL = 1e-9
# A pivot of U this small against the largest one means B_r is singular in all but name
# (parallel branches whose susceptances cancel, for instance).
SINGULAR_PIVOT_RTOL = 1e-12
# Right-hand sides solved together in ptdf_rows: bounds the temporary buses x batch block.
PTDF_BATCH = 256
# Pre-event balance: units and loads must agree within this share of the total load.
DC_BALANCE_FRACTION = 0.001
# How many buses of an island an error message lists.
ISLAND_LIST = 10


class GridError(CaseError):
    """The branch data cannot describe one connected, solvable DC grid (an input error)."""


class Grid:
    """A connected DC grid, factorised once.

    bus_ids: ids of the buses, position = bus index. from_idx, to_idx: bus index of each
    branch's ends. reactance_pu: per branch, on one common base, nonzero (negative allowed).
    limit_mw: per branch, NaN = not monitored (default: none monitored). slack: bus index
    whose angle is 0 (default the first bus). branch_ids: labels for messages. file, rows:
    where the branches came from (file name and the physical line of each branch), so that
    errors name them as every other input error does.
    """

    def __init__(
        self,
        bus_ids: Sequence,
        from_idx: np.ndarray,
        to_idx: np.ndarray,
        reactance_pu: np.ndarray,
        limit_mw: np.ndarray | None = None,
        *,
        slack: int = 0,
        branch_ids: Sequence | None = None,
        file: str = "links.csv",
        rows: Sequence[int] | None = None,
    ):
        self.bus_ids = np.asarray(list(bus_ids), dtype=object)
        n = len(self.bus_ids)
        f = np.asarray(from_idx, dtype=np.int64).ravel()
        t = np.asarray(to_idx, dtype=np.int64).ravel()
        x = np.asarray(reactance_pu, dtype=float).ravel()
        m = len(f)
        self.branch_ids = (np.asarray(list(branch_ids), dtype=object) if branch_ids is not None
                           else np.arange(m).astype(object))
        self._file = file
        self._rows = None if rows is None else np.asarray(rows, dtype=np.int64)
        if len(t) != m or len(x) != m or len(self.branch_ids) != m:
            raise ValueError("from_idx, to_idx, reactance_pu and branch_ids differ in length")
        if limit_mw is None:
            lim = np.full(m, np.nan)
        else:
            lim = np.asarray(limit_mw, dtype=float).ravel()
            if len(lim) != m:
                raise ValueError("limit_mw differs in length from the branches")
        if n == 0:
            raise GridError([Problem("buses.csv", "the grid has no buses")])
        if not 0 <= slack < n:
            raise ValueError(f"slack bus index {slack} is not in 0..{n - 1}")
        self._check_branches(f, t, x, lim, n)

        self.n_buses, self.n_branches, self.slack = n, m, int(slack)
        self.from_idx, self.to_idx = f, t
        self.reactance_pu, self.limit_mw = x, lim
        self.monitored = np.isfinite(lim)
        self.susceptance_pu = 1.0 / x
        rows_l = np.arange(m)
        # Branch-by-bus incidence, sparse: two entries per branch.
        self.incidence = sp.csr_matrix(
            (np.r_[np.ones(m), -np.ones(m)], (np.r_[rows_l, rows_l], np.r_[f, t])), shape=(m, n))
        self._check_islands()
        self._keep = np.r_[0:self.slack, self.slack + 1:n]  # bus index of each reduced row
        self._factorise()

    # ------------------------------------------------------------------ building
    def _problem(self, k: int, column: str, message: str) -> Problem:
        row = None if self._rows is None else int(self._rows[k])
        return Problem(self._file, f"branch {self.branch_ids[k]}: {message}", row, column)

    def _check_branches(self, f, t, x, lim, n) -> None:
        problems: list[Problem] = []
        for col, idx in (("from_bus", f), ("to_bus", t)):
            for k in np.flatnonzero((idx < 0) | (idx >= n))[:ISLAND_LIST]:
                problems.append(self._problem(k, col, f"bus index {idx[k]} is not in the grid"))
        for k in np.flatnonzero(f == t)[:ISLAND_LIST]:
            problems.append(self._problem(k, "to_bus", "connects a bus to itself"))
        for k in np.flatnonzero(~np.isfinite(x))[:ISLAND_LIST]:
            problems.append(self._problem(k, "reactance_pu", "is not a finite number"))
        for k in np.flatnonzero(x == 0)[:ISLAND_LIST]:
            problems.append(self._problem(k, "reactance_pu", "is zero (a DC branch needs a "
                                          "reactance; merge the two buses instead)"))
        for k in np.flatnonzero(np.isfinite(lim) & (lim <= 0))[:ISLAND_LIST]:
            problems.append(self._problem(k, "limit_mw", f"must be > 0 (got {lim[k]:g}); "
                                          "leave it empty for an unmonitored branch"))
        if problems:
            raise GridError(problems)

    def _check_islands(self) -> None:
        n = self.n_buses
        adj = sp.csr_matrix((np.ones(self.n_branches), (self.from_idx, self.to_idx)),
                            shape=(n, n))
        n_comp, label = csgraph.connected_components(adj, directed=False)
        if n_comp == 1:
            return
        main = label[self.slack]
        problems = []
        for c in range(n_comp):
            if c == main:
                continue
            members = np.flatnonzero(label == c)
            shown = ", ".join(str(b) for b in self.bus_ids[members[:ISLAND_LIST]])
            more = f" and {len(members) - ISLAND_LIST} more" if len(members) > ISLAND_LIST else ""
            problems.append(Problem(
                "buses.csv", f"buses {shown}{more} form an island not connected to bus "
                f"{self.bus_ids[self.slack]} ({n_comp} islands in all)", None, "bus"))
            if len(problems) >= ISLAND_LIST:
                break
        raise GridError(problems)

    def _factorise(self) -> None:
        n = self.n_buses
        if n == 1:
            self._lu = None
            return
        C = self.incidence.tocsc()[:, self._keep]
        self._C_red = C.tocsr()  # branches x (buses - 1)
        B = (C.T @ sp.diags(self.susceptance_pu) @ C).tocsc()
        try:
            # B_r is structurally symmetric: a minimum-degree order on A^T + A gives less
            # fill than the default COLAMD on grids.
            self._lu = spla.splu(B, permc_spec="MMD_AT_PLUS_A")
        except RuntimeError as exc:  # SuperLU: "Factor is exactly singular"
            raise self._singular(str(exc)) from None
        d = np.abs(self._lu.U.diagonal())
        if d.size and d.min() <= SINGULAR_PIVOT_RTOL * d.max():
            raise self._singular(f"pivot {d.min():.3g} against {d.max():.3g}")

    def _singular(self, detail: str) -> GridError:
        neg = np.flatnonzero(self.reactance_pu < 0)
        if neg.size:
            names = ", ".join(str(self.branch_ids[k]) for k in neg[:ISLAND_LIST])
            hint = (f"; negative reactances (series compensation) on branch {names} cancel "
                    "the rest of their path")
            k = int(neg[0])
        else:
            hint, k = "", 0
        return GridError([self._problem(
            k, "reactance_pu", f"the grid's susceptance matrix is singular ({detail}){hint}")])

    @classmethod
    def from_ids(
        cls,
        bus_ids: Sequence,
        from_bus: Sequence,
        to_bus: Sequence,
        reactance_pu: np.ndarray,
        limit_mw: np.ndarray | None = None,
        *,
        slack_bus=None,
        branch_ids: Sequence | None = None,
        file: str = "links.csv",
        rows: Sequence[int] | None = None,
    ) -> Grid:
        """Build from bus ids on the branches (as in links.csv) instead of bus indices;
        an unknown id is an input error naming the branch."""
        index = pd.Index(list(bus_ids))
        if not index.is_unique:
            dup = index[index.duplicated()][0]
            raise GridError([Problem("buses.csv", f"bus id {dup!r} is not unique", None, "bus")])
        f = index.get_indexer(list(from_bus))
        t = index.get_indexer(list(to_bus))
        names = list(branch_ids) if branch_ids is not None else list(range(len(f)))
        problems = []
        for col, ends, idx in (("from_bus", from_bus, f), ("to_bus", to_bus, t)):
            ends = list(ends)
            for k in np.flatnonzero(idx < 0)[:50]:
                row = None if rows is None else int(rows[k])
                problems.append(Problem(file, f"branch {names[k]}: bus {ends[k]!r} is not in "
                                        "buses.csv", row, col))
        if problems:
            raise GridError(problems[:50])
        slack = 0
        if slack_bus is not None:
            if slack_bus not in index:
                raise ValueError(f"slack bus {slack_bus!r} is not in the grid")
            slack = int(index.get_loc(slack_bus))
        return cls(list(index), f, t, reactance_pu, limit_mw, slack=slack, branch_ids=names,
                   file=file, rows=rows)

    @classmethod
    def from_tables(cls, buses, links, *, rows: Sequence[int] | None = None,
                    slack_bus=None, file: str = "links.csv") -> Grid:
        """Build from the buses.csv and links.csv tables of a nodal case (pandas DataFrames
        with bus; link, from_bus, to_bus, reactance_pu, optional limit_mw). rows: the
        physical line of each link in its file, for error messages."""
        limit = links["limit_mw"].to_numpy(float) if "limit_mw" in links else None
        return cls.from_ids(buses["bus"], links["from_bus"], links["to_bus"],
                            links["reactance_pu"].to_numpy(float), limit, slack_bus=slack_bus,
                            branch_ids=links.get("link"),
                            file=file, rows=rows)

    def bus_index(self, ids: Sequence) -> np.ndarray:
        """Bus index of each id (KeyError naming the unknown ids)."""
        idx = pd.Index(list(self.bus_ids)).get_indexer(list(ids))
        if (idx < 0).any():
            missing = [b for b, i in zip(ids, idx) if i < 0][:ISLAND_LIST]
            raise KeyError(f"buses not in the grid: {missing}")
        return idx.astype(np.int64)

    # ------------------------------------------------------------------ solving
    def angles(self, injections_mw: np.ndarray) -> np.ndarray:
        """Bus angles from B_r theta_r = p_r (slack 0), same shape as the injections. With
        injections in MW these are radians times the MVA base, so that b (theta_f -
        theta_t) is in MW."""
        p = np.asarray(injections_mw, dtype=float)
        vec = p.ndim == 1
        P = p[:, None] if vec else p
        if P.shape[0] != self.n_buses:
            raise ValueError(f"injections have {P.shape[0]} rows, the grid {self.n_buses} buses")
        theta = np.zeros_like(P)
        if self._lu is not None:
            theta[self._keep] = self._lu.solve(np.ascontiguousarray(P[self._keep]))
        return theta[:, 0] if vec else theta

    def flows(self, injections_mw: np.ndarray, *, shift_rad: np.ndarray | None = None,
              base_mva: float = 100.0) -> np.ndarray:
        """Branch flows (MW, positive from_bus -> to_bus) of bus injections (MW, positive
        into the grid), (buses,) -> (branches,) or (buses, k) -> (branches, k): one solve
        for all k columns. Each column must sum to zero: a mismatch would otherwise go to
        the slack bus and make the flows depend on which bus that is.

        shift_rad (branches,): phase-shifting transformers' angles, for a base case only
        (flow = b (theta_f - theta_t - shift)); flow changes of injection changes do not
        depend on them. base_mva converts the shift to MW."""
        p = np.asarray(injections_mw, dtype=float)
        P = p[:, None] if p.ndim == 1 else p
        if P.ndim != 2:
            raise ValueError("injections must be (buses,) or (buses, k)")
        if P.shape[0] == self.n_buses and P.size:
            total = P.sum(axis=0)
            scale = np.maximum(1.0, np.abs(P).max(axis=0))
            bad = np.flatnonzero(np.abs(total) > BALANCE_RTOL * scale * self.n_buses)
            if bad.size:
                raise ValueError(f"injections of column {int(bad[0])} sum to "
                                 f"{total[bad[0]]:.6g} MW, not zero")
        if shift_rad is None:
            theta = self.angles(P)
            F = self.susceptance_pu[:, None] * (self.incidence @ theta)
        else:
            # A shift acts as a pair of opposite injections b*phi at the branch ends.
            phi = base_mva * np.asarray(shift_rad, dtype=float).ravel()
            if phi.shape[0] != self.n_branches:
                raise ValueError("shift_rad must have one value per branch")
            bphi = self.susceptance_pu * phi
            theta = self.angles(P + (self.incidence.T @ bphi)[:, None])
            F = self.susceptance_pu[:, None] * (self.incidence @ theta) - bphi[:, None]
        return F[:, 0] if p.ndim == 1 else F

    def ptdf_rows(self, branch_idx: Sequence[int], cols: Sequence[int] | None = None
                  ) -> np.ndarray:
        """PTDF rows of the given branches: (len(branch_idx), buses), or (len(branch_idx),
        len(cols)) with only the bus columns `cols`. Entry [r, j] is the flow change (MW) on
        branch branch_idx[r] per MW injected at bus j and withdrawn at the slack (the slack
        column is 0). Row l of Phi = diag(b) C B_r^-1 is B_r^-T (b_l c_l): one sparse solve
        per requested row, in batches, never the full matrix."""
        br = np.asarray(branch_idx, dtype=np.int64).ravel()
        if br.size and (br.min() < 0 or br.max() >= self.n_branches):
            raise IndexError("branch index out of range")
        col_idx = (np.arange(self.n_buses) if cols is None
                   else np.asarray(cols, dtype=np.int64).ravel())
        out = np.zeros((br.size, col_idx.size))
        if self._lu is None or br.size == 0:
            return out
        # Reduced row of each requested column (-1 for the slack, whose entries stay 0).
        red = np.full(self.n_buses, -1, dtype=np.int64)
        red[self._keep] = np.arange(self.n_buses - 1)
        cr = red[col_idx]
        has = cr >= 0
        for s in range(0, br.size, PTDF_BATCH):
            part = br[s:s + PTDF_BATCH]
            # Right-hand sides b_l c_l (reduced incidence rows), buses-1 x batch, dense only
            # for this batch.
            rhs = (self._C_red[part].multiply(self.susceptance_pu[part][:, None])).T.toarray()
            y = self._lu.solve(rhs, trans="T")
            out[s:s + part.size, has] = y[cr[has]].T
        return out

    def dc_flow(
        self,
        unit_bus_idx: np.ndarray,
        unit_output_mw: np.ndarray,
        bus_load_mw: np.ndarray,
        *,
        balance_fraction: float = DC_BALANCE_FRACTION,
        file: str = "units.csv",
    ) -> np.ndarray:
        """Pre-event branch flows of unit outputs and bus loads (a DC load flow).

        Outputs and loads must balance within balance_fraction (0.1 %) of the total load,
        else an input error giving the mismatch. What mismatch remains is shared by the load
        buses in proportion to their load, so that the flows do not depend on the slack."""
        inj = self.balanced_injections(unit_bus_idx, unit_output_mw, bus_load_mw,
                                       balance_fraction=balance_fraction, file=file)
        return self.flows(inj)

    def balanced_injections(
        self,
        unit_bus_idx: np.ndarray,
        unit_output_mw: np.ndarray,
        bus_load_mw: np.ndarray,
        *,
        balance_fraction: float = DC_BALANCE_FRACTION,
        file: str = "units.csv",
    ) -> np.ndarray:
        """Bus injections (buses,) = outputs at their buses - loads, with the allowed small
        mismatch spread over the loads (see dc_flow)."""
        load = np.asarray(bus_load_mw, dtype=float).ravel()
        if load.shape[0] != self.n_buses:
            raise ValueError("bus_load_mw must have one value per bus")
        gen = np.bincount(np.asarray(unit_bus_idx, dtype=np.int64).ravel(),
                          weights=np.asarray(unit_output_mw, dtype=float).ravel(),
                          minlength=self.n_buses)
        total_load = float(load.sum())
        mismatch = float(gen.sum()) - total_load
        if abs(mismatch) > balance_fraction * max(total_load, 0.0) + 1e-9:
            raise GridError([Problem(
                file, f"unit outputs sum to {gen.sum():.3f} MW and bus loads to "
                f"{total_load:.3f} MW: mismatch {mismatch:+.3f} MW is more than "
                f"{100 * balance_fraction:g} % of the load", None, "output_mw")])
        share = load / total_load if total_load > 0 else np.full(self.n_buses,
                                                                  1.0 / self.n_buses)
        return gen - load - mismatch * share
