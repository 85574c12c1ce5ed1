"""The package layout keeps the pipeline's promises (DEVELOPERS.md, "Layout").

Outside reference: Python's own parser (ast) reads the modules; nothing of optreserve runs.
- verify/ is the independent calculation: it must import nothing from model/ (or from the
  solver that reads model results), or it would check the optimiser against itself;
- one concept per module: a module over MAX_LINES says in its docstring why it reads best
  whole (common practice of the house style, ../shared/design/style.md).
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "optreserve"
MAX_LINES = 450  # "about 400"
MODULES = sorted(p for p in PACKAGE.rglob("*.py") if "__pycache__" not in p.parts)


def _imports(path: Path) -> set[str]:
    """Every module name an import statement names, at any depth of the file."""
    out = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            out |= {a.name for a in node.names}
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            out.add(node.module)
    return out


@pytest.mark.parametrize("path", [p for p in MODULES if p.parent.name == "verify"],
                         ids=lambda p: p.name)
def test_verify_imports_nothing_of_the_model_or_solver(path):
    bad = {m for m in _imports(path)
           if m.startswith(("optreserve.model", "optreserve.solver"))}
    assert not bad, f"{path.name} imports {sorted(bad)}"


@pytest.mark.parametrize("path", MODULES, ids=lambda p: str(p.relative_to(PACKAGE)))
def test_a_long_module_says_why_it_reads_whole(path):
    text = path.read_text(encoding="utf-8")
    n = len(text.splitlines())
    if n <= MAX_LINES:
        return
    doc = ast.get_docstring(ast.parse(text)) or ""
    assert "reads best whole" in doc, f"{n} lines and no reason in the docstring"


def test_the_layout_shows_the_pipeline():
    """The folders DEVELOPERS.md draws exist, each a package."""
    for name in ("case", "network", "model", "solver", "verify", "dynamics", "studies",
                 "output", "cli"):
        assert (PACKAGE / name / "__init__.py").is_file(), name
