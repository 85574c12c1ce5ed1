"""Reading a solved program back: per-period values, the model's own prediction of settled
points and flows, and the independent exact evaluation they are checked against."""

from __future__ import annotations

import numpy as np

from optreserve.case.data import Case
from optreserve.case.nodal import area_level
from optreserve.errors import VerificationError
from optreserve.model.build import ModelInfo
from optreserve.model.horizon import (
    Horizon,
    direction_key,
    effective_factor,
    out_pairs,
    responds,
    responds_in,
)
from optreserve.model.program import LinearProgram
from optreserve.output.results import Result
from optreserve.solver.backends import Outcome
from optreserve.verify.breaks import evaluate
from optreserve.verify.roundoff import snap_up
from optreserve.verify.settle import BatchPoints

# An independent recalculation may differ from the optimiser's own figures by this much
# before it counts as an error.
AGREE_HZ = 0.5e-3


AGREE_MW = 0.5


def dispatch_view(hz: Horizon, lp: LinearProgram, x: np.ndarray) -> Horizon:
    """Under co-optimisation: the stacked case at the dispatch found (outputs, pre-event flows
    F0 = Phi (P_a - L_a), and trip sizes that follow the tripped unit's output)."""
    if not hz.co_opt:
        return hz
    from dataclasses import replace

    T, N = hz.T, hz.N
    out = hz.out.copy()
    tt, ii = np.nonzero(np.broadcast_to(hz.disp, (T, N)))
    out[tt, ii] = np.round(lp.value(x, "p"), 6)  # 1 W: below it is solver round-off
    onehot = np.zeros((N, hz.load.shape[1]))
    onehot[np.arange(N), hz.area] = 1.0
    F0 = np.einsum("tla,ta->tl", hz.Phi, out @ onehot - hz.load)
    mv = hz.dP_var >= 0
    size = np.where(mv, out[hz.inst_t, np.maximum(hz.dP_var, 0)], hz.sigma * hz.dP)
    return replace(hz, out=out, F0=F0, dP=np.abs(size), sigma=np.where(size < 0, -1.0, 1.0))


def period_values(lp: LinearProgram, info: ModelInfo, x: np.ndarray):
    """Per period (T, N): gain that responds, up and down headroom."""
    hz = info.hz
    N, T = hz.N, hz.T
    K = lp.value(x, "K").reshape(hz.n_blocks, N)
    K = np.where(K > 1e-9, K, 0.0)
    gain = K[hz.block] * hz.avail
    r_up = lp.value(x, "r_up").reshape(T, N)
    r_dn = lp.value(x, "r_dn").reshape(T, N)
    # the solver may leave headroom a hair (its feasibility tolerance) below what the droop
    # needs at full activation: report the rule's value, not the round-off (verify/roundoff)
    need = gain * hz.a_act[None, :]
    up, dn = responds(hz)
    r_up = snap_up(r_up, need, hz.need_up[:, None] & up)
    r_dn = snap_up(r_dn, need, hz.need_dn[:, None] & dn)
    return gain, np.where(r_up > 1e-9, r_up, 0.0), np.where(r_dn > 1e-9, r_dn, 0.0)


def exact_points(info: ModelInfo, lp: LinearProgram, x: np.ndarray) -> BatchPoints:
    """Independent settled points of every event instance (scalar balance + DC flows)."""
    gain, r_up, r_dn = period_values(lp, info, x)
    return evaluate_allocation(info.case, info.hz, gain, r_up, r_dn)


def evaluate_allocation(case: Case, hz: Horizon, gain, r_up, r_dn) -> BatchPoints:
    """Independent settled points of every instance for per-period gains and headroom."""
    case = area_level(case)  # nodal flows: verify/nodal.py (solver/rowgen.py)
    return evaluate(case, hz, gain, r_up, r_dn)


