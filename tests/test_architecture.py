"""The pipeline's shape (DEVELOPERS.md): data moves one way, so a module imports only
modules to its left.  Read from the source with ast, lazy imports inside functions
included; a module that is not placed below fails here until it is given a place."""
import ast
import pathlib

import pytest

PACKAGE = pathlib.Path(__file__).resolve().parent.parent / "gradcheck_kit"

# Position in the pipeline: a module may import only modules of a smaller number.
STAGES = {
    "errors": 0, "files": 0, "strategies": 0,
    "tree": 1,
    "analytic": 2, "plan": 2,
    "evaluate": 3,
    "frameworks": 3.5,      # adapts framework values for the public entries
    "stencils": 4,
    "probes": 5,
    "numeric": 6,
    "verdicts": 7,
    "hints": 8, "notes": 8,
    "figures": 9,
    "report": 10,
    "reevaluate": 11,
    "pipeline": 12,
    # checks built on the pipeline
    "remainder": 13, "jacobian": 13, "locate": 13, "products": 13,
    "stochastic_stats": 13, "stochastic_draws": 13, "stochastic_verdicts": 14,
    "stochastic_report": 14, "stochastic": 15, "monitor": 15,
    # front ends
    "assertions": 16, "cases": 16, "pytest_plugin": 17, "cli": 17, "__main__": 18,
    "__init__": 19,
}


def imported_siblings(path: pathlib.Path) -> set:
    tree = ast.parse(path.read_text())
    found = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.level == 1:
            if node.module:
                found.add(node.module.split(".")[0])
            else:
                found.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and \
                node.module.startswith("gradcheck_kit."):
            found.add(node.module.split(".")[1])
    return found


MODULES = sorted(p.stem for p in PACKAGE.glob("*.py"))


def test_every_module_has_a_place_in_the_pipeline():
    assert set(MODULES) <= set(STAGES), \
        f"give these modules a place in STAGES: {sorted(set(MODULES) - set(STAGES))}"


@pytest.mark.parametrize("module", MODULES)
def test_a_module_imports_only_to_its_left(module):
    if module not in STAGES:
        pytest.skip("not placed yet (see the test above)")
    imports = imported_siblings(PACKAGE / f"{module}.py") - {"__version__"}
    wrong = sorted(m for m in imports if STAGES.get(m, 99) >= STAGES[module])
    assert not wrong, f"{module} (stage {STAGES[module]}) imports {wrong}, which are not " \
                      "to its left in the pipeline"
