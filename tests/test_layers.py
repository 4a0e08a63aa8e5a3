"""The architecture as a test: each layer imports only from the layers before it (DEVELOPERS.md)."""

import ast
from pathlib import Path

import roikit

ORDER = ["base", "images", "regions", "extraction", "stats", "reporting", "study", "demo", "cli"]
BASE = {"errors", "_tables", "_typing", "_outputs", "_options", "__init__"}
PACKAGE = Path(roikit.__file__).parent


def _layer(module: str) -> str:
    """Layer of a module path relative to the package, e.g. 'stats.designs' -> 'stats'."""
    top = module.split(".")[0]
    if top in BASE or top == "":
        return "base"
    if top == "__main__":
        return "cli"
    if top == "functional":  # functional regions: selection and extraction over each participant's own voxels
        return "extraction"
    return top


def _imports(path: Path, module: str):
    tree = ast.parse(path.read_text(encoding="utf-8"))
    package_parts = module.split(".")[:-1] if not path.name == "__init__.py" else module.split(".")
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom):
            if node.level:
                base = package_parts[: len(package_parts) - (node.level - 1)]
                target = ".".join(base + ([node.module] if node.module else []))
                if not node.module:  # from . import x
                    for alias in node.names:
                        yield ".".join(base + [alias.name])
                    continue
                yield target
            elif node.module and node.module.startswith("roikit"):
                yield node.module[len("roikit."):] if node.module != "roikit" else "__init__"
        elif isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.startswith("roikit."):
                    yield alias.name[len("roikit."):]


def test_every_module_imports_only_from_earlier_layers():
    problems = []
    modules = sorted(PACKAGE.rglob("*.py"))
    assert len(modules) > 10
    for path in modules:
        rel = path.relative_to(PACKAGE).with_suffix("")
        module = ".".join(rel.parts)
        own = _layer(module)
        if own not in ORDER:
            problems.append(f"{module}: not in any layer; add it to DEVELOPERS.md and this test")
            continue
        for target in _imports(path, module):
            if not target:
                continue
            layer = _layer(target)
            if layer in ORDER and ORDER.index(layer) > ORDER.index(own):
                problems.append(f"{module} ({own}) imports {target} ({layer})")
    assert not problems, "\n".join(problems)


def test_the_layer_check_catches_a_backward_import(tmp_path):
    # the checker itself must be able to fail
    fake = tmp_path / "images.py"
    fake.write_text("from .stats import run_design\nfrom . import errors\n")
    found = list(_imports(fake, "images"))
    assert "stats" in found[0] and ORDER.index(_layer(found[0])) > ORDER.index("images")
