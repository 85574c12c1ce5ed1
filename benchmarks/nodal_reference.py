"""A lean, independent constraint-generation solve of a nodal case, for benchmarks/
nodal_scale.py to measure optreserve against. Uses only pandas, scipy and highspy; imports
nothing from optreserve.

The same problem as optreserve's on the benchmark cases (no dead bands, deficits only, no
own-area reserve): per-unit gain K (MW/Hz) inside the droop band or off (binary u), up
headroom r >= K F_act at its price, every event settled within F (sum K F + D F >= dP, the
tripped unit out), and every limited branch after every event within its limit in the
multiply-by-beta form on the unit columns directly:

  sum_i [F0 - s Fmax + dP (Phi_l,bus(i) - Phi_l.w)] K_i + (F0 - s Fmax) D + dP Phi_l.(D_b - D w)
      <= 0 (s = +1)  or  >= 0 (s = -1).

Loop: solve, compute every branch flow after every event (one sparse LU solve for all
events), add the violated rows (HiGHS addRows), solve again, until none is violated. Writes
allocation.csv, events.csv and links.csv (monitored branches per event).

    python benchmarks/nodal_reference.py CASE_FOLDER OUT_FOLDER
"""

from __future__ import annotations

import json
import resource
import sys
import time
import tomllib
from pathlib import Path

import highspy
import numpy as np
import pandas as pd
import scipy.sparse as sp
import scipy.sparse.linalg as spla

TOL_MW = 1e-3  # a flow counts as violated above limit + 1e-3 MW per 100 MW of limit (>= 1e-3)


