"""An independent dense reserve model for small single-area cases, solved with
scipy.optimize.milp (the outside reference optimiser). Written for the tests from the case
format's definitions (shared/design/case-format.md), sharing no code with optreserve.

Decisions per unit i: gain K_i [MW/Hz], participation u_i (binary; or one binary per droop
step), headroom r_up_i, r_dn_i [MW]. No dead bands (d = 0), so a provider's settled response
at deviation F is K_i F and full activation at F_act asks r >= K_i F_act.
  band:      u_i K_lo_i <= K_i <= u_i K_band_i       (steps: K_i = sum_s g_is z_is, sum z <= 1)
  always on: u_i = 1 (steps: sum_s z_is = 1)
  headroom:  r_dir_i >= F_act K_i where unit i responds in that direction and the case has
             events that way; 0 <= r_dir_i <= cap_dir_i (room, caps, energy); r_dir_i = 0
             where the direction is blocked
  own:       sum_i r_up_i >= min_own_reserve_mw (one area); r_up_i <= cap_up_i x
             participation (only a provider that takes part holds headroom)
  event e:   sum over units responding in e's direction and not lost in e of F K_i
             + F D >= |dP_e|                          (general law: df = -dP / sum beta)
  cost:      sum price_up r_up + price_dn r_dn (per hour)
"""

from __future__ import annotations

import numpy as np
from scipy.optimize import Bounds, LinearConstraint, milp


def dense_optimum(cap_mw, droop_min_pct, droop_max_pct, f_n, F, F_act, D_mw_per_hz,
                  room_up, room_dn, price_up, price_dn, resp_up, resp_dn, events,
                  always=None, steps_pct=None, own_mw=0.0):
    """events: list of (signed size MW, set of lost unit indices); own_mw: up headroom the
    area must hold (min_own_reserve_mw). Returns (cost, K, r_up, r_dn) of the optimum, or None
    when infeasible."""
    cap = np.asarray(cap_mw, float)
    n = len(cap)
    K_lo = cap / (np.asarray(droop_max_pct, float) / 100 * f_n)
    K_band = cap / (np.asarray(droop_min_pct, float) / 100 * f_n)
    resp_up, resp_dn = np.asarray(resp_up, bool), np.asarray(resp_dn, bool)
    always = np.zeros(n, bool) if always is None else np.asarray(always, bool)
    need_up = any(s > 0 for s, _ in events)
    need_dn = any(s < 0 for s, _ in events)
    if steps_pct is None:
        n_z = n
    else:
        s = np.asarray(steps_pct, float)
        inside = (s[None, :] >= np.asarray(droop_min_pct)[:, None] - 1e-9) & (
            s[None, :] <= np.asarray(droop_max_pct)[:, None] + 1e-9)
        zi, zk = np.nonzero(inside)
        g = cap[zi] / (s[zk] / 100 * f_n)
        n_z = len(zi)
    # columns: K (n), z or u (n_z), r_up (n), r_dn (n)
    nv = 3 * n + n_z
    iK, iZ, iU, iD = 0, n, n + n_z, 2 * n + n_z
    c = np.zeros(nv)
    c[iU:iU + n] = price_up
    c[iD:iD + n] = price_dn
    lo, hi = np.zeros(nv), np.full(nv, np.inf)
    hi[iZ:iZ + n_z] = 1
    hi[iU:iU + n] = np.where(resp_up, room_up, 0.0)
    hi[iD:iD + n] = np.where(resp_dn, room_dn, 0.0)
    integrality = np.zeros(nv)
    integrality[iZ:iZ + n_z] = 1
    rows, rlo, rhi = [], [], []

    def row(coefs, a, b):
        v = np.zeros(nv)
        for k, x in coefs:
            v[k] += x
        rows.append(v)
        rlo.append(a)
        rhi.append(b)

    for i in range(n):
        if steps_pct is None:
            row([(iK + i, 1), (iZ + i, -K_band[i])], -np.inf, 0)
            row([(iK + i, 1), (iZ + i, -K_lo[i])], 0, np.inf)
            if always[i]:
                lo[iZ + i] = 1
        else:
            mine = np.nonzero(zi == i)[0]
            row([(iK + i, 1)] + [(iZ + k, -g[k]) for k in mine], 0, 0)
            row([(iZ + k, 1) for k in mine], 1 if always[i] else -np.inf, 1)
        # only a participating provider holds headroom (case format: "held by providers")
        part = [(iZ + i, 1.0)] if steps_pct is None else [(iZ + k, 1.0)
                                                          for k in np.nonzero(zi == i)[0]]
        if np.isfinite(hi[iU + i]):
            row([(iU + i, 1.0)] + [(k, -v * hi[iU + i]) for k, v in part], -np.inf, 0)
        if need_up and resp_up[i]:
            row([(iU + i, 1), (iK + i, -F_act)], 0, np.inf)
        if need_dn and resp_dn[i]:
            row([(iD + i, 1), (iK + i, -F_act)], 0, np.inf)
        if not (resp_up[i] or resp_dn[i]):
            hi[iK + i] = 0
    for size, lost in events:
        resp = resp_up if size > 0 else resp_dn
        row([(iK + i, F) for i in range(n) if resp[i] and i not in lost], abs(size) - F
            * D_mw_per_hz, np.inf)
    if own_mw > 0:
        row([(iU + i, 1) for i in range(n)], own_mw, np.inf)
    res = milp(c, constraints=LinearConstraint(np.array(rows), rlo, rhi),
               integrality=integrality, bounds=Bounds(lo, hi),
               options={"mip_rel_gap": 1e-12, "presolve": True})
    if res.x is None:
        return None
    x = res.x
    return float(res.fun), x[iK:iK + n], x[iU:iU + n], x[iD:iD + n]
