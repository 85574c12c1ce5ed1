"""The whole solve against outside checks: hand arithmetic, the outside reference
optimisers scipy.optimize.milp / linprog, the EU System Operation Guideline's reference
incident, and the tests' own settled balance + DC load flow (refcalc)."""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd
import pytest
from conftest import build_case, settings, unit
from refcalc import event_response
from scipy.optimize import Bounds, LinearConstraint, linprog, milp

import optreserve
from optreserve.model.build import build_model

ENGINE = "highspy"  # bulk load: fast; the Pyomo emitter is compared once in test (b)


def solve(case, **kw):
    kw.setdefault("engine", ENGINE)
    kw.setdefault("mip_gap", 1e-9)
    return optreserve.solve(case, **kw)


def alloc(res, name):
    return res.allocation.set_index("unit").loc[name]


def event_row(res, name):
    return res.events.set_index("event").loc[name]


def recheck(case, res):
    """Every event of a result recomputed with the tests' own balance + DC flow; returns the
    (deviation, flows) pairs in event order."""
    al = res.allocation.set_index("unit").loc[list(case.units["unit"])]
    out = []
    for _, e in case.events.iterrows():
        out.append(event_response(case, al["gain_mw_per_hz"], al["headroom_up_mw"],
                                  al["headroom_down_mw"], e)[::2])
    return out


# ------------------------------------------------------------------ (a) hand-checkable optimum
def test_single_area_cheap_unit_first_hand_arithmetic(case_dir):
    """Hand arithmetic. 50 Hz, settled limit F = full activation = 0.2 Hz, one area with
    5000 MW of load at 1 %/Hz (D = 50 MW/Hz, 10 MW at the limit), 400 MW load step.
    Cheap unit (price 2): 500 MW at 420 MW, band 2-10 % -> gain <= min(500/(0.02*50) = 500,
    headroom 80/0.2 = 400) = 400 MW/Hz, 80 MW of headroom.
    Dear unit (price 5): 2000 MW at 1500 MW -> covers 400 - 80 - 10 = 310 MW:
    gain 310/0.2 = 1550 MW/Hz, droop 2000/(1550*50)*100 = 2.5806 %, headroom 310 MW.
    Cost 2*80 + 5*310 = 1710 per hour; the event settles exactly at -0.2 Hz."""
    case = build_case(
        case_dir(), settings(),
        [unit("Cheapford", "Nordale", 500, 420, 2, 10, price_up=2),
         unit("Dearholm", "Nordale", 2000, 1500, 2, 10, price_up=5)],
        [{"area": "Nordale", "load_mw": 5000, "load_damping_pct_per_hz": 1.0}],
        [{"event": "big", "kind": "load_step", "area": "Nordale", "size_mw": 400}])
    res = solve(case)
    assert res.objective_per_h == pytest.approx(1710.0, rel=1e-7)
    c, d = alloc(res, "Cheapford"), alloc(res, "Dearholm")
    assert c["gain_mw_per_hz"] == pytest.approx(400.0, rel=1e-7)
    assert c["headroom_up_mw"] == pytest.approx(80.0, rel=1e-7)
    assert c["droop_pct"] == pytest.approx(2.5, rel=1e-7)
    assert d["gain_mw_per_hz"] == pytest.approx(1550.0, rel=1e-7)
    assert d["headroom_up_mw"] == pytest.approx(310.0, rel=1e-7)
    assert d["droop_pct"] == pytest.approx(2000 / (1550 * 50) * 100, rel=1e-7)
    assert d["cost_per_h"] == pytest.approx(1550.0, rel=1e-7)
    ev = event_row(res, "big")
    assert ev["settled_deviation_hz"] == pytest.approx(-0.2, abs=1e-7)
    assert ev["settled_frequency_hz"] == pytest.approx(49.8, abs=1e-7)
    assert bool(ev["binding"])
    assert (res.allocation["headroom_down_mw"] == 0).all()


