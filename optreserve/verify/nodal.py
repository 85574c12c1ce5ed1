"""Independent post-event flows of a nodal case: from the settled responses of an allocation
(verify/settle.py) to bus injections and one sparse DC load flow per event.

Shares nothing with the optimisation model (imports nothing from model/): it starts from the
per-unit responses and the settled deviation and recomputes the flows on every branch, so
that it can check the optimiser's flow rows and find the rows the optimiser still needs.
"""

from __future__ import annotations

import numpy as np


def nodal_injections(case, deviation_hz, response_mw, size_mw, event_index) -> np.ndarray:
    """(buses, M) change of net bus injection [MW] of M settled event instances.

    deviation_hz (M,) signed (negative: under-frequency); response_mw (M, N) signed like the
    power each unit adds; size_mw (M,) signed event size (> 0 deficit); event_index (M,) row
    of case.events. Load self-regulation acts at every bus in proportion to its load (the
    area's load_damping_pct_per_hz)."""
    net = case.nodal
    buses = net.buses
    n_b = len(buses)
    M = len(size_mw)
    load = buses["load_mw"].to_numpy(float)
    pct = case.areas["load_damping_pct_per_hz"].to_numpy(float)[net.bus_area]
    damp = load * pct / 100.0  # MW/Hz per bus
    dev = np.where(np.isfinite(deviation_hz), deviation_hz, 0.0)
    inj = np.zeros((n_b, M))
    resp = np.asarray(response_mw, float)
    np.add.at(inj, net.unit_bus, resp.T)
    inj -= damp[:, None] * dev[None, :]  # frequency down (dev < 0): load falls, injection up
    share = net.event_share[np.asarray(event_index)].toarray().T  # (buses, M)
    inj -= share * np.asarray(size_mw, float)[None, :]
    # settle_batch balances response and damping against the event to round-off; whatever
    # round-off is left is taken where the event is (so it cannot reach a slack bus)
    inj -= share * inj.sum(axis=0)[None, :]
    return inj


def nodal_flows_after(case, deviation_hz, response_mw, size_mw, event_index) -> np.ndarray:
    """(M, links) flow on every branch after each instance: pre-event flow_mw plus the DC
    flow of the injection changes (one factorisation, one solve for all instances)."""
    net = case.nodal
    inj = nodal_injections(case, deviation_hz, response_mw, size_mw, event_index)
    F0 = case.links["flow_mw"].to_numpy(float)
    if inj.shape[1] == 0:
        return np.zeros((0, len(F0)))
    return F0[None, :] + net.grid().flows(inj).T


def monitored(case, flows_mw: np.ndarray) -> np.ndarray:
    """(M, monitored elements) flows of the limited links and interfaces."""
    return np.asarray((case.nodal.monitor @ np.asarray(flows_mw).T).T)


def interchange(case, flows_mw: np.ndarray) -> tuple[list, np.ndarray]:
    """Net flow from area i to area j (i < j in areas.csv order) over their tie lines, for
    each row of flows_mw (M, links): the area pairs with a tie, and (M, pairs) MW."""
    net = case.nodal
    a_f = net.bus_area[net.from_bus]
    a_t = net.bus_area[net.to_bus]
    tie = a_f != a_t
    lo, hi = np.minimum(a_f, a_t), np.maximum(a_f, a_t)
    sign = np.where(a_f == lo, 1.0, -1.0)
    pairs = sorted(set(zip(lo[tie].tolist(), hi[tie].tolist())))
    out = np.zeros((flows_mw.shape[0], len(pairs)))
    for q, (i, j) in enumerate(pairs):
        sel = tie & (lo == i) & (hi == j)
        out[:, q] = (flows_mw[:, sel] * sign[sel]).sum(axis=1)
    return pairs, out