def model_beta(lp: LinearProgram, info: ModelInfo, x: np.ndarray) -> np.ndarray:
    """beta'_ma (MW/Hz) per event instance and area as the model sees it: dead-band-reduced
    gains at the guess x_hat, tripped unit out, plus load self-regulation."""
    hz = info.hz
    n_a, n_k = len(info.case.areas), len(info.classes)
    K = lp.value(x, "K")
    G = lp.value(x, "G").reshape(-1, n_a, n_k)
    t = hz.inst_t
    c = effective_factor(info.classes, info.x_hat)  # (M, K)
    beta = (G[info.group_of_t[direction_key(hz)]] * c[:, None, :]).sum(axis=2) + hz.D_a[t]
    resp = responds_in(hz)  # (M, N)
    m, j = out_pairs(hz)  # providers that respond in the period but not here
    m, j = m[resp[m, j]], j[resp[m, j]]
    with np.errstate(divide="ignore", invalid="ignore"):
        cj = np.clip(1.0 - hz.d_hz[j] / np.where(info.x_hat[m] > 0, info.x_hat[m], np.inf),
                     0.0, 1.0)
    np.subtract.at(beta, (m, hz.area[j]), cj * K[hz.block[t[m]] * hz.N + j])
    return beta


def model_prediction(lp: LinearProgram, info: ModelInfo, x: np.ndarray):
    """The optimiser's own view of each event instance: settled |df| = dP / beta' and link
    flows from the multiply-by-beta' form, at the gains it chose."""
    hz = info.hz
    beta = model_beta(lp, info, x)
    t = hz.inst_t
    B = beta.sum(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        dev = np.where(hz.dP > 0, hz.dP / B, 0.0)
        share = beta / B[:, None]
    Phi = hz.Phi[t]  # (M, L, A)
    F0 = hz.F0[t]
    Phi_e = np.take_along_axis(Phi, hz.inst_area[:, None, None], axis=2)[:, :, 0]
    flows = F0 + (hz.sigma * hz.dP)[:, None] * (np.einsum("mla,ma->ml", Phi, share) - Phi_e)
    flows[hz.dP == 0] = F0[hz.dP == 0]
    return dev, flows


def _make_result(case: Case, lp: LinearProgram, info: ModelInfo, out: Outcome,
                 relax: bool, points: BatchPoints | None = None,
                 check_model: bool = True) -> Result:
    """The Result of a pass, verified independently. check_model=False (a pass the time
    limit stopped before its settled guess converged): the optimiser's own figures rest on
    that guess, so only the limits themselves are checked, not the agreement."""
    if points is None:
        points = exact_points(info, lp, out.x)
    dev_model, flow_model = model_prediction(lp, info, out.x)
    dev_exact = np.abs(points.deviation_hz)
    flows_exact = points.flow_after_mw
    dis_f = float(np.max(np.abs(dev_exact - dev_model), initial=0.0))
    dis_p = float(np.max(np.abs(flows_exact - flow_model), initial=0.0))
    if not np.all(np.isfinite(dev_exact)) or check_model and (dis_f > AGREE_HZ
                                                             or dis_p > AGREE_MW):
        raise VerificationError(
            f"independent recalculation disagrees with the optimiser: settled deviation by "
            f"{dis_f * 1000:.3f} mHz, link flows by {dis_p:.3f} MW (allowed {AGREE_HZ * 1000} mHz,"
            f" {AGREE_MW} MW)")
    F = case.limits.max_settled_deviation_hz
    viol_f = dev_exact - F
    lim = info.hz.Fmax[info.hz.inst_t]
    viol_p = np.abs(flows_exact) - lim
    if (viol_f > 1e-5).any() or (viol_p > 1e-3 * np.maximum(1.0, lim / 100)).any():
        raise VerificationError(
            "the allocation breaks a limit after independent recalculation: "
            f"worst settled excess {max(viol_f.max(initial=0), 0) * 1000:.4f} mHz, worst link "
            f"excess {max(viol_p.max(initial=0), 0):.4f} MW")
    gain, r_up, r_dn = period_values(lp, info, out.x)
    return Result.build(case, info, lp, out, gain, r_up, r_dn, points, relax,
                        {"max_frequency_disagreement_hz": dis_f,
                         "max_flow_disagreement_mw": dis_p})
