"""The package's three layers, read from its own imports.

Stages are pure (no store, no files, no presentation), presentation only draws what it
is handed, and workflows alone touch a store (DEVELOPERS.md, "Three layers"). Every
``import`` and ``from ... import`` in the package, at module level or inside a function,
is read with :mod:`ast` and checked against the allowed direction. Reference: the
project's design rule (common practice of layered architectures, no source).
"""

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "analogs"

#: Layer of each part of the package; a module not listed under a folder is "base".
FOLDER_LAYERS = {"stages": "stages", "workflows": "workflows", "presentation": "presentation"}
ENTRY_POINTS = {"api", "cli", "__main__"}
#: Which layers each layer may import.
ALLOWED = {
    "base": {"base"},
    "stages": {"base", "stages"},
    "presentation": {"base", "stages", "presentation"},
    "workflows": {"base", "stages", "presentation", "workflows"},
    "entry": {"base", "stages", "presentation", "workflows", "entry"},
}
#: Calls that write files, which no stage or presentation module may make (figures are
#: rendered to PNG bytes in memory; workflows write them).
FILE_WRITERS = {"to_netcdf", "to_parquet", "to_csv", "write_text", "write_bytes", "to_zarr"}


def layer_of_module(dotted: str) -> str | None:
    """Layer of an ``analogs...`` module name; None for modules outside the package."""
    parts = dotted.split(".")
    if parts[0] != "analogs":
        return None
    if len(parts) == 1:
        return "base"
    if parts[1] in FOLDER_LAYERS:
        return FOLDER_LAYERS[parts[1]]
    if parts[1] in ENTRY_POINTS:
        return "entry"
    return "base"


def module_name(path: Path) -> str:
    relative = path.relative_to(PACKAGE.parent).with_suffix("")
    parts = list(relative.parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def imported_modules(tree: ast.AST, here: str) -> list[tuple[int, str]]:
    """(line, absolute module name) of every import in a module, relative ones resolved."""
    found = []
    package = here.rsplit(".", 1)[0] if "." in here else here
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            found.extend((node.lineno, alias.name) for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[:len(base) - (node.level - 1)]
                module = ".".join(base + ([node.module] if node.module else []))
            else:
                module = node.module or ""
            found.append((node.lineno, module))
            # "from analogs import workflows" imports a layer by name.
            found.extend((node.lineno, f"{module}.{alias.name}") for alias in node.names
                         if layer_of_module(f"{module}.{alias.name}") in FOLDER_LAYERS.values())
    return found


def package_modules():
    return sorted(PACKAGE.rglob("*.py"))


def violations_of(path: Path) -> list[str]:
    here = module_name(path)
    own = layer_of_module(here)
    tree = ast.parse(path.read_text(), filename=str(path))
    problems, seen = [], set()
    for line, module in imported_modules(tree, here):
        target = layer_of_module(module)
        if target is not None and target not in ALLOWED[own] and line not in seen:
            seen.add(line)
            problems.append(f"{path.relative_to(PACKAGE.parent)}:{line}: {own} module {here} "
                            f"imports {target} module {module}")
    if own in ("stages", "presentation", "base"):
        for node in ast.walk(tree):
            if (isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute)
                    and node.func.attr in FILE_WRITERS):
                problems.append(f"{path.relative_to(PACKAGE.parent)}:{node.lineno}: {own} module "
                                f"{here} writes a file ({node.func.attr})")
    return problems


def test_the_three_layers_are_folders():
    for folder in FOLDER_LAYERS:
        assert (PACKAGE / folder / "__init__.py").is_file(), folder
    assert list((PACKAGE / "stages").glob("*.py")), "no stage modules found"


@pytest.mark.parametrize("path", package_modules(), ids=lambda p: module_name(p))
def test_imports_run_with_the_layers(path):
    problems = violations_of(path)
    assert not problems, "\n".join(problems)


def test_a_wrong_way_import_is_caught(tmp_path, monkeypatch):
    """The checker itself fails on a stage that imports the store (guards against a vacuous
    test), on a relative import, and on a stage that writes a file."""
    fake = tmp_path / "analogs"
    (fake / "stages").mkdir(parents=True)
    bad = fake / "stages" / "bad.py"
    bad.write_text("def f(ds, path):\n"
                   "    from ..workflows import store\n"
                   "    from analogs.presentation.figures import target_map\n"
                   "    ds.to_netcdf(path)\n")
    monkeypatch.setattr(__import__(__name__), "PACKAGE", fake)
    problems = violations_of(bad)
    assert len(problems) == 3, problems
    assert "imports workflows module analogs.workflows" in problems[0]
    assert "imports presentation module analogs.presentation.figures" in problems[1]
    assert "writes a file (to_netcdf)" in problems[2]
