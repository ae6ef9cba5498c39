"""The layering the design rests on (DEVELOPERS.md, "Layering"), checked on the source: the pure
core imports nothing that does I/O, keeps time or talks to a port, and nothing below the front
ends imports them; no import cycles among the package's modules."""

from __future__ import annotations

import ast
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
CORE_FORBIDDEN = ("protocol", "serial", "rich", "threading", "time", "signal", "socket",
                  "subprocess", "os", "autotune.job", "autotune.ui", "autotune.commands",
                  "autotune.config", "autotune.recorder", "autotune.gainsfile", "mock_device")


def imports_of(path: Path) -> set[str]:
    """Every module a file imports, at any depth of the file (function-local ones too)."""
    out: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            out.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            out.add(node.module)
    return out


def module_name(path: Path) -> str:
    rel = path.relative_to(ROOT).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def test_the_pure_core_imports_no_io() -> None:
    bad = []
    for path in sorted((ROOT / "autotune" / "core").glob("*.py")):
        for mod in imports_of(path):
            if any(mod == f or mod.startswith(f + ".") for f in CORE_FORBIDDEN):
                bad.append(f"{path.name}: {mod}")
    assert not bad, bad


def test_the_job_and_the_protocol_never_import_the_front_ends() -> None:
    bad = []
    for folder in ("autotune/job", "protocol", "mock_device"):
        for path in sorted((ROOT / folder).rglob("*.py")):
            for mod in imports_of(path):
                if mod.startswith(("autotune.ui", "autotune.commands")):
                    bad.append(f"{path.relative_to(ROOT)}: {mod}")
    assert not bad, bad


def test_the_mock_device_shares_only_the_protocol() -> None:
    bad = [f"{p.name}: {m}" for p in sorted((ROOT / "mock_device").glob("*.py"))
           for m in imports_of(p) if m.startswith("autotune")]
    assert not bad, bad


def test_no_import_cycles() -> None:
    """Module-level imports between the package's own modules form no cycle."""
    graph: dict[str, set[str]] = {}
    for folder in ("autotune", "protocol", "mock_device"):
        for path in (ROOT / folder).rglob("*.py"):
            name = module_name(path)
            deps: set[str] = set()
            for node in ast.parse(path.read_text(encoding="utf-8")).body:
                if isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
                    deps.add(node.module)
                elif isinstance(node, ast.Import):
                    deps.update(a.name for a in node.names)
            graph[name] = {d for d in deps if d.split(".")[0] in ("autotune", "protocol",
                                                                  "mock_device")}
    seen: dict[str, int] = {}
    stack: list[str] = []

    def visit(n: str) -> None:
        seen[n] = 1
        stack.append(n)
        for d in sorted(graph.get(n, ())):
            d = d if d in graph else d.rsplit(".", 1)[0]
            if d not in graph or d == n or n.startswith(d + ".") or d.startswith(n + "."):
                continue  # a package and its own modules
            if seen.get(d) == 1:
                raise AssertionError("import cycle: " + " -> ".join(stack[stack.index(d):] + [d]))
            if d not in seen:
                visit(d)
        stack.pop()
        seen[n] = 2

    for n in sorted(graph):
        if n not in seen:
            visit(n)
