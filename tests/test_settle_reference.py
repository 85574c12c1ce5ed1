"""The independent settled-point calculation (optreserve.settle) against outside values:
textbook two-area examples (references.md), the general steady-state law of the swing
equation, hand arithmetic, and scipy.optimize.brentq on the same balance written here."""

from __future__ import annotations

import math

import numpy as np
import pytest
from conftest import build_case, settings, unit
from refcalc import event_response, settled_deviation

from optreserve.verify.settle import settle_case, settle_deviation

BIG = 1.0e6  # headroom that never saturates


def two_area_case(folder, f_n, base_mva, R1, D1, R2, D2, step_mw):
    """Two areas with one governor each, built from textbook per-unit data with the unit
    conversions of references.md: droop R pu on base S -> droop_pct = 100 R with
    capacity_mw = S (gain S/(R f_n) MW/Hz); load damping D pu -> D S / f_n MW/Hz, written as
    load_damping_pct_per_hz = 100 (D S / f_n) / load_mw with load_mw = S."""
    S = base_mva
    units = [
        unit("Ardmoor_G", "Ardmoor", S, 0.5 * S, 100 * R1, 100 * R1),
        unit("Belcrest_G", "Belcrest", S, 0.5 * S, 100 * R2, 100 * R2),
    ]
    areas = [
        {"area": "Ardmoor", "load_mw": S, "load_damping_pct_per_hz": 100 * (D1 * S / f_n) / S},
        {"area": "Belcrest", "load_mw": S, "load_damping_pct_per_hz": 100 * (D2 * S / f_n) / S},
    ]
    links = [{"link": "Ardmoor-Belcrest", "from_area": "Ardmoor", "to_area": "Belcrest",
              "reactance_pu": 0.1, "limit_mw": 10 * S}]
    events = [{"event": "step1", "kind": "load_step", "area": "Ardmoor", "size_mw": step_mw}]
    return build_case(folder, settings(f_n=f_n, max_dev=1.0), units, areas, events, links)


def textbook_gains(case, f_n, base_mva, R1, R2):
    """K = S / (R f_n) computed here from the textbook data (references.md, unit conversions)."""
    K = np.array([base_mva / (R1 * f_n), base_mva / (R2 * f_n)])
    # the package's own droop -> gain conversion must agree with the textbook one
    np.testing.assert_allclose(case.gain_from_droop([100 * R1, 100 * R2]), K, rtol=1e-12)
    return K


def test_wood_wollenberg_two_area_example(case_dir):
    """Wood & Wollenberg, Power Generation, Operation and Control, two-area example (9B in the
    2nd ed.; recomputed, see references.md): 60 Hz, 500 MVA base, R1 = 0.01, D1 = 0.8,
    R2 = 0.02, D2 = 1.0 pu, 100 MW step in area 1 -> df = -0.0791 Hz, tie flow change
    -33.6 MW (into area 1), dPg1 = +65.9 MW, dPg2 = +32.9 MW."""
    case = two_area_case(case_dir(), 60.0, 500.0, 0.01, 0.8, 0.02, 1.0, 100.0)
    K = textbook_gains(case, 60.0, 500.0, 0.01, 0.02)
    (p,) = settle_case(case, K, [BIG, BIG], [BIG, BIG])
    assert p.deviation_hz == pytest.approx(-0.0791, abs=0.00005)
    assert p.flow_after_mw[0] == pytest.approx(-33.6, abs=0.05)
    assert p.response_mw[0] == pytest.approx(65.9, abs=0.05)
    assert p.response_mw[1] == pytest.approx(32.9, abs=0.05)


