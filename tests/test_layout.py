"""The package layout's rules, checked by parsing every module's imports (DEVELOPERS.md, "Layout").

Common practice, no source: layering rules in the manner of import linters; they are stated in
DEVELOPERS.md and each one is a test here so that they cannot rot.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "envelope"

#: Top-level modules below the science layer: anything may import them.
FOUNDATION = {"envelope", "envelope.errors", "envelope.provenance", "envelope.terms", "envelope.grids"}
#: Calls that read or write files; science modules make none (files are opened in io/ and pipelines/).
FILE_CALLS = {"open", "read_text", "write_text", "read_bytes", "write_bytes", "read_csv", "to_csv", "open_dataset",
              "open_mfdataset", "open_rasterio", "to_netcdf", "to_raster", "mkdir", "unlink", "rmtree"}
#: Modules a command module may import whole; from any other, only constants (ALL_CAPS names).
CLI_MAY_IMPORT = ("envelope.cli", "envelope.errors", "envelope.pipelines", "envelope.study", "envelope.io.atomic")
LONG_MODULE = 400


def module_name(path: Path) -> str:
    parts = path.relative_to(PACKAGE.parent).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


MODULES = {module_name(p): p for p in sorted(PACKAGE.rglob("*.py"))}


def layer(name: str) -> str:
    if name in FOUNDATION:
        return "foundation"
    for prefix in ("kernels", "models", "io", "pipelines", "study", "cli"):
        if name == f"envelope.{prefix}" or name.startswith(f"envelope.{prefix}."):
            return prefix
    return "science"


def imports(path: Path):
    """Every ``(module, names, line)`` that ``path`` imports from envelope, at any depth of the file."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    here = module_name(path)
    package = here if path.name == "__init__.py" else here.rpartition(".")[0]
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.split(".")[0] == "envelope":
                    yield alias.name, [], node.lineno
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - node.level + 1]
                module = ".".join(base + ([node.module] if node.module else []))
            else:
                module = node.module or ""
            if module.split(".")[0] != "envelope":
                continue
            names = [a.name for a in node.names]
            submodules = [f"{module}.{n}" for n in names if f"{module}.{n}" in MODULES]
            if submodules:  # `from envelope import figures` imports the module envelope.figures
                for sub in submodules:
                    yield sub, [], node.lineno
                names = [n for n in names if f"{module}.{n}" not in MODULES]
                if not names:
                    continue
            yield module, names, node.lineno


def graph() -> dict:
    return {name: {m for m, _, _ in imports(path) if m in MODULES and m != name} for name, path in MODULES.items()}


def test_every_module_is_seen():
    # the rules below are only as good as the module list: it must hold every layer
    assert {layer(m) for m in MODULES} == {"foundation", "kernels", "models", "io", "science", "pipelines", "study",
                                           "cli"}


def test_no_import_cycles():
    edges = graph()
    state, stack, cycles = {}, [], []

    def visit(node):
        state[node] = "open"
        stack.append(node)
        for nxt in sorted(edges[node]):
            if state.get(nxt) == "open":
                cycles.append(stack[stack.index(nxt):] + [nxt])
            elif nxt not in state:
                visit(nxt)
        stack.pop()
        state[node] = "done"

    for node in sorted(edges):
        if node not in state:
            visit(node)
    assert not cycles, "import cycles: " + "; ".join(" -> ".join(c) for c in cycles)


ALLOWED = {  # envelope.errors, the error family, may be imported by every module
    "foundation": {"foundation", "kernels"},
    "kernels": {"kernels"},
    "models": {"models", "kernels"},
    "io": {"foundation", "kernels", "models", "io"},
    "science": {"foundation", "kernels", "models", "science"},
    "pipelines": {"foundation", "kernels", "models", "io", "science", "pipelines"},
    "study": {"foundation", "kernels", "models", "io", "science", "pipelines", "study"},
}


@pytest.mark.parametrize("name", sorted(m for m in MODULES if layer(m) != "cli"))
def test_imports_point_down(name):
    here = layer(name)
    bad = []
    for module, names, line in imports(MODULES[name]):
        there = layer(module)
        if module == "envelope.errors":
            continue  # the error family; kernels and models import nothing else of envelope
        if module == "envelope" and names == ["__version__"]:
            continue
        if there not in ALLOWED[here]:
            bad.append(f"line {line}: {module} ({there})")
    assert not bad, f"{name} ({here}) imports upward: " + ", ".join(bad)


