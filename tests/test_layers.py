"""Import layers: dueroute.planner < demo_data < policies < service (< the package root, docker/).

Read from the source with Python's ``ast`` module (every ``import`` statement, also those inside
functions and ``TYPE_CHECKING`` blocks, which run-time checks would miss):

* every import of project code goes through the ``dueroute`` namespace (no bare ``planner``);
* no module imports a higher layer;
* inside ``dueroute.service`` the HTTP server imports neither the command line nor the load
  tester;
* the module import graph has no cycle (Tarjan's strongly connected components, 1972).
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]

#: source folder -> (module prefix, layer rank)
FOLDERS = {
    "planner": ("dueroute.planner", 0),
    "demo_data": ("dueroute.demo_data", 1),
    "policies": ("dueroute.policies", 2),
    "service": ("dueroute.service", 3),
    "dueroute": ("dueroute", 4),
    "docker": ("docker", 5),
}
BARE_NAMES = {"planner", "demo_data", "policies", "service"}


def _module_name(path: Path) -> tuple[str, int]:
    rel = path.relative_to(ROOT)
    prefix, rank = FOLDERS[rel.parts[0]]
    parts = list(rel.with_suffix("").parts[1:])
    if parts and parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join([prefix, *parts]), rank


def _sources() -> dict[str, tuple[Path, int]]:
    out = {}
    for folder in FOLDERS:
        for path in sorted((ROOT / folder).rglob("*.py")):
            name, rank = _module_name(path)
            out[name] = (path, rank)
    return out


SOURCES = _sources()


def _rank(module: str) -> int | None:
    """Layer of an imported module; ``None`` for code outside the project (numpy, ...)."""
    for prefix, rank in FOLDERS.values():
        if prefix != "dueroute" and (module == prefix or module.startswith(prefix + ".")):
            return rank
    if module == "dueroute" or module.startswith("dueroute."):
        return FOLDERS["dueroute"][1]  # the package root (dueroute/__init__.py, __main__.py)
    return None


def _imports(name: str, path: Path) -> list[tuple[int, str]]:
    """(line, imported module) for every import in the file, relative ones resolved."""
    tree = ast.parse(path.read_text(), filename=str(path))
    is_package = path.name == "__init__.py"
    package = name if is_package else name.rpartition(".")[0]
    found: list[tuple[int, str]] = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            found += [(node.lineno, alias.name) for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - (node.level - 1)]
                module = ".".join(base + ([node.module] if node.module else []))
            else:
                module = node.module or ""
            found.append((node.lineno, module))
            for alias in node.names:  # ``from pkg import module`` imports the module
                sub = f"{module}.{alias.name}"
                if sub in SOURCES:
                    found.append((node.lineno, sub))
    return found


def _project_edges() -> dict[str, set[str]]:
    edges: dict[str, set[str]] = {name: set() for name in SOURCES}
    for name, (path, _) in SOURCES.items():
        for _, module in _imports(name, path):
            # the deepest project module the import names (``a.b.func`` -> ``a.b``)
            target = module
            while target and target not in SOURCES:
                target = target.rpartition(".")[0]
            if target and target != name:
                edges[name].add(target)
    return edges


def test_the_sources_were_found() -> None:
    assert "dueroute.planner.session" in SOURCES
    assert "dueroute.service.server.app" in SOURCES
    assert "dueroute.service.cli.main" in SOURCES


def test_project_code_is_imported_through_the_dueroute_namespace() -> None:
    bad = [
        f"{path.relative_to(ROOT)}:{line} imports {module}"
        for name, (path, _) in SOURCES.items()
        for line, module in _imports(name, path)
        if module.split(".")[0] in BARE_NAMES
    ]
    assert not bad, "\n".join(bad)


def test_no_module_imports_a_higher_layer() -> None:
    bad = []
    for name, (path, rank) in SOURCES.items():
        for line, module in _imports(name, path):
            target = _rank(module)
            if target is not None and target > rank:
                bad.append(f"{path.relative_to(ROOT)}:{line} ({name}) imports {module}")
    assert not bad, "\n".join(bad)


@pytest.mark.parametrize("room", ["dueroute.service.cli", "dueroute.service.loadtest"])
def test_the_http_server_imports_neither_the_cli_nor_the_load_tester(room: str) -> None:
    bad = [
        f"{path.relative_to(ROOT)}:{line} imports {module}"
        for name, (path, _) in SOURCES.items()
        if name.startswith("dueroute.service.server")
        for line, module in _imports(name, path)
        if module == room or module.startswith(room + ".")
    ]
    assert not bad, "\n".join(bad)


def _cycles(edges: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected components with more than one module (Tarjan 1972), iteratively."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    on_stack: set[str] = set()
    stack: list[str] = []
    out: list[list[str]] = []
    counter = 0
    for root in sorted(edges):
        if root in index:
            continue
        work = [(root, iter(sorted(edges[root])))]
        index[root] = low[root] = counter
        counter += 1
        stack.append(root)
        on_stack.add(root)
        while work:
            node, it = work[-1]
            advanced = False
            for nxt in it:
                if nxt not in index:
                    index[nxt] = low[nxt] = counter
                    counter += 1
                    stack.append(nxt)
                    on_stack.add(nxt)
                    work.append((nxt, iter(sorted(edges[nxt]))))
                    advanced = True
                    break
                if nxt in on_stack:
                    low[node] = min(low[node], index[nxt])
            if advanced:
                continue
            work.pop()
            if work:
                low[work[-1][0]] = min(low[work[-1][0]], low[node])
            if low[node] == index[node]:
                comp = []
                while True:
                    w = stack.pop()
                    on_stack.discard(w)
                    comp.append(w)
                    if w == node:
                        break
                if len(comp) > 1:
                    out.append(sorted(comp))
    return out


def test_tarjan_finds_a_planted_cycle() -> None:
    """The cycle finder itself, on a hand-made graph (a -> b -> c -> a, d alone)."""
    assert _cycles({"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}) == [["a", "b", "c"]]
    assert _cycles({"a": {"b"}, "b": set()}) == []


def test_no_import_cycles() -> None:
    edges = _project_edges()
    # a package importing its own submodules (``__init__`` re-exports) is not a cycle of
    # layers; drop edges from a package to its children so only real cycles remain
    for name in edges:
        edges[name] = {t for t in edges[name] if not t.startswith(name + ".")}
    cycles = _cycles(edges)
    assert not cycles, "import cycles: " + "; ".join(" <-> ".join(c) for c in cycles)
