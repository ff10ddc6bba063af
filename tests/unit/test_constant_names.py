"""One name, one meaning: a named constant of the package is defined in one
module only.

Two modules assigning the same constant name would give one word two values
(a symmetry tolerance of 1e-5 bohr for the point-group detection and 1e-4 bohr
for matching atoms in the state checks once shared one name). Read from the
source (ast), so no module is imported and PySCF is not needed.
"""

from __future__ import annotations

import ast
from collections import defaultdict
from pathlib import Path

import fieldprop

PACKAGE = Path(fieldprop.__file__).parent


def _is_constant(name: str) -> bool:
    bare = name.lstrip("_")
    return bool(bare) and bare.upper() == bare and any(c.isalpha() for c in bare)


def _modules():
    for path in sorted(PACKAGE.rglob("*.py")):
        yield path.relative_to(PACKAGE).as_posix(), ast.parse(path.read_text(encoding="utf-8"))


def test_every_constant_name_is_defined_in_one_module():
    defined = defaultdict(list)
    for module, tree in _modules():
        for node in tree.body:
            targets = (node.targets if isinstance(node, ast.Assign)
                       else [node.target] if isinstance(node, ast.AnnAssign) else [])
            for target in targets:
                if isinstance(target, ast.Name) and _is_constant(target.id):
                    defined[target.id].append(module)
    twice = {name: modules for name, modules in defined.items() if len(set(modules)) > 1}
    assert not twice, f"constant names defined in more than one module: {twice}"
    assert "SYMMETRY_TOLERANCE_BOHR" in defined  # the scan sees module constants



#: The backend's functions whose thresholds and counts are named constants:
#: the solver, the ladder, the state checks and the grids (and the geometry
#: optimisation's SCF settings).
NAMED_NUMBERS_IN = ("_newton", "_ladder", "_converge", "_converge_structure",
                    "_correlated_energy", "solve", "_start_orbitals",
                    "_rotation_from_reference", "symmetry_operations", "state_issues",
                    "compute_relaxed_point", "optimize_geometry", "response")
#: Numbers that are arithmetic, not settings (a count's step, a factor of a
#: formula, an empty start); dimensions given as `comp=`/`repeat=` and indices
#: are not looked at.
ARITHMETIC = {0, 1, 2, -1}


def test_the_backend_s_solver_ladder_state_checks_and_grids_use_named_numbers():
    bare, seen = [], set()
    for path in sorted((PACKAGE / "backend").glob("*.py")):
        tree = ast.parse(path.read_text(encoding="utf-8"))
        skipped = set()
        for node in ast.walk(tree):
            if isinstance(node, ast.keyword) and node.arg in ("comp", "repeat"):
                skipped.add(id(node.value))
            if isinstance(node, ast.Subscript):
                skipped.update(id(n) for n in ast.walk(node.slice))
        for node in ast.walk(tree):
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)) and \
                    node.name in NAMED_NUMBERS_IN:
                seen.add(node.name)
                for inner in ast.walk(node):
                    value = inner
                    if isinstance(inner, ast.UnaryOp) and isinstance(inner.op, ast.USub):
                        value = inner.operand
                    if (isinstance(value, ast.Constant) and type(value.value) in (int, float)
                            and id(inner) not in skipped and id(value) not in skipped
                            and value.value not in ARITHMETIC
                            and -value.value not in ARITHMETIC):
                        bare.append(f"backend/{path.name}: {node.name}: line {inner.lineno}: "
                                    f"{ast.unparse(inner)}")
    # The scan sees every function it is meant to judge, wherever it moved in
    # the backend.
    assert seen == set(NAMED_NUMBERS_IN), sorted(set(NAMED_NUMBERS_IN) - seen)
    assert not bare, "bare numbers (name them near the top of their backend module): " + \
        "; ".join(bare)
