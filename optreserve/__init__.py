"""optreserve: least-cost primary reserve headroom and governor droop allocation.

    import optreserve
    case = optreserve.load_case("instances/demo")
    result = optreserve.solve(case)
    result.allocation, result.events, result.links   # pandas DataFrames
    result.write("out/demo")

Results are planning studies, not operating instructions.
"""

__version__ = "0.1.0"

from optreserve.case.data import Case  # noqa: E402
from optreserve.case.reader import load_case  # noqa: E402
from optreserve.errors import (  # noqa: E402
    CaseError,
    InfeasibleError,
    OptreserveError,
    SolverError,
    VerificationError,
)
from optreserve.output.results import Result  # noqa: E402
from optreserve.solver.run import solve  # noqa: E402
from optreserve.solver.screen import event_capability  # noqa: E402

__all__ = [
    "Case",
    "CaseError",
    "InfeasibleError",
    "OptreserveError",
    "Result",
    "SolverError",
    "VerificationError",
    "event_capability",
    "load_case",
    "solve",
]