def test_saadat_two_area_example(case_dir):
    """Saadat, Power System Analysis, ch. 12 two-area example (recomputed, references.md):
    60 Hz, 1000 MVA, R1 = 0.05, D1 = 0.6, R2 = 0.0625, D2 = 0.9, +187.5 MW in area 1 ->
    df = -0.3 Hz, dPm1 = +100 MW, dPm2 = +80 MW, dP12 = -84.5 MW."""
    case = two_area_case(case_dir(), 60.0, 1000.0, 0.05, 0.6, 0.0625, 0.9, 187.5)
    K = textbook_gains(case, 60.0, 1000.0, 0.05, 0.0625)
    (p,) = settle_case(case, K, [BIG, BIG], [BIG, BIG])
    assert p.deviation_hz == pytest.approx(-0.3, abs=1e-9)
    assert p.response_mw == pytest.approx([100.0, 80.0], abs=1e-6)
    assert p.flow_after_mw[0] == pytest.approx(-84.5, abs=1e-6)
    # the area injections must balance: what area 1 imports, area 2 exports
    assert p.injection_mw.sum() == pytest.approx(0.0, abs=1e-9)


def test_saadat_example_with_surplus_mirrors(case_dir):
    """Same Saadat data with the step reversed (-187.5 MW, demand drops): linear steady
    state, so every quantity changes sign (swing-equation steady state is odd in dP when no
    dead band or headroom limit acts)."""
    case = two_area_case(case_dir(), 60.0, 1000.0, 0.05, 0.6, 0.0625, 0.9, -187.5)
    K = textbook_gains(case, 60.0, 1000.0, 0.05, 0.0625)
    (p,) = settle_case(case, K, [BIG, BIG], [BIG, BIG])
    assert p.deviation_hz == pytest.approx(+0.3, abs=1e-9)
    assert p.response_mw == pytest.approx([-100.0, -80.0], abs=1e-6)
    assert p.flow_after_mw[0] == pytest.approx(+84.5, abs=1e-6)


def test_glover_three_units_one_area(case_dir):
    """Glover, Sarma & Overbye, Power System Analysis and Design, ch. 12 (from memory, see
    references.md): three units 1000/750/500 MVA at R = 0.05 on own rating, +200 MW at 60 Hz
    -> df = -0.2667 Hz, outputs +88.9/+66.7/+44.4 MW."""
    units = [unit(f"Carn_{k}", "Carn", s, 0.5 * s, 5.0, 5.0) for k, s in
             enumerate((1000.0, 750.0, 500.0))]
    case = build_case(case_dir(), settings(f_n=60.0, max_dev=0.5), units,
                      [{"area": "Carn", "load_mw": 2000}],
                      [{"event": "e", "kind": "load_step", "area": "Carn", "size_mw": 200}])
    K = np.array([1000.0, 750.0, 500.0]) / (0.05 * 60.0)
    (p,) = settle_case(case, K, [BIG] * 3, [BIG] * 3)
    assert p.deviation_hz == pytest.approx(-0.2667, abs=0.00005)
    assert p.response_mw == pytest.approx([88.9, 66.7, 44.4], abs=0.05)


def test_glover_two_area_beta(case_dir):
    """Glover, Sarma & Overbye ch. 12 two-area example (from memory, references.md):
    beta1 = 700, beta2 = 1400 MW/Hz, +100 MW in area 1 -> df = -0.0476 Hz, dPm1 = 33.3,
    dPm2 = 66.7, dPtie1 = -66.7 MW. Here the betas are pure governor gain (no damping)."""
    case = two_area_case(case_dir(), 60.0, 1000.0, 0.05, 0.0, 0.05, 0.0, 100.0)
    K = np.array([700.0, 1400.0])
    (p,) = settle_case(case, K, [BIG, BIG], [BIG, BIG])
    assert p.deviation_hz == pytest.approx(-0.0476, abs=0.00005)
    assert p.response_mw == pytest.approx([33.3, 66.7], abs=0.05)
    assert p.flow_after_mw[0] == pytest.approx(-66.7, abs=0.05)