def test_eu_reference_incident_needs_15000_mw_per_hz(case_dir):
    """EU Regulation 2017/1485: CE reference incident 3000 MW each direction (Art. 153(2)(b)(i),
    confirmed), FCR fully activated at 200 mHz (Annex V, confirmed), max steady-state deviation
    200 mHz (Annex III, memory). Consistency check of references.md: 3000 MW / 0.2 Hz =
    15 000 MW/Hz, which the K-factor of Art. 156(2) counts as FCR plus load self-regulation.
    With 150 000 MW of load at 1 %/Hz (CE planning assumption, memory: 1500 MW/Hz) the least
    governor gain is 15 000 - 1500 = 13 500 MW/Hz and the FCR held 13 500 * 0.2 = 2700 MW up
    and 2700 MW down."""
    rng = np.random.default_rng(7)
    units = [unit(f"Velmark_{k}", "Velmark", 5000, 3500, 2, 8,
                  price_up=float(rng.uniform(1, 10)),
                  price_down_per_mw_h=float(rng.uniform(1, 10))) for k in range(12)]
    case = build_case(
        case_dir(), settings(), units,
        [{"area": "Velmark", "load_mw": 150_000, "load_damping_pct_per_hz": 1.0}],
        [{"event": "ref_plus", "kind": "load_step", "area": "Velmark", "size_mw": 3000},
         {"event": "ref_minus", "kind": "load_step", "area": "Velmark", "size_mw": -3000}])
    res = solve(case)
    assert res.allocation["gain_mw_per_hz"].sum() == pytest.approx(13_500, rel=1e-6)
    assert res.allocation["headroom_up_mw"].sum() == pytest.approx(2700, rel=1e-6)
    assert res.allocation["headroom_down_mw"].sum() == pytest.approx(2700, rel=1e-6)
    dev = res.events.set_index("event")["settled_deviation_hz"]
    assert dev["ref_plus"] == pytest.approx(-0.2, abs=1e-6)
    assert dev["ref_minus"] == pytest.approx(+0.2, abs=1e-6)


# ------------------------------------------------------------------ random cases
def random_case(folder, seed, *, n_areas=3, steps=False, deadbands=False, tight=1.0,
                over=True, n_units=4):
    """A random but well-supplied case: invented areas in a ring (plus a chord from four
    areas), units with varied bands, prices, dead bands; a trip, load steps both ways."""
    rng = np.random.default_rng(seed)
    names = ["Aberlin", "Brokehurst", "Caddon", "Dunmere"][:n_areas]
    units, areas = [], []
    for a in names:
        areas.append({"area": a, "load_mw": float(rng.uniform(1000, 4000)),
                      "load_damping_pct_per_hz": float(rng.uniform(0.5, 2.0))})
        for k in range(n_units):
            cap = float(rng.uniform(150, 800))
            lo = float(rng.choice([2.0, 3.0, 4.0]))
            units.append(unit(
                f"{a}_{k}", a, cap, float(rng.uniform(0.5, 0.85)) * cap, lo,
                lo + float(rng.choice([2.0, 4.0, 6.0])),
                price_up=float(np.round(rng.uniform(1, 20), 2)),
                price_down_per_mw_h=float(np.round(rng.uniform(0.5, 8), 2)),
                min_output_mw=float(0.3 * cap),
                deadband_mhz=float(rng.choice([0, 5, 10, 15])) if deadbands else 0.0))
    links = []
    if n_areas > 1:
        pairs = [(i, (i + 1) % n_areas) for i in range(n_areas if n_areas > 2 else 1)]
        if n_areas == 4:
            pairs.append((0, 2))
        for k, (i, j) in enumerate(pairs):
            links.append({"link": f"{names[i]}-{names[j]}", "from_area": names[i],
                          "to_area": names[j], "reactance_pu": float(rng.uniform(0.01, 0.05)),
                          "limit_mw": float(tight * rng.uniform(300, 700)),
                          "flow_mw": float(rng.uniform(-100, 100))})
    big = max(units, key=lambda u: u["output_mw"])
    events = [{"event": "trip_big", "kind": "unit_trip", "unit": big["unit"]},
              {"event": "step_up", "kind": "load_step", "area": names[-1],
               "size_mw": float(np.round(rng.uniform(150, 400), 1))}]
    if over:
        events.append({"event": "step_down", "kind": "load_step", "area": names[0],
                       "size_mw": -float(np.round(rng.uniform(150, 400), 1))})
    extra = {"droop": {"steps_pct": [2.0, 2.5, 3.0, 4.0, 5.0, 6.0, 8.0, 10.0]}} if steps else {}
    return build_case(folder, settings(limits={"full_activation_deviation_hz": 0.2}, **extra),
                      units, areas, events, links)


# ------------------------------------------------------------------ (b) both emitters
@pytest.mark.parametrize("seed,steps", [(1, True), (2, False)])
def test_pyomo_and_highspy_emitters_give_the_same_optimum(case_dir, seed, steps):
    """Design rule (formulation.md): one formulation, two emitters; a test asserts both give
    the same optimum. Here the outside reference is simply each other, on a MILP with droop
    steps or semi-continuous gains, links, a trip and both directions."""
    case = random_case(case_dir(), seed, steps=steps, deadbands=False)
    a = solve(case, engine="highspy")
    b = solve(case, engine="pyomo")
    assert a.solver["interface"] == "highspy" and b.solver["interface"] == "pyomo"
    assert a.objective_per_h == pytest.approx(b.objective_per_h, rel=1e-6, abs=1e-6)
    assert a.status == b.status == "optimal"