@pytest.mark.parametrize("name", sorted(m for m in MODULES if layer(m) == "cli"))
def test_command_modules_hold_no_science(name):
    # a command parses, calls a pipeline or the study runner, and prints: any other import is
    # limited to constants (click choices)
    bad = []
    for module, names, line in imports(MODULES[name]):
        if module == "envelope" and names == ["__version__"]:
            continue
        if module.startswith(CLI_MAY_IMPORT):
            continue
        loose = [n for n in names if not n.isupper()] or ([] if names else [module])
        if loose:
            bad.append(f"line {line}: {module}: {', '.join(loose)}")
    assert not bad, f"{name} imports more than pipelines and constants: " + "; ".join(bad)


@pytest.mark.parametrize("name", sorted(m for m in MODULES if layer(m) == "science"))
def test_science_modules_open_no_files(name):
    tree = ast.parse(MODULES[name].read_text(encoding="utf-8"))
    calls = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Call):
            func = node.func
            called = func.id if isinstance(func, ast.Name) else func.attr if isinstance(func, ast.Attribute) else ""
            if called in FILE_CALLS:
                calls.append(f"line {node.lineno}: {called}()")
    assert not calls, f"{name} touches files: " + ", ".join(calls)


@pytest.mark.parametrize("name", sorted(MODULES))
def test_no_private_name_imported_from_another_module(name):
    bad = [f"line {line}: {module}.{n}" for module, names, line in imports(MODULES[name])
           for n in names if n.startswith("_") and n != "__version__" and module != name]
    assert not bad, f"{name} imports private names: " + ", ".join(bad)


@pytest.mark.parametrize("name", sorted(MODULES))
def test_module_docstring_names_its_concept(name):
    # a module says in one line what it holds; one over LONG_MODULE lines holds one concept, so its
    # one-line summary is a single statement (no list of several things joined by ';')
    path = MODULES[name]
    text = path.read_text(encoding="utf-8")
    doc = ast.get_docstring(ast.parse(text))
    assert doc, f"{name}: no module docstring"
    first = doc.splitlines()[0]
    if len(text.splitlines()) > LONG_MODULE:
        assert ";" not in first and len(first) <= 140, f"{name}: {len(text.splitlines())} lines; docstring {first!r}"


def test_one_home_for_each_fact():
    # Common practice, no source: the facts the layout issue found in several copies have one definition
    sources = {name: path.read_text(encoding="utf-8") for name, path in MODULES.items()}

    def defined(pattern):
        return sorted(n for n, s in sources.items() if pattern in s)

    assert defined("def resolve_threshold(") == ["envelope.pipelines.inputs"]
    assert defined("def read_scenarios(") == ["envelope.io.tables"]
    assert defined("def read_class_table(") == ["envelope.io.tables"]
    assert defined("def read_model_table(") == ["envelope.io.tables"]
    assert defined("def build_reach_inputs(") == ["envelope.pipelines.inputs"]
    assert defined("def file_sha256(") == ["envelope.provenance"]
    assert defined("def software_versions(") == ["envelope.provenance"]
    assert defined("def json_ready(") == ["envelope.provenance"]
    assert defined("def parse_crs(") == ["envelope.grids"]
    assert defined("METHOD_NAMES = ") == ["envelope.models"]
    assert defined("class RunLayout") == ["envelope.study.layout"]
    # no run-folder or batch file name is spelled outside the two modules that own them
    for pattern in ("}_suitability{", "f\"ensemble_{", "now_suitability{", '"change_table.csv"', '_reach.json"'):
        assert defined(pattern) in (["envelope.pipelines.project"], ["envelope.study.layout"]), pattern
    # no table is read with pandas outside io/ (the study report reads the change table and folds it wrote)
    readers = defined("read_csv(")
    assert all(layer(n) in ("io", "study") for n in readers), readers


def test_developers_guide_names_every_module():
    # Common practice, no source: the contributor guide gives each module its one-line role
    guide = (PACKAGE.parent / "DEVELOPERS.md").read_text(encoding="utf-8")
    missing = [name for name, path in MODULES.items()
               if path.name != "__init__.py" and f"`{path.relative_to(PACKAGE).as_posix()}`" not in guide]
    assert not missing, "DEVELOPERS.md lists no role for: " + ", ".join(sorted(missing))


@pytest.mark.parametrize("name", sorted(m for m in MODULES if layer(m) == "kernels"))
def test_kernel_messages_name_parameters_not_flags(name):
    # kernels know nothing of the command line: a message names the parameter (``rate``), and the
    # command that passed it may add its flag
    import re

    tree = ast.parse(MODULES[name].read_text(encoding="utf-8"))
    bad = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Raise) and node.exc is not None:
            for part in ast.walk(node.exc):
                if isinstance(part, ast.Constant) and isinstance(part.value, str) and re.search(r"--[a-z]", part.value):
                    bad.append(f"line {node.lineno}: {part.value.strip()[:60]!r}")
    assert not bad, f"{name} names command-line flags: " + "; ".join(bad)
