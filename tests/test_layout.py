"""The package's layout: data flows one way (no import circle), and the map-reading side never needs torch.

Common practice (layered architecture): a module imports only what sits below it in the flow
imagery + labels → samples → model → maps → assessment → report; readers of a map folder,
the assessment, the farm-plot check and the report run on machines without the network.
"""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "plantation"
#: Modules that read maps, assess them or report on them: importing them must not import torch.
TORCH_FREE = [
    "plantation.mapping.folder",
    "plantation.mapping.catalog",
    "plantation.mapping.styles",
    "plantation.mapping.quicklook",
    "plantation.model.card",
    "plantation.benchmarks.plotcheck",
    "plantation.assessment.design",
    "plantation.assessment.estimators",
    "plantation.assessment.assess",
    "plantation.assessment.recalibrate",
    "plantation.farmplots.cutoff",
    "plantation.report.figures",
    "plantation.report.page",
    "plantation.benchmarks.reading",
    "plantation.model.runs",
    "plantation.reference.diff",
    "plantation.cli",
]


def module_name(path: Path) -> str:
    parts = path.relative_to(PACKAGE.parent).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def imports(path: Path) -> tuple[set[str], set[str]]:
    """Plantation modules imported at module level and inside functions."""
    top: set[str] = set()
    inner: set[str] = set()
    tree = ast.parse(path.read_text())
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.module and node.module.split(".")[0] == "plantation":
            names = {f"{node.module}.{a.name}" for a in node.names}
            # `from plantation.model import calibration` names a module; `from plantation.x import f` a member of x.
            targets = {n for n in names if (PACKAGE.parent / (n.replace(".", "/") + ".py")).is_file()} or {node.module}
            (top if node.col_offset == 0 else inner).update(targets)
        elif isinstance(node, ast.Import):
            for a in node.names:
                if a.name.split(".")[0] == "plantation":
                    (top if node.col_offset == 0 else inner).add(a.name)
    return top, inner


def graph() -> dict[str, set[str]]:
    return {module_name(p): imports(p)[0] for p in PACKAGE.rglob("*.py")}


def test_no_import_circle():
    g = graph()
    state: dict[str, int] = {}
    stack: list[str] = []

    def visit(m: str) -> None:
        state[m] = 1
        stack.append(m)
        for n in sorted(g.get(m, ())):
            n = n if n in g else n.rsplit(".", 1)[0]
            if state.get(n) == 1:
                pytest.fail("import circle: " + " → ".join(stack[stack.index(n) :] + [n]))
            if n in g and not state.get(n):
                visit(n)
        stack.pop()
        state[m] = 2

    for m in sorted(g):
        if not state.get(m):
            visit(m)


def test_no_function_level_imports_of_the_package_outside_the_command():
    # The command's verbs import their job when it runs (start-up time); nothing else may
    # import the package inside a function, which is how circles get dodged.
    offenders = {module_name(p): sorted(imports(p)[1]) for p in PACKAGE.rglob("*.py") if imports(p)[1] and "cli" not in p.relative_to(PACKAGE).parts}
    assert offenders == {}


def test_core_never_imports_the_benchmarks():
    g = graph()
    core = {m: deps for m, deps in g.items() if not m.startswith(("plantation.benchmarks", "plantation.cli"))}
    assert {m: sorted(d for d in deps if d.startswith("plantation.benchmarks")) for m, deps in core.items() if any(d.startswith("plantation.benchmarks") for d in deps)} == {}


def test_flow_runs_one_way():
    """A lower layer never imports a higher one."""
    order = ["errors", "config", "records", "imagery", "reference", "simulation", "model", "mapping", "assessment", "retraining", "farmplots", "report", "benchmarks", "cli", "__main__"]
    rank = {name: i for i, name in enumerate(order)}

    def layer(m: str) -> int:
        parts = m.split(".")
        return rank.get(parts[1], -1) if len(parts) > 1 else -1

    wrong = [(m, d) for m, deps in graph().items() for d in deps if layer(d) > layer(m) and m.split(".")[1:2] != ["simulation"]]
    # The simulator writes reference labels, so it sits beside reference; it never reaches the model or above.
    wrong += [(m, d) for m, deps in graph().items() if m.startswith("plantation.simulation") for d in deps if layer(d) >= rank["model"]]
    assert wrong == []


@pytest.mark.parametrize("module", TORCH_FREE)
def test_map_readers_assessment_farm_plots_and_report_do_not_import_torch(module):
    code = f"import sys, {module}; print('torch' in sys.modules)"
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert res.returncode == 0, res.stderr
    assert res.stdout.strip() == "False", f"importing {module} imports torch"