# ------------------------------------------------------------------ (c) outside optimisers
@pytest.mark.parametrize("seed,steps", [(3, False), (4, True), (5, False), (6, True)])
def test_milp_optimum_equals_scipy_milp(case_dir, seed, steps):
    """scipy.optimize.milp as reference optimiser on the same LinearProgram
    (optreserve.model.rows.build_model): its optimum equals the objective optreserve reports, and
    optreserve's own solution is feasible for the program within solver tolerances."""
    case = random_case(case_dir(), seed, steps=steps)
    lp, _ = build_model(case)
    ref = milp(lp.cost, constraints=LinearConstraint(lp.A, lp.row_lo, lp.row_hi),
               bounds=Bounds(lp.col_lo, lp.col_hi), integrality=lp.integer.astype(int),
               options={"mip_rel_gap": 1e-9})
    assert ref.status == 0, ref.message
    res = solve(case)
    assert res.objective_per_h == pytest.approx(ref.fun + lp.objective_offset, rel=1e-6, abs=1e-6)


def own_single_area_optimum(units, events, F, F_act, f_n, D):
    """Independent formulation written here: for every set of participating units, an LP in
    the unit gains K (scipy.optimize.linprog): min sum p_i F_act K_i subject to
    K_lo <= K_i <= K_hi on, K_i = 0 off, and per event F (sum of K_i without the tripped
    unit) + F D >= |dP|. K_lo/K_hi from the droop band and K_hi also from headroom/F_act."""
    n = len(units)
    cap = np.array([u["capacity_mw"] for u in units])
    K_lo = cap / (np.array([u["droop_max_pct"] for u in units]) / 100 * f_n)
    K_band = cap / (np.array([u["droop_min_pct"] for u in units]) / 100 * f_n)
    room = cap - np.array([u["output_mw"] for u in units])
    K_hi = np.minimum(K_band, room / F_act)
    p = np.array([u["price_up_per_mw_h"] for u in units]) * F_act
    best = np.inf
    for on in itertools.product([0, 1], repeat=n):
        on = np.array(on, bool)
        if (K_lo[on] > K_hi[on]).any():
            continue
        A, b = [], []
        for e in events:
            row = -F * on.astype(float)
            if e["kind"] == "unit_trip":
                row[[u["unit"] for u in units].index(e["unit"])] = 0.0
            A.append(row)
            b.append(F * D - e["size_mw"])
        bounds = [(K_lo[i], K_hi[i]) if on[i] else (0, 0) for i in range(n)]
        r = linprog(p, A_ub=np.array(A), b_ub=np.array(b), bounds=bounds, method="highs")
        if r.status == 0:
            best = min(best, r.fun)
    return best


@pytest.mark.parametrize("seed", range(4))
def test_single_area_optimum_equals_own_enumeration(case_dir, seed):
    """Outside formulation: the least cost of a random single-area case (continuous droop,
    trips and load steps, no dead bands) equals the best of scipy.optimize.linprog over every
    participation pattern, formulated independently in this test."""
    rng = np.random.default_rng(100 + seed)
    units = []
    for k in range(5):
        cap = float(rng.uniform(200, 600))
        lo = float(rng.choice([2.0, 3.0]))
        units.append(unit(f"Ketter_{k}", "Ketter", cap, float(rng.uniform(0.5, 0.8)) * cap,
                          lo, lo + float(rng.choice([1.0, 3.0, 6.0])),
                          price_up=float(np.round(rng.uniform(1, 20), 2))))
    # trip size given explicitly (allowed by the case format) to keep every draw feasible
    events = [{"event": "trip", "kind": "unit_trip", "unit": units[int(rng.integers(5))]["unit"],
               "size_mw": float(np.round(rng.uniform(150, 300), 1))},
              {"event": "step", "kind": "load_step", "area": "Ketter",
               "size_mw": float(np.round(rng.uniform(50, 200), 1))}]
    load, pct = 3000.0, 1.0
    case = build_case(case_dir(), settings(limits={"full_activation_deviation_hz": 0.25}), units,
                      [{"area": "Ketter", "load_mw": load, "load_damping_pct_per_hz": pct}],
                      events)
    ev = [dict(e, size_mw=float(s)) for e, s in zip(events, case.events["size_mw"])]
    ref = own_single_area_optimum(units, ev, 0.2, 0.25, 50.0, load * pct / 100)
    assert np.isfinite(ref)
    assert solve(case).objective_per_h == pytest.approx(ref, rel=1e-6)


