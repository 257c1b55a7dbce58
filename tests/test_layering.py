"""Data flows one way: a module imports only from modules upstream of it.

The order below is the contributor guide's layout (DEVELOPERS.md).  A module
missing from the list fails the test, so new modules must be placed in it.
"""

from __future__ import annotations

import ast
from pathlib import Path

PACKAGE = Path(__file__).resolve().parent.parent / "conduct"

ORDER = [
    "errors", "heap", "progress", "executor", "schema", "study_data", "study", "tableio",
    "derive_ops", "firms", "coverage", "assemble", "panel", "parquet_dataset", "absorb", "iv",
    "crossprod", "weakiv", "stockyogo", "diagnostics", "design", "demand", "identify", "supply",
    "partitioned_result", "partitioned", "menu_stats",
    "menu", "thetaset", "regimes", "breaks", "bootstrap", "derived", "pipeline", "power_sim",
    "power_result", "power", "summary", "alerts", "figures", "tables", "report", "runs", "compare",
    "simulate", "layouts", "presets", "cli", "__init__",
]


def _imports(path: Path) -> set[str]:
    tree = ast.parse(path.read_text())
    found: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.module and node.module.startswith("conduct"):
            parts = node.module.split(".")
            if len(parts) > 1:
                found.add(parts[1])
            else:
                found.update(a.name for a in node.names)
        elif isinstance(node, ast.Import):
            for a in node.names:
                if a.name.startswith("conduct."):
                    found.add(a.name.split(".")[1])
    return found


def test_every_module_is_placed():
    modules = {p.stem for p in PACKAGE.glob("*.py")}
    missing = modules - set(ORDER)
    assert not missing, f"add {sorted(missing)} to ORDER in tests/test_layering.py"


def test_imports_flow_one_way():
    rank = {name: i for i, name in enumerate(ORDER)}
    bad = []
    for path in PACKAGE.glob("*.py"):
        here = rank[path.stem]
        for dep in _imports(path):
            if dep in rank and rank[dep] >= here and path.stem != "__init__":
                bad.append(f"{path.stem} imports {dep}")
    assert not bad, "; ".join(sorted(bad))
