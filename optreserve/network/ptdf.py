"""The area network: power transfer distribution factors from link reactances (DC rules)."""

from __future__ import annotations

import numpy as np

from optreserve.case.data import Case


def incidence(case: Case) -> np.ndarray:
    """Link-by-area incidence: +1 at from_area, -1 at to_area."""
    pos = {a: k for k, a in enumerate(case.areas["area"])}
    n_l, n_a = len(case.links), len(case.areas)
    C = np.zeros((n_l, n_a))
    for row, (f, t) in enumerate(zip(case.links["from_area"], case.links["to_area"])):
        C[row, pos[f]] += 1.0
        C[row, pos[t]] -= 1.0
    return C


def ptdf(case: Case, slack: int = 0) -> np.ndarray:
    """PTDF matrix Phi (links x areas): flow change on each link per MW injected at an area
    and withdrawn at the slack. For injections that sum to zero the flows do not depend on
    the slack chosen."""
    n_a = len(case.areas)
    n_l = len(case.links)
    if n_l == 0 or n_a == 1:
        return np.zeros((n_l, n_a))
    C = incidence(case)
    b = 1.0 / case.links["reactance_pu"].to_numpy(float)
    B = C.T @ (b[:, None] * C)  # area susceptance matrix
    keep = [k for k in range(n_a) if k != slack]
    X = np.zeros((n_a, n_a))
    X[np.ix_(keep, keep)] = np.linalg.inv(B[np.ix_(keep, keep)])
    return (b[:, None] * C) @ X
