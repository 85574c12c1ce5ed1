"""One diagnosis for `check` and `solve`: the same shortfall in both, the limiting tie line
named when a link is the cause, and no event blamed that `check` rates as fine.

Outside references: the independent settled-point calculation of verify/settle.py
(`settle_deviation`, `settle_case`: scalar balance with dead bands and saturation, DC flows;
itself checked against textbook two-area examples in test_settle_reference.py) and the
demo's own data read with pandas.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import optreserve
from optreserve.cli import main
from optreserve.errors import InfeasibleError
from optreserve.solver.screen import event_capability
from optreserve.verify.settle import settle_case, settle_deviation

DEMO = Path(__file__).resolve().parents[1] / "instances" / "demo-tri-valley"
TIE = "ambrith-orlesmouth"


def _demo(tmp_path: Path, trip_mw: float, tie_limit: float | None = None) -> Path:
    """The demo with the Kelvstrand trip raised (and the weak tie's limit changed). A trip
    may not exceed what the unit can lose, so the (non-providing) unit is enlarged to the
    trip's output with its stored energy H * capacity kept: the nadir rows see the same
    system inertia as before."""
    d = tmp_path / f"demo_{trip_mw}_{tie_limit}"
    shutil.copytree(DEMO, d)
    un = pd.read_csv(d / "units.csv", dtype=str, keep_default_na=False)
    k = un["unit"] == "Kelvstrand_Nuclear1"
    cap0, h0 = float(un.loc[k, "capacity_mw"].iloc[0]), float(un.loc[k, "inertia_s"].iloc[0])
    cap = max(cap0, trip_mw)
    un.loc[k, "capacity_mw"] = repr(cap)
    un.loc[k, "output_mw"] = repr(trip_mw)
    un.loc[k, "inertia_s"] = repr(h0 * cap0 / cap)
    un.to_csv(d / "units.csv", index=False)
    ev = pd.read_csv(d / "events.csv", dtype=str, keep_default_na=False)
    ev.loc[ev["event"] == "trip_kelvstrand_nuclear1", "size_mw"] = repr(trip_mw)
    ev.to_csv(d / "events.csv", index=False)
    if tie_limit is not None:
        lk = pd.read_csv(d / "links.csv", dtype=str)
        lk.loc[lk["link"] == TIE, "limit_mw"] = repr(tie_limit)
        lk.to_csv(d / "links.csv", index=False)
    return d


def test_link_named_and_raising_its_limit_makes_the_case_feasible(tmp_path):
    """950 MW Kelvstrand trip: the providers can cover it at 0.2 Hz (check rates it ok), but
    only by pushing more than 720 MW into Orlesmouth over the weak tie. The diagnosis must
    name that tie and a limit; raised to it, solve succeeds, and the independent DC flows
    (settle_case) of the new allocation exceed the old limit on that tie, so the old limit
    really was what made the case infeasible."""
    case = optreserve.load_case(_demo(tmp_path, 950.0))
    cap = event_capability(case).set_index("event")
    assert cap.loc["trip_kelvstrand_nuclear1", "short_mw"] == 0.0  # check: fine
    with pytest.raises(InfeasibleError) as info:
        optreserve.solve(case)
    exc = info.value
    assert exc.shortfalls and TIE in exc.shortfalls[0]
    assert not any("response missing" in s for s in exc.shortfalls)  # no event blamed
    row = exc.diagnosis.set_index("element").loc[TIE]
    assert row["family"] == "link" and row["over_mw"] > 0
    new_limit = 720.0 + float(row["over_mw"])
    raised = optreserve.load_case(_demo(tmp_path, 950.0, new_limit))
    res = optreserve.solve(raised)
    a = res.allocation
    pts = settle_case(raised, a["gain_mw_per_hz"], a["headroom_up_mw"], a["headroom_down_mw"])
    li = list(raised.links["link"]).index(TIE)
    worst = max(abs(p.flow_after_mw[li]) for p in pts)
    assert 720.0 < worst <= new_limit + 0.5  # 0.5 MW: solve's own verification tolerance
    assert all(abs(p.deviation_hz) <= 0.2 + 1e-5 for p in pts)


def test_check_and_solve_quote_the_same_shortfall(tmp_path):
    """1117.1 MW Kelvstrand trip: short even with every provider at its highest gain. solve's
    diagnosis quotes check's MW, and that MW is right by the independent balance: with
    check's most-capable allocation, an event smaller by the shortfall settles exactly at the
    limit (settle_deviation), the full event beyond it."""
    case = optreserve.load_case(_demo(tmp_path, 1117.1))
    cap = event_capability(case).set_index("event")
    short = float(cap.loc["trip_kelvstrand_nuclear1", "short_mw"])
    assert short > 1.0
    with pytest.raises(InfeasibleError) as info:
        optreserve.solve(case)
    diag = info.value.diagnosis.set_index("element")
    assert diag.loc["trip_kelvstrand_nuclear1", "short_mw"] == pytest.approx(short, rel=1e-9)
    assert f"{short:.1f} MW of response missing" in info.value.shortfalls[0]
    # the most-capable allocation, rebuilt from the screening's own numbers per unit
    from optreserve.model.horizon import prepare
    from optreserve.solver.screen import most_capable

    hz = prepare(case)
    K, r_up, _ = most_capable(case, hz)
    K, r = K[0].copy(), r_up[0]
    K[list(case.units["unit"]).index("Kelvstrand_Nuclear1")] = 0.0
    K = np.where(r > 0, K, 0.0)  # a unit holding no up headroom gives no up response
    D = float((case.areas["load_mw"] * case.areas["load_damping_pct_per_hz"] / 100).sum())
    d = case.units["deadband_mhz"].to_numpy(float) / 1000
    assert settle_deviation(1117.1 - short, K, d, r, D) == pytest.approx(0.2, abs=1e-9)
    assert settle_deviation(1117.1, K, d, r, D) > 0.2


def test_solve_never_blames_an_event_check_rates_fine(tmp_path, capsys):
    """1050 MW: the tie and the nadir both bind; check rates every event ok on its own, so
    solve's lines (CLI, exit 3) name the link and the nadir, never a settled shortfall."""
    d = _demo(tmp_path, 1050.0)
    assert main(["check", str(d)]) == 0
    capsys.readouterr()
    assert main(["solve", str(d), "--quiet"]) == 3
    err = capsys.readouterr().err
    assert TIE in err
    assert "response missing" not in err


def test_retune_words_come_from_the_same_evaluation(tmp_path):
    """retune's violations and solve's diagnosis share verify/breaks.describe: today's demo
    settings break the Kelvstrand event by the MW the independent balance gives."""
    from optreserve.model.horizon import prepare
    from optreserve.studies.retune import today, violations

    case = optreserve.load_case(DEMO)
    hz = prepare(case)
    now = today(case, hz)
    lines = violations(case, hz, now.gain, now.r_up, now.r_dn, 0.2)
    line = next(s for s in lines if s.startswith("event trip_kelvstrand_nuclear1:"))
    # hand: what today's settings give at 0.2 Hz, sum min(K (0.2 - d)^+, r) + 0.2 D
    K, r = now.gain[0].copy(), now.r_up[0]
    K[list(case.units["unit"]).index("Kelvstrand_Nuclear1")] = 0.0
    d = case.units["deadband_mhz"].to_numpy(float) / 1000
    give = np.minimum(K * np.maximum(0.2 - d, 0), np.where(K > 0, r, 0)).sum() + 0.2 * 136.8
    assert f"{720 - give:.1f} MW of response missing" in line
