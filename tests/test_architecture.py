"""The shape of the code (issue 16): short functions, no borrowed private names, no import circle, a thin
pipeline, and DEVELOPERS.md's architecture table naming exactly the files that exist.

Every check reads the source with :mod:`ast` (nothing is imported or run), so each one reports every
offender at once.
"""

from __future__ import annotations

import ast
import re
from pathlib import Path

import networkx as nx

REPO = Path(__file__).resolve().parents[1]
PACKAGE = REPO / "aggpub"

MAX_FUNCTION_LINES = 120
MAX_PIPELINE_LINES = 250

# Functions allowed over MAX_FUNCTION_LINES, as "path::name": none. Keep it empty; split a long function
# into named steps instead.
LONG_FUNCTION_ALLOWED: set = set()

# Paths the table may name before the file exists, as {new path: old path} during a rename in another branch.
# Empty: no rename is pending.
PENDING_RENAMES: dict = {}


# --------------------------------------------------------------------------- reading the package

def _modules(root: Path = PACKAGE) -> dict:
    """Dotted module name -> (path, is_package) for every .py file under ``root``."""
    out = {}
    for path in sorted(root.rglob("*.py")):
        parts = list(path.relative_to(root.parent).with_suffix("").parts)
        is_pkg = parts[-1] == "__init__"
        if is_pkg:
            parts = parts[:-1]
        out[".".join(parts)] = (path, is_pkg)
    return out


def _tree(path: Path) -> ast.Module:
    return ast.parse(path.read_text(encoding="utf-8"), filename=str(path))


def _is_private(name: str) -> bool:
    return name.startswith("_") and not (name.startswith("__") and name.endswith("__"))


def _resolve(module: str, is_pkg: bool, node: ast.ImportFrom) -> str:
    """The absolute module a ``from ... import`` reads from."""
    if not node.level:
        return node.module or ""
    base = module.split(".") if is_pkg else module.split(".")[:-1]
    base = base[: len(base) - (node.level - 1)]
    return ".".join(base + ([node.module] if node.module else []))


