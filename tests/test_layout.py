"""The code's layout rules, read from the source, and the one installed package.

The rules (``service/__init__.py`` and each subpackage's docstring say the same):

- ``causeline.service`` never imports ``causeline.training``: a deployment ships a bundle and
  the service code only;
- only ``causeline.service.api`` imports ``fastapi``, ``starlette`` or ``uvicorn``, and only
  ``causeline.service.dask`` imports ``dask`` or ``distributed``;
- a subpackage of ``service`` imports only the subpackages named in its docstring's
  "May import:" line, and those lines form no cycle;
- no module imports another that imports it back, however indirectly (module-level imports);
- nothing imports the folders ``service`` or ``training`` as top-level packages: installed,
  they exist only as ``causeline.service`` and ``causeline.training``.

:func:`violations` reads the source with :mod:`ast` and never imports it, so the checks hold for
code paths no test runs. A copy of the tree with broken imports planted in it shows each rule
can fail.
"""

from __future__ import annotations

import ast
import re
import shutil
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
# Folder in the repository -> its package name once installed (pyproject.toml's package-dir).
FOLDERS = {"causeline": "causeline", "service": "causeline.service",
           "training": "causeline.training"}
SERVICE = "causeline.service"
ONLY_IN = {
    "fastapi": f"{SERVICE}.api", "starlette": f"{SERVICE}.api", "uvicorn": f"{SERVICE}.api",
    "dask": f"{SERVICE}.dask", "distributed": f"{SERVICE}.dask",
}
# Modules directly inside causeline.service that every subpackage may use.
SHARED = {"errors", "progress"}
MAY_IMPORT = re.compile(r"^May import:\s*(.*?)\.?\s*$", re.MULTILINE)


def modules(root: Path) -> dict[str, Path]:
    """Every module of the installed package, by its dotted name."""
    found: dict[str, Path] = {}
    for folder, package in FOLDERS.items():
        for path in sorted((root / folder).rglob("*.py")):
            parts = list(path.relative_to(root / folder).with_suffix("").parts)
            if parts[-1] == "__init__":
                parts = parts[:-1]
            found[".".join([package, *parts])] = path
    return found