# ------------------------------------------------------------------ (d) written outputs
@pytest.mark.parametrize("seed,deadbands", [(11, False), (21, False), (13, True), (29, True)])
def test_written_results_meet_every_limit(case_dir, tmp_path, seed, deadbands):
    """Read back what was written (allocation.csv, events.csv, links.csv) and recompute every
    event with the tests' own balance (scipy.optimize.brentq) and DC load flow
    (numpy.linalg.lstsq): each settled deviation is within the limit and every link flow within
    its limit; the written figures agree with the recomputation."""
    case = random_case(case_dir(), seed, n_areas=4, deadbands=deadbands, tight=0.7)
    res = solve(case)
    out = res.write(tmp_path / "out")
    al = pd.read_csv(out / "allocation.csv").set_index("unit").loc[list(case.units["unit"])]
    evs = pd.read_csv(out / "events.csv").set_index("event")
    lks = pd.read_csv(out / "links.csv")
    F = case.limits.max_settled_deviation_hz
    lim = case.links["limit_mw"].to_numpy()
    for _, e in case.events.iterrows():
        dev, _, flows = event_response(case, al["gain_mw_per_hz"], al["headroom_up_mw"],
                                       al["headroom_down_mw"], e)
        assert abs(dev) <= F + 2e-6  # 6 decimals written
        assert np.all(np.abs(flows) <= lim + 1e-3)
        assert evs.loc[e["event"], "settled_deviation_hz"] == pytest.approx(dev, abs=2e-6)
        assert evs.loc[e["event"], "limit_hz"] == pytest.approx(F)
        got = lks[lks["event"] == e["event"]].set_index("link").loc[list(case.links["link"])]
        np.testing.assert_allclose(got["flow_after_mw"], flows, atol=1e-3)
        np.testing.assert_allclose(got["loading_pct"], np.abs(flows) / lim * 100, atol=1e-3)


# ------------------------------------------------------------------ unit capabilities
def capability_case(folder, cheap_extra, size=150.0):
    units = [unit("Pell_Cheap", "Pellow", 1000, 500, 2, 10, price_up=1, **cheap_extra),
             unit("Pell_Dear", "Pellow", 2000, 1000, 2, 10, price_up=4)]
    return build_case(folder, settings(limits={"full_activation_deviation_hz": 0.25}), units,
                      [{"area": "Pellow", "load_mw": 3000}],
                      [{"event": "e", "kind": "load_step", "area": "Pellow", "size_mw": size}])


def test_unit_that_does_not_provide_gets_no_gain(case_dir):
    """Case format: provides = false -> no reserve, droop response zero. The dear unit covers
    150/0.2 = 750 MW/Hz with 750*0.25 = 187.5 MW: cost 4*187.5 = 750."""
    res = solve(capability_case(case_dir(), {"provides": "false"}))
    assert alloc(res, "Pell_Cheap")["gain_mw_per_hz"] == 0
    assert not alloc(res, "Pell_Cheap")["provides"]
    assert res.objective_per_h == pytest.approx(750.0, rel=1e-7)


def test_reserve_cap_limits_gain(case_dir):
    """Case format: reserve_up_max_mw caps the headroom (e.g. ramp in the activation time).
    Cap 50 MW -> cheap gain <= 50/0.25 = 200 MW/Hz (40 MW at 0.2 Hz); the dear unit covers
    the other 110 MW: 550 MW/Hz, 137.5 MW. Cost 1*50 + 4*137.5 = 600."""
    res = solve(capability_case(case_dir(), {"reserve_up_max_mw": 50}))
    assert alloc(res, "Pell_Cheap")["gain_mw_per_hz"] == pytest.approx(200.0, rel=1e-7)
    assert alloc(res, "Pell_Cheap")["headroom_up_mw"] == pytest.approx(50.0, rel=1e-7)
    assert res.objective_per_h == pytest.approx(600.0, rel=1e-7)


def test_dead_band_reduces_response_at_the_limit(case_dir):
    """formulation.md / governor physics: response K (|df| - d) beyond the dead band d.
    With d = 50 mHz the cheap unit gives K (0.2 - 0.05) at the limit: 150 MW needs
    1000 MW/Hz (its band maximum 1000/(0.02*50)), holding K (F_act - d) = 1000*0.2 = 200 MW:
    cost 200. Without the dead band 750 MW/Hz and 187.5 MW would do."""
    res = solve(capability_case(case_dir(), {"deadband_mhz": 50}))
    assert alloc(res, "Pell_Cheap")["gain_mw_per_hz"] == pytest.approx(1000.0, rel=1e-7)
    assert alloc(res, "Pell_Cheap")["headroom_up_mw"] == pytest.approx(200.0, rel=1e-7)
    assert res.objective_per_h == pytest.approx(200.0, rel=1e-7)
    assert event_row(res, "e")["settled_deviation_hz"] == pytest.approx(-0.2, abs=1e-7)
    plain = solve(capability_case(case_dir(), {}))
    assert plain.objective_per_h == pytest.approx(187.5, rel=1e-7)


