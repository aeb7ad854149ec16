"""The package stays readable: no function over 120 lines (docstring included)."""

import ast
from pathlib import Path

PACKAGE = Path(__file__).resolve().parents[1] / "probeseq"
MAX_FUNCTION_LINES = 120


def test_no_function_over_the_limit():
    long = []
    for p in sorted(PACKAGE.rglob("*.py")):
        for node in ast.walk(ast.parse(p.read_text(encoding="utf-8"))):
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
                n = node.end_lineno - node.lineno + 1
                if n > MAX_FUNCTION_LINES:
                    long.append(f"{p.name}:{node.lineno} {node.name} ({n} lines)")
    assert not long, "split these into named steps: " + "; ".join(long)
