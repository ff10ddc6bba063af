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