# ------------------------------------------------------------------ (e) tie-line limit
def tie_case(folder, limit_mw, deadbands=(0.0, 0.0), damping=0.0):
    """Importing area Lowmarsh (event, dear unit) and exporting area Highcombe (cheap unit),
    one link Highcombe -> Lowmarsh, no pre-event flow; F = 0.2 Hz, F_act = 0.25 Hz."""
    units = [unit("Lowmarsh_Dear", "Lowmarsh", 1000, 700, 2, 12, price_up=10,
                  deadband_mhz=deadbands[0]),
             unit("Highcombe_Cheap", "Highcombe", 2000, 1500, 2, 12, price_up=2,
                  deadband_mhz=deadbands[1])]
    areas = [{"area": "Lowmarsh", "load_mw": 2000, "load_damping_pct_per_hz": damping},
             {"area": "Highcombe", "load_mw": 2000, "load_damping_pct_per_hz": damping}]
    links = [{"link": "Combe-Marsh", "from_area": "Highcombe", "to_area": "Lowmarsh",
              "reactance_pu": 0.02, "limit_mw": limit_mw}]
    events = [{"event": "marsh_loss", "kind": "load_step", "area": "Lowmarsh", "size_mw": 300}]
    return build_case(folder, settings(limits={"full_activation_deviation_hz": 0.25}), units,
                      areas, events, links)


def test_tie_limit_forces_dearer_reserve_in_importing_area(case_dir):
    """Hand arithmetic with the two-area law dPtie = beta_B dP / (beta_A + beta_B)
    (references.md general law), no damping, F = 0.2 Hz, F_act = 0.25 Hz, 300 MW step in A:
    beta_A + beta_B >= 1500 MW/Hz. Without a binding link the cheap unit in B takes it all:
    cost 2 * 0.25 * 1500 = 750 and 300 MW flow into A. With a 200 MW limit,
    beta_B * 300 / 1500 <= 200 -> beta_B <= 2 beta_A, so beta_A = 500, beta_B = 1000:
    cost 0.25 * (10 * 500 + 2 * 1000) = 1750 and the link ends exactly at 200 MW."""
    free = solve(tie_case(case_dir(), 5000.0))
    assert free.objective_per_h == pytest.approx(750.0, rel=1e-7)
    assert free.links["flow_after_mw"].iloc[0] == pytest.approx(300.0, abs=1e-5)

    tight = solve(tie_case(case_dir(), 200.0))
    assert tight.objective_per_h == pytest.approx(1750.0, rel=1e-7)
    assert tight.objective_per_h > free.objective_per_h
    assert alloc(tight, "Lowmarsh_Dear")["gain_mw_per_hz"] == pytest.approx(500.0, rel=1e-7)
    assert alloc(tight, "Highcombe_Cheap")["gain_mw_per_hz"] == pytest.approx(1000.0, rel=1e-7)
    assert tight.links["flow_after_mw"].iloc[0] == pytest.approx(200.0, abs=1e-5)
    assert len(tight.binding_links) == 1


# ------------------------------------------------------------------ (f) dead bands + links
@pytest.mark.parametrize("deadbands", [(10.0, 20.0), (30.0, 5.0), (15.0, 15.0)])
def test_dead_bands_with_binding_link_match_exact_calculation(case_dir, deadbands):
    """Dead bands make flows bilinear (formulation.md). The reported flow and settled
    deviation must equal the tests' own exact calculation (brentq balance with dead bands, DC
    flow) within 0.5 MW and 0.5 mHz, the link must stay within its limit, and since cheap
    imports are worth more than dear local reserve the optimiser should take the link to its
    limit (within the 0.5 MW agreement band)."""
    case = tie_case(case_dir(), 200.0, deadbands=deadbands, damping=1.0)
    res = solve(case)
    ((dev, flows),) = recheck(case, res)
    ev = event_row(res, "marsh_loss")
    assert ev["settled_deviation_hz"] == pytest.approx(dev, abs=0.5e-3)
    assert res.links["flow_after_mw"].iloc[0] == pytest.approx(flows[0], abs=0.5)
    assert abs(dev) <= 0.2 + 1e-6
    assert abs(flows[0]) <= 200.0 + 1e-3
    assert abs(flows[0]) >= 200.0 - 0.5