def main(folder: str, out: str) -> dict:
    t0 = time.perf_counter()
    f = Path(folder)
    cfg = tomllib.loads((f / "case.toml").read_text())
    f_n = float(cfg.get("nominal_frequency_hz", 50.0))
    F = float(cfg["limits"]["max_settled_deviation_hz"])
    F_act = float(cfg["limits"].get("full_activation_deviation_hz", F))
    ids = {"bus": str, "area": str, "unit": str, "from_bus": str, "to_bus": str}
    buses = pd.read_csv(f / "buses.csv", dtype=ids)
    units = pd.read_csv(f / "units.csv", dtype=ids)
    links = pd.read_csv(f / "links.csv", dtype=ids)
    areas = pd.read_csv(f / "areas.csv", dtype=ids)
    events = pd.read_csv(f / "events.csv", dtype=ids, keep_default_na=False)

    bpos = pd.Index(buses["bus"])
    nb = len(buses)
    load = buses["load_mw"].to_numpy(float)
    pct = areas.set_index("area")["load_damping_pct_per_hz"].reindex(buses["area"]).to_numpy()
    Db = load * pct / 100.0
    D = Db.sum()
    fb, tb = bpos.get_indexer(links["from_bus"]), bpos.get_indexer(links["to_bus"])
    b = 1.0 / links["reactance_pu"].to_numpy(float)
    L = len(links)
    C = sp.csr_matrix((np.r_[np.ones(L), -np.ones(L)], (np.r_[np.arange(L), np.arange(L)],
                                                        np.r_[fb, tb])), shape=(L, nb))
    Bred = (C.T @ sp.diags(b) @ C).tocsc()[1:, 1:]
    lu = spla.splu(Bred.tocsc())
    F0 = links["flow_mw"].to_numpy(float)
    lim = links["limit_mw"].to_numpy(float)
    mon = np.flatnonzero(np.isfinite(lim))

    def flows(P):  # (nb, k) balanced injections -> (L, k) flows, slack bus 0
        th = np.zeros_like(P)
        th[1:] = lu.solve(np.ascontiguousarray(P[1:]))
        return b[:, None] * (C @ th)

    cap = units["capacity_mw"].to_numpy(float)
    out_mw = units["output_mw"].to_numpy(float)
    prov = units["provides"].astype(str).str.lower().isin(["true", "1", "yes"]).to_numpy()
    K_lo = cap / (units["droop_max_pct"].to_numpy(float) / 100 * f_n)
    K_hi = np.minimum(cap / (units["droop_min_pct"].to_numpy(float) / 100 * f_n),
                      np.maximum(cap - out_mw, 0) / F_act)
    cand = np.flatnonzero(prov & (K_hi >= K_lo * (1 - 1e-12)))
    n = len(cand)
    ubus = bpos.get_indexer(units["bus"])[cand]
    price = units["price_up_per_mw_h"].to_numpy(float)[cand]
    upos = {u: k for k, u in enumerate(units["unit"])}
    cpos = np.full(len(units), -1)
    cpos[cand] = np.arange(n)

    E = len(events)
    dP = events["size_mw"].astype(float).to_numpy()
    trip = np.array([cpos[upos[u]] if k == "unit_trip" else -1
                     for k, u in zip(events["kind"], events["unit"])])
    W = np.zeros((nb, E))  # where each event's power goes
    for e, r in enumerate(events.itertuples()):
        if r.kind == "unit_trip":
            W[bpos.get_loc(units["bus"].iat[upos[r.unit]]), e] = 1.0
        elif r.bus:
            W[bpos.get_loc(r.bus), e] = 1.0
        else:
            sel = (buses["area"] == r.area).to_numpy() & (load > 0)
            W[sel, e] = load[sel] / load[sel].sum()
    e0 = np.zeros((nb, 1))
    e0[0] = 1.0
    FW = flows(np.c_[W - e0, Db[:, None] - D * W])
    Pw, Pv = FW[:, :E], FW[:, E:]  # (L, E)

    h = highspy.Highs()
    h.setOptionValue("output_flag", False)
    if "mip_gap" in cfg.get("solver", {}):
        h.setOptionValue("mip_rel_gap", float(cfg["solver"]["mip_gap"]))
    inf = highspy.kHighsInf
    # columns: K (n), u (n), r (n)
    h.addVars(3 * n, np.zeros(3 * n), np.r_[K_hi[cand], np.ones(n), np.maximum(cap - out_mw,
                                                                               0)[cand]])
    h.changeColsCost(3 * n, np.arange(3 * n, dtype=np.int32), np.r_[np.zeros(2 * n), price])
    h.changeColsIntegrality(n, np.arange(n, 2 * n, dtype=np.int32),
                            np.full(n, highspy.HighsVarType.kInteger))
    k = np.arange(n)

    def add_rows(lo, hi, rows, cols, vals, m):
        A = sp.csr_matrix((vals, (rows, cols)), shape=(m, 3 * n))
        h.addRows(m, np.asarray(lo, float), np.asarray(hi, float), A.nnz,
                  A.indptr[:-1].astype(np.int32), A.indices.astype(np.int32), A.data)

    add_rows(np.full(n, -inf), np.zeros(n), np.r_[k, k], np.r_[k, n + k],
             np.r_[np.ones(n), -K_hi[cand]], n)
    add_rows(np.zeros(n), np.full(n, inf), np.r_[k, k], np.r_[k, n + k],
             np.r_[np.ones(n), -K_lo[cand]], n)
    add_rows(np.zeros(n), np.full(n, inf), np.r_[k, k], np.r_[2 * n + k, k],
             np.r_[np.ones(n), -np.full(n, F_act)], n)
    on = np.ones((E, n))
    on[np.flatnonzero(trip >= 0), trip[trip >= 0]] = 0.0
    er, ec = np.nonzero(on)
    add_rows(dP - F * D, np.full(E, inf), er, ec, np.full(len(er), F), E)

    have = np.zeros((E, L, 2), dtype=bool)
    passes = 0
    while True:
        passes += 1
        h.run()
        if h.getModelStatus() != highspy.HighsModelStatus.kOptimal:
            raise SystemExit(f"reference: {h.modelStatusToString(h.getModelStatus())}")
        x = np.asarray(h.getSolution().col_value)
        K = np.where(x[:n] > 1e-9, x[:n], 0.0)
        Ke = K[None, :] * on  # (E, n)
        dev = dP / (Ke.sum(axis=1) + D)
        inj = np.zeros((nb, E))
        np.add.at(inj, ubus, (Ke * dev[:, None]).T)
        inj += Db[:, None] * dev[None, :] - W * dP[None, :]
        Fa = F0[:, None] + flows(inj)  # (L, E)
        viol = np.zeros((E, L, 2), dtype=bool)
        tol = TOL_MW * np.maximum(1.0, lim[mon] / 100)
        viol[:, mon, 0] = (Fa[mon] > lim[mon][:, None] + tol[:, None]).T
        viol[:, mon, 1] = (Fa[mon] < -lim[mon][:, None] - tol[:, None]).T
        viol &= ~have
        if not viol.any():
            break
        ee, ll, ss = np.nonzero(viol)
        br = np.unique(ll)
        rhs = (C[br].multiply(b[br][:, None])).T.toarray()[1:]  # PTDF rows: B_r^-T (b_l c_l)
        y = np.zeros((nb, len(br)))
        y[1:] = lu.solve(rhs, trans="T")
        Phi = y[ubus].T  # (len(br), n) at the unit buses
        row_of = np.searchsorted(br, ll)
        sgn = np.where(ss == 0, 1.0, -1.0)
        base = F0[ll] - sgn * lim[ll]
        coef = (base[:, None] + dP[ee][:, None] * (Phi[row_of] - Pw[ll, ee][:, None])) * on[ee]
        const = base * D + dP[ee] * Pv[ll, ee]
        R = len(ee)
        rr, cc = np.nonzero(coef)
        add_rows(np.where(sgn < 0, -const, -inf), np.where(sgn > 0, -const, inf), rr, cc,
                 coef[rr, cc], R)
        have |= viol

    objective = float(price @ x[2 * n:])
    o = Path(out)
    o.mkdir(parents=True, exist_ok=True)
    gain = np.zeros(len(units))
    gain[cand] = K
    head = np.zeros(len(units))
    head[cand] = x[2 * n:]
    with np.errstate(divide="ignore"):
        droop = np.where(gain > 0, cap / (gain * f_n) * 100, np.nan)
    pd.DataFrame({"unit": units["unit"], "droop_pct": droop, "gain_mw_per_hz": gain,
                  "headroom_up_mw": head}).to_csv(o / "allocation.csv", index=False)
    pd.DataFrame({"event": events["event"], "size_mw": dP, "settled_deviation_hz": -dev}).to_csv(
        o / "events.csv", index=False)
    pd.DataFrame({"link": np.tile(links["link"].to_numpy(object)[mon], E),
                  "event": np.repeat(events["event"].to_numpy(object), len(mon)),
                  "flow_before_mw": np.tile(F0[mon], E), "flow_after_mw": Fa[mon].T.reshape(-1),
                  "limit_mw": np.tile(lim[mon], E)}).to_csv(o / "links.csv", index=False)
    return {"wall_s": time.perf_counter() - t0, "objective": objective, "passes": passes,
            "rows": int(have.sum()),
            "peak_rss_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}


if __name__ == "__main__":
    print(json.dumps(main(sys.argv[1], sys.argv[2])))