@pytest.mark.parametrize("seed", range(6))
def test_general_two_area_law(case_dir, seed):
    """General steady-state law of the swing equation (references.md): df = -dP/(b1+b2),
    b = 1/R + D, and dPtie,1 = -b2 dP/(b1+b2), for random textbook-style data (both signs
    of dP)."""
    rng = np.random.default_rng(seed)
    f_n = [50.0, 60.0][seed % 2]
    S = float(rng.uniform(200, 3000))
    R1, R2 = rng.uniform(0.02, 0.08, 2)
    D1, D2 = rng.uniform(0.0, 2.0, 2)
    dP = float(rng.choice([-1, 1]) * rng.uniform(10, 300))
    case = two_area_case(case_dir(), f_n, S, R1, D1, R2, D2, dP)
    b1 = S / (R1 * f_n) + D1 * S / f_n
    b2 = S / (R2 * f_n) + D2 * S / f_n
    K = textbook_gains(case, f_n, S, R1, R2)
    (p,) = settle_case(case, K, [BIG, BIG], [BIG, BIG])
    assert p.deviation_hz == pytest.approx(-dP / (b1 + b2), rel=1e-9)
    assert p.flow_after_mw[0] == pytest.approx(-b2 * dP / (b1 + b2), rel=1e-9)


# ----------------------------------------------------------- dead bands and saturation
def test_dead_band_hand_arithmetic():
    """Hand arithmetic: one governor K = 1000 MW/Hz with a 20 mHz dead band, no damping,
    100 MW deficit: response K (x - d) = 100 -> x = 0.02 + 0.1 = 0.12 Hz."""
    assert settle_deviation(100.0, [1000.0], [0.02], [BIG], 0.0) == pytest.approx(0.12, abs=1e-12)


def test_headroom_saturation_hand_arithmetic():
    """Hand arithmetic: K = 1000 MW/Hz, headroom 50 MW, load damping 250 MW/Hz, 100 MW
    deficit. Unsaturated, 1250 x = 100 gives x = 0.08 Hz, beyond the saturation point
    50/1000 = 0.05 Hz; so the unit gives 50 MW and 50 + 250 x = 100 -> x = 0.2 Hz."""
    assert settle_deviation(100.0, [1000.0], [0.0], [50.0], 250.0) == pytest.approx(0.2, abs=1e-12)


def test_saturated_without_damping_has_no_settled_point():
    """Physics: with every governor at its headroom and no load self-regulation, nothing can
    cover the rest of the deficit: frequency keeps falling (no settled point)."""
    x = settle_deviation(100.0, [1000.0, 500.0], [0.0, 0.01], [40.0, 30.0], 0.0)
    assert math.isinf(x)


@pytest.mark.parametrize("seed", range(40))
def test_settle_deviation_matches_brentq(seed):
    """scipy.optimize.brentq as reference root finder on the balance
    sum_i min(K_i (x - d_i)^+, r_i) + D x = dP, for random dead bands, headroom (often
    saturating) and damping."""
    rng = np.random.default_rng(1000 + seed)
    n = int(rng.integers(1, 8))
    K = rng.uniform(10, 2000, n) * (rng.random(n) > 0.15)
    d = rng.uniform(0, 0.05, n) * (rng.random(n) > 0.4)
    r = rng.uniform(1, 200, n)
    D = float(rng.uniform(0, 300)) if seed % 3 else 0.0
    dP = float(rng.uniform(1, 0.9 * (r.sum() + D * 0.5)))
    ref = settled_deviation(dP, K, d, r, D)
    got = settle_deviation(dP, K, d, r, D)
    if math.isinf(ref):
        assert math.isinf(got)
    else:
        assert got == pytest.approx(ref, abs=1e-9)


def meshed_case(folder, seed, deadbands=True):
    """Four invented areas in a ring with one chord, two or three governors each."""
    rng = np.random.default_rng(seed)
    names = ["Hollin", "Quarrow", "Skelby", "Tarnmouth"]
    units, areas = [], []
    for a in names:
        areas.append({"area": a, "load_mw": float(rng.uniform(500, 3000)),
                      "load_damping_pct_per_hz": float(rng.uniform(0, 2))})
        for k in range(int(rng.integers(2, 4))):
            cap = float(rng.uniform(100, 800))
            units.append(unit(f"{a}_{k}", a, cap, 0.7 * cap, 3.0, 8.0,
                              deadband_mhz=float(rng.choice([0, 5, 10, 20])) if deadbands else 0))
    pairs = [(0, 1), (1, 2), (2, 3), (3, 0), (0, 2)]
    links = [{"link": f"L{k}", "from_area": names[i], "to_area": names[j],
              "reactance_pu": float(rng.uniform(0.01, 0.1)), "limit_mw": 5000,
              "flow_mw": float(rng.uniform(-200, 200))} for k, (i, j) in enumerate(pairs)]
    events = [{"event": "trip0", "kind": "unit_trip", "unit": units[0]["unit"]},
              {"event": "up", "kind": "load_step", "area": "Skelby", "size_mw": 250.0},
              {"event": "down", "kind": "load_step", "area": "Quarrow", "size_mw": -300.0}]
    return build_case(folder, settings(max_dev=0.5), units, areas, events, links)


