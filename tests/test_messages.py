"""House style of messages: true plurals ("1 region", "3 regions"), never "region(s)" (issue 14)."""

import ast
import re
from pathlib import Path

import roikit

PACKAGE = Path(roikit.__file__).parent
HEDGED = re.compile(r"[A-Za-z]\(s\)")


def _hedged_plurals(source: str, name: str) -> list[str]:
    """String literals (docstrings excluded) that write a hedged plural such as 'region(s)'."""
    tree = ast.parse(source)
    docstrings = {id(node.body[0].value) for node in ast.walk(tree)
                  if isinstance(node, (ast.Module, ast.ClassDef, ast.FunctionDef, ast.AsyncFunctionDef))
                  and node.body and isinstance(node.body[0], ast.Expr)
                  and isinstance(node.body[0].value, ast.Constant)}
    return [f"{name}:{node.lineno}: {node.value.strip()[:80]}" for node in ast.walk(tree)
            if isinstance(node, ast.Constant) and isinstance(node.value, str) and id(node) not in docstrings
            and HEDGED.search(node.value)]


def test_no_message_hedges_its_plural():
    found = [hit for path in sorted(PACKAGE.rglob("*.py"))
             for hit in _hedged_plurals(path.read_text(encoding="utf-8"), str(path.relative_to(PACKAGE)))]
    assert not found, "use roikit._options.plural/noun instead of '(s)':\n" + "\n".join(found)


def test_the_check_finds_a_hedged_plural_but_not_a_docstring():
    source = 'def f(n):\n    """Map(s) in a docstring are fine."""\n    raise ValueError(f"{n} region(s) empty")\n'
    assert [hit.split(":")[1] for hit in _hedged_plurals(source, "x.py")] == ["3"]
