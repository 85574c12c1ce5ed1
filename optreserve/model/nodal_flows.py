"""Flow rows of nodal cases: sparse, lazy, in the multiply-by-beta form.

With buses the response of the units is an injection at their buses; the event's power is
taken at its bus (or spread over an area's buses by load), and load self-regulation acts at
every loaded bus. For instance m (direction s, size dP) and a monitored element k (a branch,
or an interface = weighted sum of branches) the settled flow change is

  dF_k = s dP / beta ( sum_p (Phi_kp - Phi_k.w_m) beta_p + Phi_k.v_m ),
  beta_p = sum_c c_mc G_pc - c_j K_j (tripped provider j at its bus),  beta = sum_p beta_p + D,
  v_m = D_b - D w_m (damping at the buses, less its total at the event's buses),

so multiplying the limit |F0_k + dF_k| <= Fmax_k by beta > 0 gives rows linear in the gains:

  sum_p [F0_k - Fmax_k + s dP (Phi_kp - Phi_k.w_m)] beta_p + (F0_k - Fmax_k) D
        + s dP Phi_k.v_m <= 0                                    (and >= 0 with +Fmax_k).

Only the buses that carry providers (p) appear: per-bus, per-dead-band-class aggregates G_pc
are summed from the units' gains. Phi_k.w_m and Phi_k.v_m are, for all k at once, one DC flow
of the vectors w_m and v_m (no PTDF row needed); Phi_kp comes from the grid's PTDF rows of
the active elements only, at the provider buses only (never branches x buses).

Which (instance, element, direction) rows exist is decided by the row generation loop
(solver/rowgen.py); this module only writes the rows it is given.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

from optreserve.model.horizon import Horizon, _removed, effective_factor
from optreserve.model.program import LinearProgram


class NodalFlowRows:
    """What the nodal flow rows of one case need, computed once per solve; PTDF rows of
    monitored elements are computed on first use and kept."""

    def __init__(self, case, hz: Horizon):
        net = case.nodal
        self.net = net
        self.grid = net.grid()
        self.hz = hz
        self.S = net.monitor  # (K, L)
        self.Fmax = net.monitor_limit_mw
        self.F0 = self.S @ case.links["flow_mw"].to_numpy(float)
        self.n_mon = len(self.Fmax)
        # provider buses: buses with a unit that may respond in some block
        prov = hz.capable_b.any(axis=0)
        self.slot_bus, slot = np.unique(net.unit_bus[prov], return_inverse=True)
        self.slot_of_unit = np.full(hz.N, -1, dtype=np.int64)
        self.slot_of_unit[np.flatnonzero(prov)] = slot
        self.n_p = len(self.slot_bus)
        self.D_bus = bus_damping(case, hz.D_a[0])
        self.D_tot = float(self.D_bus.sum())
        # per instance: Phi.w_m and Phi.v_m for every monitored element, from one DC solve
        M = len(hz.dP)
        W = net.event_share[hz.inst_event].toarray().T  # (buses, M)
        e_slack = np.zeros((net.n_buses, 1))
        e_slack[self.grid.slack] = 1.0
        V = self.D_bus[:, None] - self.D_tot * W
        Fw = self.grid.flows(np.c_[W - e_slack, V]) if M else np.zeros((len(net.from_bus), 0))
        self.Pw = np.asarray((self.S @ Fw[:, :M]).T)  # (M, K)
        self.Pv = np.asarray((self.S @ Fw[:, M:]).T)  # (M, K)
        # PTDF rows computed so far (only for elements that got a row): row of each element
        # in self._rows, -1 when not computed yet
        self._row_of = np.full(self.n_mon, -1, dtype=np.int64)
        self._rows = np.zeros((0, self.n_p))

    def ptdf(self, k: np.ndarray) -> np.ndarray:
        """(len(k), provider buses) PTDF rows of monitored elements k (slack column 0)."""
        k = np.asarray(k, dtype=np.int64)
        need = np.unique(k[self._row_of[k] < 0])
        if len(need):
            sub = self.S[need]  # (n, L): the branches these elements weigh
            br = np.unique(sub.indices)
            rows = self.grid.ptdf_rows(br, cols=self.slot_bus)  # (len(br), P)
            pos = np.full(self.S.shape[1], -1, dtype=np.int64)
            pos[br] = np.arange(len(br))
            sub = sp.csr_matrix((sub.data, pos[sub.indices], sub.indptr),
                                shape=(len(need), len(br)))
            self._row_of[need] = len(self._rows) + np.arange(len(need))
            self._rows = np.concatenate([self._rows, sub @ rows])
        return self._rows[self._row_of[k]]

    def weights(self, m, k, sense):
        """Row weights W (rows, P) and constants (rows,) of rows (m, k, sense = +1 upper,
        -1 lower), divided by Fmax_k (keeps coefficients near one)."""
        hz = self.hz
        F0, Fm = self.F0[k], self.Fmax[k]
        sdp = hz.sigma[m] * hz.dP[m]
        base = F0 - sense * Fm
        W = (base[:, None] + sdp[:, None] * (self.ptdf(k) - self.Pw[m, k][:, None])) / Fm[:, None]
        const = (base * self.D_tot + sdp * self.Pv[m, k]) / Fm
        return W, const

    def add(self, lp: LinearProgram, info, K_block, active) -> None:
        """Per-bus aggregates and the active rows (m, k, sense arrays) into lp."""
        hz = self.hz
        N = hz.N
        n_k = len(info.classes)
        sig = np.concatenate([hz.block[:, None], hz.avail.astype(np.int64)], axis=1)
        _, first = np.unique(sig, axis=0, return_index=True)
        n_g = len(first)
        Gp = lp.add_vars("G_bus", n_g * self.n_p * n_k, 0.0, np.inf)
        gg, ii = np.nonzero(hz.avail[first] & (self.slot_of_unit >= 0)[None, :])
        b = hz.block[first][gg]
        n_rows = n_g * self.n_p * n_k
        row_of = (gg * self.n_p + self.slot_of_unit[ii]) * n_k + info.unit_class[ii]
        lp.add_rows("aggregate_bus", n_rows, np.r_[np.arange(n_rows), row_of],
                    np.r_[Gp.idx(), K_block.idx(b * N + ii)],
                    np.r_[np.ones(n_rows), -np.ones(len(ii))], lo=0.0, hi=0.0)
        m, k, sense = active
        self.active = (m, k, sense)
        R = len(m)
        if R == 0:
            return
        W, const = self.weights(m, k, sense)
        c = effective_factor(info.classes, info.x_hat[m])  # (R, n_k)
        g = info.group_of_t[hz.inst_t[m]]
        coef = W[:, :, None] * c[:, None, :]  # (R, P, n_k)
        cols = Gp.idx(((g[:, None] * self.n_p + np.arange(self.n_p)[None, :])[:, :, None] * n_k
                       + np.arange(n_k)[None, None, :]).reshape(-1))
        rows = np.repeat(np.arange(R), self.n_p * n_k)
        vals = coef.reshape(-1)
        # providers that respond in the period but not in the instance (the tripped unit,
        # an absent provider): -c_j K_j W[row, bus of j] in every active row of the instance
        for arr in (hz.trip, hz.absent):
            jj = arr[m]
            ok = jj >= 0
            ok[ok] = hz.avail[hz.inst_t[m[ok]], jj[ok]] & (self.slot_of_unit[jj[ok]] >= 0)
            r, jj = np.flatnonzero(ok), jj[ok]
            tt = m[r]
            with np.errstate(divide="ignore", invalid="ignore"):
                cj = np.clip(1.0 - hz.d_hz[jj] / np.where(info.x_hat[tt] > 0, info.x_hat[tt],
                                                           np.inf), 0.0, 1.0)
            rows = np.r_[rows, r]
            cols = np.r_[cols, K_block.idx(hz.block[hz.inst_t[tt]] * N + jj)]
            vals = np.r_[vals, -cj * W[r, self.slot_of_unit[jj]]]
        nz = vals != 0
        lo = np.where(sense < 0, -const, -np.inf)
        hi = np.where(sense > 0, -const, np.inf)
        lp.add_rows("nodal_flow", R, rows[nz], cols[nz], vals[nz], lo=lo, hi=hi)

    def _beta_p(self, lp: LinearProgram, info, x) -> np.ndarray:
        """(M, P) the model's beta_p per instance and provider bus at solution x."""
        hz = self.hz
        n_k = len(info.classes)
        G = lp.value(x, "G_bus").reshape(-1, self.n_p, n_k)
        K = lp.value(x, "K")
        c = effective_factor(info.classes, info.x_hat)  # (M, n_k)
        g = info.group_of_t[hz.inst_t]
        beta_p = (G[g] * c[:, None, :]).sum(axis=2)  # (M, P)
        te, j = _removed(hz, np.arange(len(hz.dP)))
        ok = self.slot_of_unit[j] >= 0
        te, j = te[ok], j[ok]
        with np.errstate(divide="ignore", invalid="ignore"):
            cj = np.clip(1.0 - hz.d_hz[j] / np.where(info.x_hat[te] > 0, info.x_hat[te],
                                                      np.inf), 0.0, 1.0)
        np.subtract.at(beta_p, (te, self.slot_of_unit[j]),
                       cj * K[hz.block[hz.inst_t[te]] * hz.N + j])
        return beta_p

    def predicted(self, lp: LinearProgram, info, x, m, k) -> np.ndarray:
        """The model's own flows of elements k after instances m (pairs) at its solution:
        F0 + s dP (sum_p (Phi_kp - Phi_k.w_m) beta_p + Phi_k.v_m) / beta."""
        hz = self.hz
        beta_p = self._beta_p(lp, info, x)
        beta = beta_p.sum(axis=1) + self.D_tot
        bp = beta_p[m]
        num = ((self.ptdf(k) - self.Pw[m, k][:, None]) * bp).sum(axis=1) + self.Pv[m, k]
        with np.errstate(divide="ignore", invalid="ignore"):
            dF = np.where(beta[m] > 0, hz.sigma[m] * hz.dP[m] * num / beta[m], 0.0)
        return self.F0[k] + dF


    def price_terms(self, lp: LinearProgram, info, x):
        """For the event prices (envelope theorem, solver/prices.py): per active row its
        instance m and d(row - bound)/d dP = s (sum_p (Phi_kp - Phi_k.w_m) beta_p
        + Phi_k.v_m) / Fmax_k at solution x."""
        m, k, _ = getattr(self, "active", (np.zeros(0, np.int64),) * 3)
        if len(m) == 0:
            return m, np.zeros(0)
        bp = self._beta_p(lp, info, x)[m]
        num = ((self.ptdf(k) - self.Pw[m, k][:, None]) * bp).sum(axis=1) + self.Pv[m, k]
        return m, self.hz.sigma[m] * num / self.Fmax[k]


def bus_damping(case, D_area: np.ndarray) -> np.ndarray:
    """Load self-regulation per bus [MW/Hz]: each area's D_a over its buses by load."""
    net = case.nodal
    load = net.buses["load_mw"].to_numpy(float)
    a = net.bus_area
    area_load = np.bincount(a, weights=load, minlength=len(D_area))
    with np.errstate(divide="ignore", invalid="ignore"):
        per_mw = np.where(area_load > 0, np.asarray(D_area, float) / area_load, 0.0)
    return load * per_mw[a]
