"""The import contract of the package: a pure numerical core under thin shells.

The core (docs/architecture.md) takes arrays and returns arrays or small frozen results:
it opens no file, prints nothing, reads no settings and knows nothing of the study file.
These checks read the source (Python's ``ast``), so they hold for every code path, not
only the ones a test happens to run:

- no core module imports, directly or through other grouplevel modules, a settings,
  file, console, progress, report or output module (imports under ``if TYPE_CHECKING:``
  are type hints only and never run);
- no core module raises ``UserError`` (it raises ``ArgumentError``, a ValueError, in its
  own words) or names a study-file section such as ``[inference]`` in a message;
- no core module calls ``print``, ``open`` or ``input``;
- every package on disk is listed in ``[tool.setuptools] packages`` of pyproject.toml,
  so that the wheel ships it (tests/test_packaging.py builds and installs that wheel).

The rule itself is common practice for scientific libraries (a computational core free
of input/output, e.g. scipy.stats and statsmodels take arrays and return result
objects); the lists below are this project's reading of it.
"""

from __future__ import annotations

import ast
import functools
import re
import tomllib
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
PACKAGE = ROOT / "grouplevel"

# The numerical core: whole sub-packages and single modules of the mixed ones.
CORE_PACKAGES = ("grouplevel.model", "grouplevel.inference")
CORE_MODULES = (
    "grouplevel.errors",
    "grouplevel.machine",
    "grouplevel.anatomy.coordinates",
    "grouplevel.anatomy.midplane",
    "grouplevel.anatomy.regions",
    "grouplevel.anatomy.sidenames",
    "grouplevel.questions.symmetry",
    "grouplevel.questions.specificity",
    "grouplevel.questions.differences",
    "grouplevel.questions.quality",
    "grouplevel.questions.verdicts",
    "grouplevel.planning.power",
)
# Module prefixes the core must not reach: the shells of every stage.
FORBIDDEN_INTERNAL = (
    "grouplevel.intake",  # settings (TOML), runs table, images (NIfTI files), design
    "grouplevel.results",  # group result types and compute backends (shell side)
    "grouplevel.anatomy.atlas",  # reads atlas files
    "grouplevel.anatomy.labels",  # reads atlas label tables
    "grouplevel.anatomy.tables",
    "grouplevel.questions.ask",
    "grouplevel.outputs",
    "grouplevel.report",
    "grouplevel.planning.plan",
    "grouplevel.cli",
    "grouplevel.pipeline",
    "grouplevel.example",
)
# Third-party modules the core must not import: files, console, progress, settings.
FORBIDDEN_EXTERNAL = (
    "nibabel",  # except the pure orientation and affine helpers below
    "tqdm",
    "jinja2",
    "matplotlib",
    "tomllib",
    "argparse",
    "distributed",
    "dask",
)
ALLOWED_EXTERNAL = ("nibabel.orientations", "nibabel.affines")
FORBIDDEN_CALLS = ("print", "open", "input")
# a study-file section in a message, e.g. "[inference] permutations ..."
SECTION = re.compile(
    r"\[(study|space|model|inference|clusters|atlas|questions|compute|report|tables)[\].]"
)


def _module_path(name: str) -> Path:
    rel = Path(*name.split(".")[1:])
    package = PACKAGE / rel / "__init__.py"
    return package if package.is_file() else PACKAGE / rel.with_suffix(".py")


def _module_name(path: Path) -> str:
    parts = path.relative_to(ROOT).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def _all_modules() -> dict[str, Path]:
    return {_module_name(p): p for p in PACKAGE.rglob("*.py") if "templates" not in p.parts}


def _core() -> list[str]:
    names = [
        name
        for name in _all_modules()
        if any(name == pkg or name.startswith(pkg + ".") for pkg in CORE_PACKAGES)
    ]
    return sorted({*names, *CORE_MODULES})


def _is_type_checking(node: ast.If) -> bool:
    test = node.test
    return (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or (
        isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING"
    )


def _walk_runtime(tree: ast.AST):
    """Every node except those under ``if TYPE_CHECKING:``."""
    stack = [tree]
    while stack:
        node = stack.pop()
        yield node
        for child in ast.iter_child_nodes(node):
            if isinstance(child, ast.If) and _is_type_checking(child):
                stack.extend(child.orelse)
                continue
            stack.append(child)


@functools.cache
def _imports(name: str, module_level_only: bool = False) -> frozenset[str]:
    """Modules imported at run time by module ``name`` (absolute dotted names).

    ``module_level_only``: only the imports that run when the module is imported (not
    those inside its functions) — what importing a sub-module runs of its package.
    """
    path = _module_path(name)
    source = path.read_text(encoding="utf-8")
    return frozenset(_imports_of(source, name, path.name == "__init__.py", module_level_only))


def _imports_of(
    source: str, name: str, is_package: bool = False, module_level_only: bool = False
) -> set[str]:
    tree = ast.parse(source)
    package = name if is_package else name.rpartition(".")[0]
    nodes = _walk_runtime(tree)
    if module_level_only:
        in_functions = _function_nodes(tree)
        nodes = (n for n in _walk_runtime(tree) if id(n) not in in_functions)
    out: set[str] = set()
    for node in nodes:
        if isinstance(node, ast.Import):
            out.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - node.level + 1]
                module = ".".join([*base, node.module] if node.module else base)
            else:
                module = node.module or ""
            out.add(module)
            # `from grouplevel.inference import fdr` may name a sub-module
            for alias in node.names:
                candidate = f"{module}.{alias.name}"
                if candidate.startswith("grouplevel.") and _module_path(candidate).is_file():
                    out.add(candidate)
    return out