# ------------------------------------------------------------------ (g) directions
def direction_case(folder, events):
    """Hand arithmetic below. Siltmoor_Min runs at its minimum output: no room to go down."""
    units = [unit("Siltmoor_Min", "Siltmoor", 600, 200, 2, 10, price_up=1,
                  min_output_mw=200, price_down_per_mw_h=1),
             unit("Siltmoor_Mid", "Siltmoor", 1000, 600, 2, 10, price_up=3,
                  min_output_mw=300, price_down_per_mw_h=2)]
    return build_case(folder, settings(limits={"full_activation_deviation_hz": 0.25}), units,
                      [{"area": "Siltmoor", "load_mw": 2000}], events)


UP = {"event": "up", "kind": "load_step", "area": "Siltmoor", "size_mw": 100}
DOWN = {"event": "down", "kind": "load_step", "area": "Siltmoor", "size_mw": -100}


def test_under_frequency_only_needs_no_down_headroom(case_dir):
    """Case format: down headroom is required only when the case has over-frequency events.
    Hand arithmetic: need 100/0.2 = 500 MW/Hz; the cheap unit at minimum output can give up to
    min(600/(0.02*50) = 600, 400/0.25 = 1600) MW/Hz, so it takes 500 MW/Hz alone:
    headroom 500*0.25 = 125 MW up, cost 125."""
    res = solve(direction_case(case_dir(), [UP]))
    assert (res.allocation["headroom_down_mw"] == 0).all()
    assert alloc(res, "Siltmoor_Min")["gain_mw_per_hz"] == pytest.approx(500, rel=1e-7)
    assert res.objective_per_h == pytest.approx(125.0, rel=1e-7)


def test_over_frequency_event_needs_down_headroom(case_dir):
    """Droop response is symmetric (common practice): a governor that responds to a rise in
    frequency must be able to lower its output. With an over-frequency event the unit at its
    minimum output cannot provide at all; the other unit takes 500 MW/Hz with 125 MW up and
    125 MW down: cost 3*125 + 2*125 = 625. The surplus settles at +0.2 Hz."""
    res = solve(direction_case(case_dir(), [UP, DOWN]))
    assert alloc(res, "Siltmoor_Min")["gain_mw_per_hz"] == pytest.approx(0.0, abs=1e-7)
    mid = alloc(res, "Siltmoor_Mid")
    assert mid["gain_mw_per_hz"] == pytest.approx(500, rel=1e-7)
    assert mid["headroom_down_mw"] == pytest.approx(125, rel=1e-7)
    assert mid["headroom_up_mw"] == pytest.approx(125, rel=1e-7)
    assert res.objective_per_h == pytest.approx(625.0, rel=1e-7)
    assert event_row(res, "down")["settled_deviation_hz"] == pytest.approx(+0.2, abs=1e-7)
    assert event_row(res, "up")["settled_deviation_hz"] == pytest.approx(-0.2, abs=1e-7)


def test_over_frequency_only_needs_no_up_headroom(case_dir):
    """Mirror of the rule in the case format: only an over-frequency event -> down headroom
    only. The cheap unit cannot go down, the other covers 500 MW/Hz with 125 MW down: cost
    2*125 = 250 and no up headroom anywhere."""
    res = solve(direction_case(case_dir(), [DOWN]))
    assert (res.allocation["headroom_up_mw"] == 0).all()
    assert res.objective_per_h == pytest.approx(250.0, rel=1e-7)


def test_charging_battery_trip_is_an_over_frequency_event(case_dir):
    """Case format: a unit_trip's size defaults to the unit's output; a battery charging at
    80 MW (output -80) that trips removes 80 MW of demand: a surplus, frequency rises, down
    headroom is needed and the battery itself gives no response. Hand arithmetic: the other
    unit needs 80/0.2 = 400 MW/Hz, holding 400*0.25 = 100 MW down at price 2 -> cost 200."""
    units = [unit("Wickham_Battery", "Wickham", 120, -80, 2, 6, price_up=0,
                  min_output_mw=-120, price_down_per_mw_h=0.1),
             unit("Wickham_Gas", "Wickham", 1000, 600, 2, 10, price_up=1,
                  min_output_mw=200, price_down_per_mw_h=2)]
    case = build_case(case_dir(), settings(limits={"full_activation_deviation_hz": 0.25}), units,
                      [{"area": "Wickham", "load_mw": 900}],
                      [{"event": "battery_trip", "kind": "unit_trip", "unit": "Wickham_Battery"}])
    res = solve(case)
    ev = event_row(res, "battery_trip")
    assert ev["size_mw"] == pytest.approx(-80.0)
    assert ev["settled_deviation_hz"] == pytest.approx(+0.2, abs=1e-7)
    assert alloc(res, "Wickham_Gas")["headroom_down_mw"] == pytest.approx(100.0, rel=1e-7)
    assert (res.allocation["headroom_up_mw"] == 0).all()
    assert res.objective_per_h == pytest.approx(200.0, rel=1e-7)


