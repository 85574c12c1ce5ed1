"""Reference calculations written for the tests, sharing no code with optreserve.

- settled deviation: the quasi-steady-state power balance after a step (swing equation with
  d/dt = 0): sum_i min(K_i (x - d_i)^+, r_i) + D x = |dP|, solved with scipy.optimize.brentq
  as reference root finder;
- tie flows: an independent DC load flow, angles from numpy.linalg.lstsq on the full (singular)
  Laplacian B = C^T diag(1/x) C, flow_l = (theta_from - theta_to) / x_l.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.optimize import brentq


def settled_deviation(dP, gain, deadband_hz, headroom, damping_mw_per_hz) -> float:
    """|x| solving the balance above (inf when the response saturates short of |dP|)."""
    dP = abs(float(dP))
    K = np.asarray(gain, float)
    d = np.asarray(deadband_hz, float)
    r = np.asarray(headroom, float)
    D = float(damping_mw_per_hz)

    def excess(x):
        return float(np.sum(np.minimum(K * np.maximum(x - d, 0.0), r)) + D * x - dP)

    if dP == 0.0:
        return 0.0
    hi = 1e-3
    while excess(hi) < 0.0:
        hi *= 2.0
        if hi > 1e6:
            return math.inf
    return brentq(excess, 0.0, hi, xtol=1e-14, rtol=1e-14, maxiter=500)


def dc_flows(area_ids, links, injection_mw) -> np.ndarray:
    """links: iterable of (from_area, to_area, reactance). Injections must sum to zero."""
    pos = {a: k for k, a in enumerate(area_ids)}
    links = list(links)
    C = np.zeros((len(links), len(area_ids)))
    b = np.zeros(len(links))
    for k, (f, t, x) in enumerate(links):
        C[k, pos[f]] = 1.0
        C[k, pos[t]] = -1.0
        b[k] = 1.0 / float(x)
    L = C.T @ (b[:, None] * C)
    P = np.asarray(injection_mw, float)
    assert abs(P.sum()) < 1e-6 * max(1.0, np.abs(P).sum()), "injections must balance"
    theta = np.linalg.lstsq(L, P, rcond=None)[0]
    return b * (C @ theta)


def event_response(case, gain, headroom_up, headroom_down, event_row):
    """Independent settled point of one event of a loaded case for the given allocation.

    Returns (signed deviation Hz, per-area injection change MW, post-event link flows MW).
    Sign conventions from the case format: size_mw > 0 is a deficit (frequency falls); a
    unit_trip removes that unit's output and its response; flows positive from -> to."""
    u, a, lk = case.units, case.areas, case.links
    size = float(event_row["size_mw"])
    deficit = size > 0
    K = np.array(gain, float)
    if event_row["kind"] == "unit_trip":
        K[list(u["unit"]).index(event_row["unit"])] = 0.0
    r = np.asarray(headroom_up if deficit else headroom_down, float)
    d = u["deadband_mhz"].to_numpy(float) / 1000.0
    D_a = a["load_mw"].to_numpy(float) * a["load_damping_pct_per_hz"].to_numpy(float) / 100.0
    x = settled_deviation(size, K, d, r, D_a.sum())
    resp = np.minimum(K * np.maximum(x - d, 0.0), r)
    area_ids = list(a["area"])
    inj = np.zeros(len(area_ids))
    for k, area in enumerate(u["area"]):
        inj[area_ids.index(area)] += resp[k]
    inj += D_a * x
    inj[area_ids.index(event_row["area"])] -= abs(size)
    sgn = 1.0 if deficit else -1.0
    if len(lk):
        flows = lk["flow_mw"].to_numpy(float) + dc_flows(
            area_ids, zip(lk["from_area"], lk["to_area"], lk["reactance_pu"]), sgn * inj)
    else:
        flows = np.zeros(0)
    return -sgn * x, sgn * inj, flows