def _forbidden(modules) -> list[str]:
    return [
        m
        for m in modules
        if any(m == f or m.startswith(f + ".") for f in FORBIDDEN_INTERNAL) or m in _OLD_PATHS
    ]


def _function_nodes(tree: ast.AST) -> set[int]:
    """ids of the nodes inside function bodies (they run only when called)."""
    inside: set[int] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.FunctionDef | ast.AsyncFunctionDef | ast.Lambda):
            inside.update(id(child) for child in ast.walk(node) if child is not node)
    return inside


def _internal_closure(name: str) -> dict[str, str]:
    """grouplevel modules reached from ``name`` at run time → the module importing it.

    A module imported by name counts with all its imports; a package whose sub-module is
    imported counts only with what its ``__init__`` imports at module level (a lazy
    re-export inside ``__getattr__`` runs only when that name is used).
    """
    seen = {name: ""}
    stack = [(name, False)]
    while stack:
        current, implicit = stack.pop()
        for imported in _imports(current, module_level_only=implicit):
            if not imported.startswith("grouplevel"):
                continue
            parts = imported.split(".")
            for k in range(2, len(parts) + 1):
                module = ".".join(parts[:k])
                if module not in seen and _module_path(module).is_file():
                    seen[module] = current
                    stack.append((module, k < len(parts)))
    return seen


def _chain(seen: dict[str, str], module: str) -> str:
    links = [module]
    while seen[links[-1]]:
        links.append(seen[links[-1]])
    return " <- ".join(links)


def test_the_core_lists_name_existing_modules():
    for name in (*CORE_PACKAGES, *CORE_MODULES):
        assert _module_path(name).is_file(), name
    assert len(_core()) >= 15


@pytest.mark.parametrize("name", _core())
def test_core_module_reaches_no_shell(name):
    seen = _internal_closure(name)
    bad = [_chain(seen, m) for m in _forbidden(seen)]
    assert not bad, f"{name} imports a shell module: {bad}"


@pytest.mark.parametrize("name", _core())
def test_core_module_imports_no_file_or_console_library(name):
    reached = [m for m in _internal_closure(name) if m.startswith("grouplevel")]
    bad = []
    for module in reached:
        for imported in _imports(module):
            if imported.startswith(ALLOWED_EXTERNAL):
                continue
            if any(imported == f or imported.startswith(f + ".") for f in FORBIDDEN_EXTERNAL):
                bad.append(f"{module}: {imported}")
    assert not bad, f"{name} reaches {bad}"


@pytest.mark.parametrize("name", _core())
def test_core_module_speaks_in_its_own_words(name):
    problems = _word_problems(_module_path(name).read_text(encoding="utf-8"))
    assert not problems, f"{name}: {problems}"


def _word_problems(source: str) -> list[str]:
    tree = ast.parse(source)
    docstrings = _docstrings(tree)
    problems = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Raise) and node.exc is not None:
            call = node.exc.func if isinstance(node.exc, ast.Call) else node.exc
            if isinstance(call, ast.Name) and call.id == "UserError":
                problems.append(f"line {node.lineno}: raises UserError")
        if isinstance(node, ast.Call) and isinstance(node.func, ast.Name):
            if node.func.id in FORBIDDEN_CALLS:
                problems.append(f"line {node.lineno}: calls {node.func.id}()")
        if isinstance(node, ast.Constant) and isinstance(node.value, str):
            if id(node) not in docstrings and SECTION.search(node.value):
                problems.append(f"line {node.lineno}: names a study-file section")
    return problems


def _docstrings(tree: ast.AST) -> set[int]:
    """ids of the docstring constants (they may quote the study file's sections)."""
    out: set[int] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Module | ast.ClassDef | ast.FunctionDef | ast.AsyncFunctionDef):
            body = node.body
            if body and isinstance(body[0], ast.Expr) and isinstance(body[0].value, ast.Constant):
                out.add(id(body[0].value))
    return out


def test_the_checks_can_fail():
    # a shell import is caught, a type-only import is not counted
    source = (
        "from typing import TYPE_CHECKING\n"
        "from grouplevel.intake.settings import Settings\n"
        "if TYPE_CHECKING:\n"
        "    from grouplevel.report import render\n"
    )
    imported = _imports_of(source, "grouplevel.model.probe")
    assert _forbidden(imported) == ["grouplevel.intake.settings"]
    assert _forbidden({"grouplevel.study"}) == ["grouplevel.study"]  # an old path
    # a UserError, a study-file section and a print are each caught
    bad = (
        "def f(n):\n"
        "    print(n)\n"
        "    raise UserError(f'[inference] permutations must be at least 1, got {n}')\n"
    )
    assert len(_word_problems(bad)) == 3
    good = "def f(n):\n    raise ArgumentError(f'n_permutations must be at least 1, got {n}')\n"
    assert _word_problems(good) == []


# old flat module paths (grouplevel/_moved.py): the core uses the new homes
_OLD_PATHS = {
    f"grouplevel.{old}"
    for old in (
        "config study images design memory atlas coordinates regions tables symmetry "
        "specificity quality compute overview"
    ).split()
}


def test_every_package_on_disk_is_shipped():
    config = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
    listed = set(config["tool"]["setuptools"]["packages"])
    on_disk = {
        _module_name(p) for p in PACKAGE.rglob("__init__.py") if "__pycache__" not in p.parts
    }
    assert on_disk <= listed, f"not in [tool.setuptools] packages: {sorted(on_disk - listed)}"