# ------------------------------------------------------------------ (h) tripped unit
def test_biggest_provider_trips_and_gives_no_response(case_dir):
    """Case format: a tripped unit gives no response. Hand arithmetic, F = 0.2 Hz,
    F_act = 0.25 Hz, no damping. The cheapest unit Tor_Big (output 600 MW) trips: the others
    need 600/0.2 = 3000 MW/Hz without it. Tor_Mid (price 3) gives its band maximum
    1000/(0.02*50) = 1000 MW/Hz, Tor_Dear (price 5) the other 2000; the 200 MW step is then
    covered too, so Tor_Big holds nothing: cost 0.25*(3*1000 + 5*2000) = 3250. (Counting
    Tor_Big's own response in its trip would give 0.25*(1*1000 + 3*1000 + 5*1000) = 2250.)"""
    units = [unit("Tor_Big", "Torvale", 1000, 600, 2, 10, price_up=1),
             unit("Tor_Mid", "Torvale", 1000, 500, 2, 10, price_up=3),
             unit("Tor_Dear", "Torvale", 3000, 2000, 2, 10, price_up=5)]
    events = [{"event": "trip_big", "kind": "unit_trip", "unit": "Tor_Big"},
              {"event": "step", "kind": "load_step", "area": "Torvale", "size_mw": 200}]
    case = build_case(case_dir(), settings(limits={"full_activation_deviation_hz": 0.25}), units,
                      [{"area": "Torvale", "load_mw": 3000}], events)
    res = solve(case)
    assert res.objective_per_h == pytest.approx(3250.0, rel=1e-7)
    assert alloc(res, "Tor_Big")["gain_mw_per_hz"] == pytest.approx(0.0, abs=1e-7)
    assert event_row(res, "trip_big")["size_mw"] == pytest.approx(600.0)
    assert event_row(res, "trip_big")["area"] == "Torvale"
    assert event_row(res, "trip_big")["settled_deviation_hz"] == pytest.approx(-0.2, abs=1e-7)
    assert event_row(res, "step")["settled_deviation_hz"] == pytest.approx(-200 / 3000, abs=1e-7)


# ------------------------------------------------------------------ (i) own reserve
def own_case(folder, own_mw):
    units = [unit("Fenwick_Dear", "Fenwick", 1000, 600, 2, 10, price_up=10),
             unit("Gorsby_Cheap", "Gorsby", 3000, 2000, 2, 10, price_up=2)]
    areas = [{"area": "Fenwick", "load_mw": 1000, "min_own_reserve_mw": own_mw},
             {"area": "Gorsby", "load_mw": 3000}]
    links = [{"link": "FG", "from_area": "Fenwick", "to_area": "Gorsby", "reactance_pu": 0.02,
              "limit_mw": 5000}]
    events = [{"event": "gorsby_loss", "kind": "load_step", "area": "Gorsby", "size_mw": 300}]
    return build_case(folder, settings(limits={"full_activation_deviation_hz": 0.25}), units,
                      areas, events, links)


def test_min_own_reserve_held_inside_the_area(case_dir):
    """EU Regulation 2017/1485 Annex VI via Art. 163(2) (confirmed): part of a block's FCR must
    be held inside it; the case format's min_own_reserve_mw. Hand arithmetic, F = 0.2,
    F_act = 0.25, no damping, 300 MW step -> 1500 MW/Hz. Without the rule the cheap unit
    takes all: cost 2 * 0.25 * 1500 = 750. With 100 MW to be held in Fenwick, its unit holds
    100 MW and, paid for anyway, gives 100/0.25 = 400 MW/Hz; the cheap unit the other
    1100 MW/Hz (275 MW): cost 10*100 + 2*275 = 1550."""
    free = solve(own_case(case_dir(), 0.0))
    assert free.objective_per_h == pytest.approx(750.0, rel=1e-7)
    res = solve(own_case(case_dir(), 100.0))
    held = res.allocation.groupby("area")["headroom_up_mw"].sum()
    assert held["Fenwick"] >= 100.0 - 1e-6
    assert res.objective_per_h == pytest.approx(1550.0, rel=1e-7)
    assert alloc(res, "Fenwick_Dear")["gain_mw_per_hz"] == pytest.approx(400.0, rel=1e-7)


