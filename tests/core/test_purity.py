"""The numerical core stays pure: numpy and the standard library only.

It must not import MQTT, metrics, YAML, sockets or logging setup, and it must
not read the clock; river is reached only through the lazy adapter.
"""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import shiftwatch.core

CORE = Path(shiftwatch.core.__file__).parent
ALLOWED_TOP = {"numpy", "shiftwatch", "__future__"}
STDLIB = set(sys.stdlib_module_names)
FORBIDDEN_STDLIB = {"socket", "logging", "time", "threading", "asyncio", "subprocess", "os", "io", "pathlib"}
FORBIDDEN_CALLS = {"now", "utcnow", "today", "time", "monotonic", "perf_counter", "open"}


def _imports(path: Path) -> list[tuple[str, int, bool]]:
    """(module, line, at_module_level) for every import in a file."""
    tree = ast.parse(path.read_text(), filename=str(path))
    out = []
    top_level = {id(n) for n in tree.body}
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            out += [(a.name, node.lineno, id(node) in top_level) for a in node.names]
        elif isinstance(node, ast.ImportFrom) and node.module:
            out.append((node.module, node.lineno, id(node) in top_level))
    return out


def test_core_imports_only_numpy_and_the_standard_library() -> None:
    files = sorted(CORE.glob("*.py"))
    assert len(files) >= 10
    for f in files:
        for mod, line, _ in _imports(f):
            top = mod.split(".")[0]
            where = f"{f.name}:{line} imports {mod}"
            if f.name == "river_adapter.py" and top == "river":
                continue
            assert top in ALLOWED_TOP or top in STDLIB, where
            assert top not in FORBIDDEN_STDLIB, where
            assert top not in {"paho", "prometheus_client", "yaml", "scipy"}, where


def test_river_is_imported_lazily_and_only_by_the_adapter() -> None:
    for f in sorted(CORE.glob("*.py")):
        for mod, line, module_level in _imports(f):
            if mod.split(".")[0] == "river":
                assert f.name == "river_adapter.py", f"{f.name}:{line}"
                assert not module_level, f"{f.name}:{line} imports river at module level"


def test_core_reads_no_clock_and_opens_no_file() -> None:
    for f in sorted(CORE.glob("*.py")):
        tree = ast.parse(f.read_text())
        for node in ast.walk(tree):
            if isinstance(node, ast.Call):
                fn = node.func
                name = fn.attr if isinstance(fn, ast.Attribute) else getattr(fn, "id", "")
                assert name not in FORBIDDEN_CALLS, f"{f.name}:{node.lineno} calls {name}()"


def test_importing_the_engine_does_not_import_river_paho_or_prometheus() -> None:
    code = ("import sys, shiftwatch.core.engine, shiftwatch.core.glr, shiftwatch.core.cusum, "
            "shiftwatch.core.river_adapter, shiftwatch.replay, shiftwatch.cli; "
            "print(sorted(m for m in ('river', 'paho', 'prometheus_client') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"