def imports(path: Path, name: str, known: set[str]) -> list[tuple[str, int, bool]]:
    """(module imported, line, at module level) for every import statement in the file."""
    tree = ast.parse(path.read_text("utf-8"), str(path))
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    top = {id(node) for node in tree.body}
    for node in tree.body:  # imports under a module-level `if` or `try` run at import time too
        if isinstance(node, ast.If | ast.Try):
            top |= {id(child) for child in ast.walk(node)}
    out: list[tuple[str, int, bool]] = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            out += [(alias.name, node.lineno, id(node) in top) for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                anchor = package.split(".")[: len(package.split(".")) - node.level + 1]
                base = ".".join([*anchor, base] if base else anchor)
            for alias in node.names:
                candidate = f"{base}.{alias.name}"
                target = candidate if candidate in known else base
                out.append((target, node.lineno, id(node) in top))
    return out


def declared(root: Path) -> dict[str, set[str]]:
    """Per subpackage of service, the subpackages its docstring's "May import:" line names."""
    out: dict[str, set[str]] = {}
    for init in sorted((root / "service").glob("*/__init__.py")):
        doc = ast.get_docstring(ast.parse(init.read_text("utf-8"))) or ""
        match = MAY_IMPORT.search(doc)
        names = [] if match is None else [n.strip() for n in match.group(1).split(",")]
        out[init.parent.name] = {n for n in names if n and n != "nothing"}
        if match is None:
            out[init.parent.name].add("<no 'May import:' line>")
    return out


def _cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected components with more than one node, or a node importing itself."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    found: list[list[str]] = []

    def visit(node: str) -> None:
        index[node] = low[node] = len(index)
        stack.append(node)
        on_stack.add(node)
        for other in sorted(graph.get(node, ())):
            if other not in index:
                visit(other)
                low[node] = min(low[node], low[other])
            elif other in on_stack:
                low[node] = min(low[node], index[other])
        if low[node] == index[node]:
            component = []
            while True:
                member = stack.pop()
                on_stack.discard(member)
                component.append(member)
                if member == node:
                    break
            if len(component) > 1 or node in graph.get(node, ()):
                found.append(sorted(component))

    for node in sorted(graph):
        if node not in index:
            visit(node)
    return found


def _subpackage(module: str) -> str | None:
    """``files`` for ``causeline.service.files.tables``; None outside a service subpackage."""
    parts = module.split(".")
    if parts[:2] != ["causeline", "service"] or len(parts) < 3:
        return None
    return parts[2]


def violations(root: Path) -> list[str]:
    """Every broken rule in the tree at ``root``, one line each; empty when all hold."""
    found = modules(root)
    known = set(found)
    allowed = declared(root)
    problems: list[str] = []
    graph: dict[str, set[str]] = {name: set() for name in found}
    for name, path in found.items():
        where = path.relative_to(root)
        mine = _subpackage(name)
        for target, line, module_level in imports(path, name, known):
            first = target.split(".")[0]
            if first in FOLDERS and first != "causeline":
                problems.append(f"{where}:{line}: imports {target!r}; the installed name is "
                                f"{FOLDERS[first]}")
            if name.startswith(SERVICE) and target.startswith("causeline.training"):
                problems.append(f"{where}:{line}: service imports {target}")
            home = ONLY_IN.get(first)
            if home is not None and not (name == home or name.startswith(home + ".")):
                problems.append(f"{where}:{line}: imports {first}; only {home} may")
            theirs = _subpackage(target)
            if mine is not None and theirs not in (None, mine, *allowed.get(mine, ()), *SHARED):
                problems.append(f"{where}:{line}: {mine} imports {theirs}, which its "
                                    "docstring's 'May import:' line does not name")
            if module_level and target in known and target != name:
                graph[name].add(target)
    for package, names in allowed.items():
        for other in sorted(names - SHARED):
            if other not in allowed:
                problems.append(f"service/{package}/__init__.py: 'May import:' names {other!r}, "
                                "which is no subpackage of service")
    for cycle in _cycles({p: n & set(allowed) for p, n in allowed.items()}):
        problems.append(f"the 'May import:' lines form a cycle: {' -> '.join(cycle)}")
    for cycle in _cycles(graph):
        problems.append(f"import cycle: {' -> '.join(cycle)}")
    return problems


def test_the_code_keeps_its_layout_rules() -> None:
    assert violations(REPO) == []


def test_every_service_subpackage_says_what_it_holds_and_may_import() -> None:
    for init in sorted((REPO / "service").glob("*/__init__.py")):
        doc = ast.get_docstring(ast.parse(init.read_text("utf-8"))) or ""
        assert len(doc.split()) >= 15, f"{init}: say what the subpackage holds"
        assert MAY_IMPORT.search(doc), f"{init}: no 'May import:' line"


@pytest.fixture
def tree(tmp_path: Path) -> Path:
    """A copy of the code to break on purpose."""
    for folder in FOLDERS:
        shutil.copytree(REPO / folder, tmp_path / folder,
                        ignore=shutil.ignore_patterns("__pycache__"))
    assert violations(tmp_path) == []
    return tmp_path


def _plant(tree: Path, relative: str, line: str, at_top: bool = True) -> None:
    path = tree / relative
    text = path.read_text("utf-8")
    if at_top:
        text = line + "\n" + text
    else:
        text += f"\n\ndef _planted() -> None:\n    {line}\n"
    path.write_text(text, "utf-8")


@pytest.mark.parametrize(("relative", "line", "expected"), [
    ("service/explain/score.py", "import fastapi", "only causeline.service.api may"),
    ("service/rootcause/grouping.py", "from starlette.requests import Request",
     "only causeline.service.api may"),
    ("service/files/tables.py", "import dask.dataframe", "only causeline.service.dask may"),
    ("service/api/app.py", "from distributed import Client", "only causeline.service.dask may"),
    ("service/bundle/load.py", "from causeline.training.fit import BASE_PARAMETERS",
     "service imports causeline.training"),
    ("service/explain/explainer.py", "from causeline.service.rootcause import grouping",
     "explain imports rootcause"),
    ("training/fit.py", "from service.explain.score import calibrate",
     "the installed name is causeline.service"),
])
def test_a_planted_import_breaks_a_rule(tree: Path, relative: str, line: str, expected: str
                                        ) -> None:
    _plant(tree, relative, line, at_top=True)
    found = violations(tree)
    assert any(expected in problem and relative in problem for problem in found), found


def test_an_import_inside_a_function_is_checked_too(tree: Path) -> None:
    _plant(tree, "service/features/builder.py", "import uvicorn", at_top=False)
    assert any("only causeline.service.api may" in p for p in violations(tree))


def test_a_planted_cycle_is_found(tree: Path) -> None:
    # storage is imported by tables; storage importing tables back closes a cycle.
    _plant(tree, "service/files/storage.py", "from causeline.service.files import tables")
    assert any(p.startswith("import cycle:") and "causeline.service.files.storage" in p
               for p in violations(tree))


def test_may_import_lines_that_form_a_cycle_are_refused(tree: Path) -> None:
    init = tree / "service" / "files" / "__init__.py"
    init.write_text(init.read_text("utf-8").replace("May import: errors.",
                                                    "May import: errors, api."), "utf-8")
    assert any("form a cycle" in p for p in violations(tree))


def test_the_wheel_installs_one_package(tmp_path: Path) -> None:
    """The built wheel holds ``causeline`` (with every module of the three folders) and its
    metadata, nothing else: no top-level ``service`` or ``training`` to clash with another
    distribution's."""
    source = tmp_path / "source"  # a copy, so the build leaves nothing in the checkout
    for folder in FOLDERS:
        shutil.copytree(REPO / folder, source / folder,
                        ignore=shutil.ignore_patterns("__pycache__"))
    for name in ("pyproject.toml", "README.md"):
        shutil.copy(REPO / name, source / name)
    built = subprocess.run(
        [sys.executable, "-m", "pip", "wheel", "--no-deps", "--quiet", "-w", str(tmp_path),
         str(source)],
        capture_output=True, text=True, timeout=600,
    )
    assert built.returncode == 0, built.stderr[-2000:]
    (wheel,) = tmp_path.glob("causeline-*.whl")
    names = zipfile.ZipFile(wheel).namelist()
    tops = {name.split("/")[0] for name in names}
    assert {t for t in tops if not t.endswith(".dist-info")} == {"causeline"}
    expected = {f"{FOLDERS[path.relative_to(REPO).parts[0]].replace('.', '/')}/"
                f"{'/'.join(path.relative_to(REPO).parts[1:])}"
                for path in modules(REPO).values()}
    assert expected - set(names) == set()
    # The report kit's templates and style sheet are package data: a page needs them installed.
    kit = REPO / "service" / "report"
    data = {f"causeline/service/report/{p.relative_to(kit).as_posix()}"
            for p in [kit / "style.css", *(kit / "templates").glob("*.html")]}
    assert len(data) > 2 and data - set(names) == set()
    (top_level,) = [n for n in names if n.endswith(".dist-info/top_level.txt")]
    assert zipfile.ZipFile(wheel).read(top_level).decode().split() == ["causeline"]
