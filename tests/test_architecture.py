"""The package layout keeps its promises (DEVELOPERS.md, "Layout"): modules stay short, imports
(lazy ones included) form no cycle, lower layers never import higher ones, and no module reaches
into another subpackage's private modules or another module's private names."""

from __future__ import annotations

import ast
from pathlib import Path

import stackdr

ROOT = Path(stackdr.__file__).resolve().parent
# Lowest first; a subpackage may import only subpackages to its left.
LAYERS = ("core", "search", "inference", "estimation", "io", "studies", "reporting", "cli")
MAX_LINES = 600


def _modules() -> dict[str, Path]:
    out = {}
    for path in ROOT.rglob("*.py"):
        parts = path.relative_to(ROOT.parent).with_suffix("").parts
        name = ".".join(parts[:-1] if parts[-1] == "__init__" else parts)
        out[name] = path
    return out


def _imports(name: str, path: Path) -> list[tuple[str, list[str]]]:
    """(imported module, imported names) of every import statement, at any depth."""
    package = name if path.name == "__init__.py" else name.rsplit(".", 1)[0]
    found = []
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                anchor = package.split(".")
                anchor = anchor[: len(anchor) - node.level + 1]
                base = ".".join([*anchor, base] if base else anchor)
            found.append((base, [a.name for a in node.names]))
        elif isinstance(node, ast.Import):
            found.extend((a.name, []) for a in node.names)
    return [(m, names) for m, names in found if m == "stackdr" or m.startswith("stackdr.")]


def _layer(module: str) -> str | None:
    parts = module.split(".")
    return parts[1] if len(parts) > 1 and parts[1] in LAYERS else None


def test_modules_are_short():
    long = {n: len(p.read_text().splitlines()) for n, p in _modules().items()}
    assert {n: c for n, c in long.items() if c > MAX_LINES} == {}


def test_no_import_cycles():
    modules = _modules()
    graph = {}
    for name, path in modules.items():
        targets = set()
        for module, names in _imports(name, path):
            # "from stackdr.core import _targets" names a submodule, not an attribute.
            subs = [f"{module}.{n}" for n in names if f"{module}.{n}" in modules]
            targets.update(subs or [module])
        graph[name] = {t for t in targets if t in modules and t != name}
    # A package's __init__ re-exports its own modules; the edge parent -> child is structural.
    state: dict[str, int] = {}
    cycle: list[str] = []

    def visit(node: str, trail: list[str]) -> bool:
        state[node] = 1
        for nxt in sorted(graph[node]):
            if nxt.startswith(node + "."):
                continue
            if state.get(nxt) == 1:
                cycle.extend([*trail, node, nxt])
                return True
            if state.get(nxt) is None and visit(nxt, [*trail, node]):
                return True
        state[node] = 2
        return False

    for start in sorted(graph):
        if state.get(start) is None and visit(start, []):
            break
    assert cycle == []


def test_layers_and_private_boundaries():
    problems = []
    for name, path in _modules().items():
        own = _layer(name)
        for module, names in _imports(name, path):
            other = _layer(module)
            if own and other and other != own:
                if LAYERS.index(other) > LAYERS.index(own):
                    problems.append(f"{name} imports higher layer {module}")
                if any(part.startswith("_") for part in module.split(".")[2:]):
                    problems.append(f"{name} imports private module {module}")
            crosses = other != own or module.split(".")[:2] != name.split(".")[:2]
            if crosses and any(n.startswith("_") and n != "__version__" for n in names):
                problems.append(f"{name} imports private names {names} from {module}")
    assert problems == []


def test_sources_pass_the_linter_and_the_formatter():
    # Common practice: CI fails on lint and format drift, so no later change carries another's
    # reformatting. ruff comes with the dev extra; skipped where it is not installed.
    import shutil
    import subprocess
    import sys

    ruff = shutil.which("ruff", path=str(Path(sys.executable).parent)) or shutil.which("ruff")
    if ruff is None:
        import pytest

        pytest.skip("ruff is not installed")
    folders = [str(ROOT.parent / f) for f in ("stackdr", "tests", "benchmarks", "examples")]
    for command in (["check", "--quiet"], ["format", "--check", "--quiet"]):
        done = subprocess.run([ruff, *command, *folders], capture_output=True, text=True)
        assert done.returncode == 0, f"ruff {command[0]}:\n{done.stdout}{done.stderr}"