@pytest.mark.parametrize("seed", range(4))
def test_settle_case_matches_independent_calculation(case_dir, seed):
    """settle_case on a meshed four-area case with dead bands and partly saturating headroom
    against this file's own balance (scipy.optimize.brentq) and an independent DC load flow
    (numpy.linalg.lstsq on the full Laplacian)."""
    case = meshed_case(case_dir(), seed)
    rng = np.random.default_rng(50 + seed)
    n = len(case.units)
    K = rng.uniform(0, 400, n)
    r_up = rng.uniform(5, 80, n)
    r_dn = rng.uniform(5, 80, n)
    points = settle_case(case, K, r_up, r_dn)
    for p, (_, e) in zip(points, case.events.iterrows()):
        dev, inj, flows = event_response(case, K, r_up, r_dn, e)
        assert p.event == e["event"]
        assert p.deviation_hz == pytest.approx(dev, abs=1e-9)
        np.testing.assert_allclose(p.injection_mw, inj, atol=1e-6)
        np.testing.assert_allclose(p.flow_after_mw, flows, atol=1e-6)


def test_tripped_unit_gives_no_response(case_dir):
    """Case format: a unit_trip removes that unit's output and its response. Hand arithmetic:
    two units K = 500 and 1500 MW/Hz, the second (output 300 MW) trips, no damping ->
    x = 300 / 500 = 0.6 Hz, and the tripped unit's response is zero."""
    units = [unit("Wend_A", "Wend", 1000, 500, 2, 12), unit("Wend_B", "Wend", 1000, 300, 2, 12)]
    case = build_case(case_dir(), settings(max_dev=1.0), units, [{"area": "Wend", "load_mw": 900}],
                      [{"event": "tripB", "kind": "unit_trip", "unit": "Wend_B"}])
    (p,) = settle_case(case, [500.0, 1500.0], [BIG, BIG], [BIG, BIG])
    assert p.deviation_hz == pytest.approx(-0.6, abs=1e-12)
    assert p.response_mw == pytest.approx([300.0, 0.0], abs=1e-9)


@pytest.mark.parametrize("seed", range(10))
def test_settle_batch_matches_brentq(seed):
    """The vectorised settle used by the solver's verification, against
    scipy.optimize.brentq on the same balance, for many events at once (dead bands,
    saturating headroom, with and without load damping)."""
    from optreserve.verify.settle import settle_batch

    rng = np.random.default_rng(2000 + seed)
    M, n = 12, int(rng.integers(1, 9))
    K = rng.uniform(10, 2000, (M, n)) * (rng.random((M, n)) > 0.15)
    d = rng.uniform(0, 0.05, n) * (rng.random(n) > 0.4)
    r = rng.uniform(1, 200, (M, n))
    D = rng.uniform(0, 300, M) * (rng.random(M) > 0.3)
    dP = rng.uniform(1, 0.9 * (r.sum(1) + 0.5 * D))
    D[-2:] = 0.0
    dP[-1] = 1.1 * r[-1][K[-1] > 0].sum() + 1.0  # beyond every headroom: no settled point
    got = settle_batch(dP, K, d, r, D)
    for m in range(M):
        ref = settled_deviation(dP[m], K[m], d, r[m], D[m])
        if math.isinf(ref):
            assert math.isinf(got[m])
        else:
            assert got[m] == pytest.approx(ref, abs=1e-9)