# ------------------------------------------------------------------ (j) change penalty
@pytest.mark.parametrize("steps", [None, [3.0, 4.0, 5.0, 6.0]])
@pytest.mark.parametrize("penalty,keep", [(100.0, True), (10.0, False)])
def test_change_penalty_keeps_todays_droop_when_cheaper(case_dir, steps, penalty, keep):
    """Hand arithmetic. One unit, 1000 MW at 700, band 2-10 %, droop today 4 % (gain
    1000/(0.04*50) = 500 MW/Hz), price 2; 1000 MW load at 1 %/Hz (10 MW/Hz); 80 MW step;
    F = F_act = 0.2. Least gain (80 - 2)/0.2 = 390 MW/Hz: continuous droop costs 2*78 = 156
    (steps: next step 5 % = 400 MW/Hz, 2*80 = 160). Keeping 4 % costs 2*100 = 200. A change
    penalty of 100 keeps 4 % (headroom cost 200, no penalty); a penalty of 10 changes
    (headroom cost 156, steps 160, plus one penalty of 10)."""
    extra = {"droop": {"change_penalty_per_unit": penalty}}
    if steps:
        extra["droop"]["steps_pct"] = steps
    units = [unit("Quill_A", "Quillon", 1000, 700, 2, 10, price_up=2, droop_now_pct=4.0)]
    case = build_case(case_dir(), settings(**extra), units,
                      [{"area": "Quillon", "load_mw": 1000, "load_damping_pct_per_hz": 1.0}],
                      [{"event": "s", "kind": "load_step", "area": "Quillon", "size_mw": 80}])
    res = solve(case)
    a = alloc(res, "Quill_A")
    headroom_cost = res.allocation["cost_per_h"].sum()
    if keep:
        assert a["droop_pct"] == pytest.approx(4.0, rel=1e-7)
        assert headroom_cost == pytest.approx(200.0, rel=1e-7)
        assert res.change_penalty_total == 0.0
    else:
        moved = 390.0 if steps is None else 400.0
        assert a["gain_mw_per_hz"] == pytest.approx(moved, rel=1e-7)
        assert headroom_cost == pytest.approx(2 * moved * 0.2, rel=1e-7)
        assert res.change_penalty_total == pytest.approx(penalty)


# ------------------------------------------------------------------ regression pins
def test_binding_event_without_load_damping_solves(case_dir):
    """Physics + case format: with full_activation_deviation_hz = max_settled_deviation_hz
    (the default) and no load self-regulation, a binding event settles exactly at the limit
    with every provider exactly at its headroom. That is a valid settled point; a few ulps of
    solver round-off must not turn it into 'no settled point' (VerificationError, infinite
    deviation). Hand check of the answer: the cheapest unit (price 1.57, gain up to
    min(427.335/(0.02*50), 85.467/0.2) = 427.335 MW/Hz) alone covers 59.897/0.2 =
    299.485 MW/Hz: cost 1.57 * 59.897 per hour, settled at -0.2 Hz."""
    units = [unit("Brisk_0", "Brisk", 324.061, 259.249, 2, 10, price_up=4.69),
             unit("Brisk_1", "Brisk", 197.376, 157.901, 2, 10, price_up=5.18),
             unit("Brisk_2", "Brisk", 427.335, 341.868, 2, 10, price_up=1.57)]
    case = build_case(case_dir(), settings(), units, [{"area": "Brisk", "load_mw": 1000}],
                      [{"event": "e", "kind": "load_step", "area": "Brisk", "size_mw": 59.897}])
    res = solve(case)
    assert res.objective_per_h == pytest.approx(1.57 * 59.897, rel=1e-7)
    assert event_row(res, "e")["settled_deviation_hz"] == pytest.approx(-0.2, abs=1e-6)


def test_free_provider_reports_only_the_headroom_its_droop_needs(case_dir):
    """formulation.md: headroom must hold the full droop response at F_act,
    r >= K (F_act - d). A provider with a zero headroom price should still be told to hold
    what its droop needs, K * F_act, not an arbitrary amount up to its whole physical room
    (here 500 MW): the written headroom is what a planner would reserve. Hand arithmetic:
    150 MW step, 10 MW/Hz of load damping, F = F_act = 0.2 -> at least 740 MW/Hz."""
    units = [unit("Zell_Free", "Zell", 1000, 500, 2, 10, price_up=0),
             unit("Zell_Paid", "Zell", 1000, 500, 2, 10, price_up=3)]
    case = build_case(case_dir(), settings(), units,
                      [{"area": "Zell", "load_mw": 1000, "load_damping_pct_per_hz": 1.0}],
                      [{"event": "e", "kind": "load_step", "area": "Zell", "size_mw": 150}])
    res = solve(case)
    assert res.objective_per_h == pytest.approx(0.0, abs=1e-9)
    free = alloc(res, "Zell_Free")
    assert free["gain_mw_per_hz"] >= 740.0 - 1e-6
    assert free["headroom_up_mw"] == pytest.approx(free["gain_mw_per_hz"] * 0.2, rel=1e-6)