def _import_time_imports(tree: ast.Module) -> list:
    """Import statements run when the module is imported: module level, class bodies, ``if``/``try``/``with``
    blocks; not function bodies, not ``if TYPE_CHECKING:`` blocks."""
    found = []

    def visit(stmts):
        for s in stmts:
            if isinstance(s, (ast.Import, ast.ImportFrom)):
                found.append(s)
            elif isinstance(s, ast.If):
                test = s.test
                if (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or (
                        isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING"):
                    visit(s.orelse)
                else:
                    visit(s.body)
                    visit(s.orelse)
            elif isinstance(s, ast.Try):
                visit(s.body)
                for handler in s.handlers:
                    visit(handler.body)
                visit(s.orelse)
                visit(s.finalbody)
            elif isinstance(s, (ast.With, ast.ClassDef)):
                visit(s.body)

    visit(tree.body)
    return found


def _imported_modules(module: str, is_pkg: bool, node, modules: dict) -> list:
    """The package modules an import statement executes: the named module, its parent packages, and the
    submodules named in a ``from package import submodule``."""
    if isinstance(node, ast.Import):
        targets = [a.name for a in node.names]
    else:
        source = _resolve(module, is_pkg, node)
        targets = [source] + [f"{source}.{a.name}" for a in node.names if f"{source}.{a.name}" in modules]
    out = []
    for target in targets:
        parts = target.split(".")
        out += [".".join(parts[:i]) for i in range(1, len(parts) + 1) if ".".join(parts[:i]) in modules]
    return out


def import_graph(root: Path = PACKAGE) -> nx.DiGraph:
    """Module -> module imported at import time. A module's own parent packages are left out: Python
    runs a package's ``__init__`` before its submodules, which then import siblings of a package that is
    still initialising (the usual layout, not a circle)."""
    modules = _modules(root)
    graph = nx.DiGraph()
    graph.add_nodes_from(modules)
    for module, (path, is_pkg) in modules.items():
        for node in _import_time_imports(_tree(path)):
            for target in _imported_modules(module, is_pkg, node, modules):
                if target != module and not module.startswith(target + "."):
                    graph.add_edge(module, target)
    return graph


# --------------------------------------------------------------------------- checks as functions (testable)

def long_functions(root: Path = PACKAGE, limit: int = MAX_FUNCTION_LINES) -> dict:
    """``"path::name"`` -> lines, for every function or method longer than ``limit`` lines (decorators,
    signature, docstring and body counted)."""
    out = {}
    for path in sorted(root.rglob("*.py")):
        for node in ast.walk(_tree(path)):
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
                start = min([node.lineno] + [d.lineno for d in node.decorator_list])
                lines = node.end_lineno - start + 1
                if lines > limit:
                    out[f"{path.relative_to(root.parent).as_posix()}::{node.name}"] = lines
    return out


def private_imports(root: Path = PACKAGE) -> list:
    """Every place a module reaches for another module's private name.

    Refused: ``from m import _name`` (a private function, class or constant of another module, wherever it
    lives); importing a private module (``_files``) from outside the package that holds it, as
    ``from pkg._mod import x``, ``from pkg import _mod`` or ``import pkg._mod``; and ``alias._name`` where
    ``alias`` is a module imported by name. Allowed: a package's private modules used inside that package
    (and its subpackages), e.g. ``from ._common import Grouping``; dunder names such as ``__version__``.
    """
    modules = _modules(root)
    top = root.name
    found = []
    for module, (path, is_pkg) in modules.items():
        package = module if is_pkg else module.rpartition(".")[0]
        where = f"{path.relative_to(root.parent).as_posix()}"

        def inside(owner: str) -> bool:  # may this module use the private modules of package ``owner``?
            return package == owner or package.startswith(owner + ".")

        def check_path(dotted: str, line: int):
            parts = dotted.split(".")
            for i, part in enumerate(parts):
                if _is_private(part) and not inside(".".join(parts[:i])):
                    found.append(f"{where}:{line}: private module {dotted}")
                    return

        tree = _tree(path)
        module_aliases = set()
        for node in ast.walk(tree):
            if isinstance(node, ast.ImportFrom):
                source = _resolve(module, is_pkg, node)
                if not (source == top or source.startswith(top + ".")):
                    continue  # third-party libraries are their own business
                check_path(source, node.lineno)
                for alias in node.names:
                    full = f"{source}.{alias.name}"
                    if full in modules:
                        module_aliases.add(alias.asname or alias.name)
                        check_path(full, node.lineno)
                    elif _is_private(alias.name):
                        found.append(f"{where}:{node.lineno}: private name {alias.name} from {source}")
            elif isinstance(node, ast.Import):
                for alias in node.names:
                    if alias.name == top or alias.name.startswith(top + "."):
                        check_path(alias.name, node.lineno)
                        if alias.asname:
                            module_aliases.add(alias.asname)
        for node in ast.walk(tree):
            if (isinstance(node, ast.Attribute) and isinstance(node.value, ast.Name)
                    and node.value.id in module_aliases and _is_private(node.attr)):
                found.append(f"{where}:{node.lineno}: private attribute {node.value.id}.{node.attr}")
    return found


def import_cycles(root: Path = PACKAGE) -> list:
    """Every circle of import-time imports between modules (as sorted lists of module names)."""
    graph = import_graph(root)
    return [sorted(c) for c in nx.strongly_connected_components(graph) if len(c) > 1]


def package_cycles(root: Path = PACKAGE) -> list:
    """Every circle of import-time imports between aggpub's parts (a subpackage or a top-level module,
    ``aggpub.gate.released`` counting as ``gate``): the one-way flow of DEVELOPERS.md's diagram, one level
    up from :func:`import_cycles`. The package's own ``__init__`` (the public API) is left out."""
    top = root.name
    def part(module):
        pieces = module.split(".")
        return pieces[1] if len(pieces) > 1 else None
    graph = nx.DiGraph()
    for a, b in import_graph(root).edges:
        pa_, pb = part(a), part(b)
        if pa_ and pb and pa_ != pb:
            graph.add_edge(f"{top}.{pa_}", f"{top}.{pb}")
    return [sorted(c) for c in nx.strongly_connected_components(graph) if len(c) > 1]


def engine_imports_of_ingest(root: Path = PACKAGE) -> list:
    """Imports of ``aggpub.ingest`` anywhere in ``aggpub/engines`` (function bodies included): the engines
    receive plain values from ingest and never call back into it."""
    modules = _modules(root)
    found = []
    for module, (path, is_pkg) in modules.items():
        if not module.startswith(f"{root.name}.engines"):
            continue
        for node in ast.walk(_tree(path)):
            if isinstance(node, (ast.Import, ast.ImportFrom)):
                for target in _imported_modules(module, is_pkg, node, modules):
                    if target == f"{root.name}.ingest" or target.startswith(f"{root.name}.ingest."):
                        found.append(f"{path.name}:{node.lineno}: {target}")
    return found


def pipeline_lines(root: Path = PACKAGE) -> int:
    """Lines of ``pipeline.py``."""
    return len((root / "pipeline.py").read_text(encoding="utf-8").splitlines())


def architecture_table(developers: Path = REPO / "DEVELOPERS.md") -> dict:
    """The first table under ``## Architecture``: first-cell path -> the row's text."""
    text = developers.read_text(encoding="utf-8")
    section = text.split("\n## Architecture", 1)[1].split("\n## ", 1)[0]
    rows = {}
    for line in section.splitlines():
        if not line.startswith("| `"):
            continue
        first, rest = line[1:].split("|", 1)
        for path in re.findall(r"`([^`]+)`", first):
            rows[path] = rest
    return rows


def table_mismatches(root: Path = PACKAGE, developers: Path = REPO / "DEVELOPERS.md",
                     pending_renames: dict = PENDING_RENAMES) -> list:
    """What the architecture table and the folders disagree on.

    Each top-level module (``aggpub/x.py``) and package folder (``aggpub/x/``) has a row; each module of a
    package is named (``name.py``) in its package's row; every path the table names exists.
    """
    rows = architecture_table(developers)
    repo = root.parent
    problems = []
    pending_new = {repo / new for new in pending_renames}
    pending_old = {repo / old for new, old in pending_renames.items() if not (repo / new).exists()}
    # every file and folder is in the table
    for path in sorted(root.iterdir()):
        rel = path.relative_to(repo).as_posix()
        if path.suffix == ".py":
            if rel not in rows:
                problems.append(f"{rel}: no row in the architecture table")
        elif path.is_dir() and (path / "__init__.py").exists():
            row = rows.get(rel + "/")
            if row is None:
                problems.append(f"{rel}/: no row in the architecture table")
                continue
            named = set(re.findall(r"`([\w/]+\.py)`", row))
            for sub in sorted(path.rglob("*.py")):
                if sub.name == "__init__.py" and sub.parent == path:
                    continue
                inner = sub.relative_to(path).as_posix()
                if inner not in named and sub not in pending_old:
                    problems.append(f"{sub.relative_to(repo).as_posix()}: not named in the row of {rel}/")
            for inner in sorted(named):
                target = path / inner
                if not target.exists() and target not in pending_new:
                    problems.append(f"{rel}/{inner}: named in the table, no such file")
    # every path in the first column exists
    for first in rows:
        target = repo / first.rstrip("/")
        if not target.exists():
            problems.append(f"{first}: in the table, no such path")
    return problems


# --------------------------------------------------------------------------- the tests

def test_no_function_over_120_lines():
    long = long_functions()
    assert set(long) - LONG_FUNCTION_ALLOWED == set(), {k: v for k, v in long.items()
                                                       if k not in LONG_FUNCTION_ALLOWED}


def test_allowed_long_functions_still_exist():
    """The allow-list names real functions (a typo there would allow nothing and hide nothing)."""
    for entry in LONG_FUNCTION_ALLOWED:
        path, name = entry.split("::")
        names = {n.name for n in ast.walk(_tree(REPO / path)) if isinstance(n, (ast.FunctionDef,
                                                                                 ast.AsyncFunctionDef))}
        assert name in names, f"{entry} no longer exists: take it off LONG_FUNCTION_ALLOWED"


def test_no_module_imports_another_modules_private_name():
    assert private_imports() == []


def test_no_import_circle():
    assert import_cycles() == []


def test_no_import_circle_between_parts():
    assert package_cycles() == []


def test_engines_never_import_ingest():
    assert engine_imports_of_ingest() == []


def test_pipeline_is_thin():
    lines = pipeline_lines()
    assert lines < MAX_PIPELINE_LINES, f"pipeline.py has {lines} lines"


def test_architecture_table_matches_the_folders():
    assert table_mismatches() == []


# --------------------------------------------------------------------------- each check can fail

def _plant(tmp_path: Path, files: dict) -> Path:
    """A small package ``aggpub`` under ``tmp_path`` with the given files (relative path -> source)."""
    root = tmp_path / "aggpub"
    for rel, source in files.items():
        target = root / rel
        target.parent.mkdir(parents=True, exist_ok=True)
        target.write_text(source, encoding="utf-8")
    return root


def test_checks_catch_planted_violations(tmp_path):
    body = "\n".join(f"    x{i} = {i}" for i in range(MAX_FUNCTION_LINES))
    root = _plant(tmp_path, {
        "__init__.py": "",
        "long.py": f"def short():\n    pass\n\n\ndef too_long():\n{body}\n",
        "a.py": "from .b import thing\n",
        "b.py": "from . import a\nthing = 1\n",
        "lazy.py": "def f():\n    from . import lazy2\n",   # inside a function: not an import-time circle
        "lazy2.py": "from . import lazy\n",
        "pkg/__init__.py": "from ._common import helper\n",
        "pkg/_common.py": "def helper():\n    pass\n\n\ndef _secret():\n    pass\n",
        "pkg/user.py": "from ._common import helper\n",
        "outside.py": "from .pkg._common import helper\nfrom .pkg import _common\nfrom .long import _hidden\n"
                      "from . import long\nlong._hidden()\nimport aggpub.pkg._common\n",
        "engines/__init__.py": "def load():\n    from ..ingest import read\n",
        "ingest/__init__.py": "",
        # a circle between parts only: up.x -> down.y and down.z -> up.w, no circle between modules
        "up/__init__.py": "", "up/x.py": "from ..down import y\n", "up/w.py": "",
        "down/__init__.py": "", "down/y.py": "", "down/z.py": "from ..up import w\n",
    })
    assert long_functions(root) == {"aggpub/long.py::too_long": MAX_FUNCTION_LINES + 1}
    assert import_cycles(root) == [["aggpub.a", "aggpub.b"]]
    assert sorted(package_cycles(root)) == [["aggpub.a", "aggpub.b"], ["aggpub.down", "aggpub.up"]]
    assert engine_imports_of_ingest(root) == ["__init__.py:2: aggpub.ingest"]
    found = private_imports(root)
    assert [f.split(": ", 1)[1] for f in found] == [
        "private module aggpub.pkg._common", "private module aggpub.pkg._common",
        "private name _hidden from aggpub.long", "private module aggpub.pkg._common",
        "private attribute long._hidden"], found
    assert not any("pkg/" in f for f in found)  # the package's own use of its private module is fine


def test_table_check_catches_planted_mismatches(tmp_path):
    root = _plant(tmp_path, {"__init__.py": "", "kept.py": "", "unlisted.py": "", "pkg/__init__.py": "",
                             "pkg/one.py": "", "pkg/two.py": "", "pkg/old.py": ""})
    dev = tmp_path / "DEVELOPERS.md"
    dev.write_text("# x\n\n## Architecture\n\n| folder / module | what |\n|---|---|\n"
                   "| `aggpub/__init__.py` | api |\n| `aggpub/kept.py` | kept |\n| `aggpub/gone.py` | stale |\n"
                   "| `aggpub/pkg/` | `one.py`, `three.py`, `new.py` |\n\n## Next\n", encoding="utf-8")
    problems = table_mismatches(root, dev, pending_renames={"aggpub/pkg/new.py": "aggpub/pkg/old.py"})
    assert sorted(problems) == ["aggpub/gone.py: in the table, no such path",
                                "aggpub/pkg/three.py: named in the table, no such file",
                                "aggpub/pkg/two.py: not named in the row of aggpub/pkg/",
                                "aggpub/unlisted.py: no row in the architecture table"], problems
    # without the pending rename, the old name must be listed and the new one must exist
    problems = table_mismatches(root, dev, pending_renames={})
    assert "aggpub/pkg/old.py: not named in the row of aggpub/pkg/" in problems
    assert "aggpub/pkg/new.py: named in the table, no such file" in problems


def test_pipeline_check_catches_a_long_pipeline(tmp_path):
    root = _plant(tmp_path, {"pipeline.py": "x = 1\n" * MAX_PIPELINE_LINES})
    assert pipeline_lines(root) == MAX_PIPELINE_LINES
    root = _plant(tmp_path / "short", {"pipeline.py": "x = 1\n" * (MAX_PIPELINE_LINES - 1)})
    assert pipeline_lines(root) == MAX_PIPELINE_LINES - 1


def test_the_modules_imported_ahead_exist():
    """``aggpub.warm.AFTER_READING`` names importable modules (a renamed module would silently lose the speed)."""
    import importlib

    from aggpub.warm import AFTER_READING

    for name in AFTER_READING:
        importlib.import_module(name)


def test_public_names_load_on_first_use():
    """Every name in ``__all__`` of the packages that load lazily resolves (a typo in a lazy table would only
    show when used); ``import aggpub`` alone loads neither the pipeline nor scipy nor DuckDB (checked in a
    fresh interpreter), and the audit's helper imports stay off the engines and the report."""
    import subprocess
    import sys

    import aggpub
    import aggpub.audit
    import aggpub.bundle

    for package in (aggpub, aggpub.audit, aggpub.bundle):
        for name in package.__all__:
            assert getattr(package, name) is not None, (package.__name__, name)
        assert set(package.__all__) <= set(dir(package))
    code = ("import sys, aggpub; "
            "bare = sorted(m for m in ('aggpub.pipeline', 'scipy', 'duckdb') if m in sys.modules); "
            "from aggpub.audit.sampled import _import_side; _import_side(); "
            "side = sorted(m for m in ('aggpub.pipeline', 'aggpub.engines', 'aggpub.audit.report', 'duckdb') "
            "if m in sys.modules); print(bare, side)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120, cwd=REPO)
    assert out.returncode == 0, out.stderr[-2000:]
    assert out.stdout.strip() == "[] []", out.stdout
