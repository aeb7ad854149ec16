"""The package stays readable: no module over 800 lines and no function over 120 lines
(docstring included)."""

import ast
from pathlib import Path

PACKAGE = Path(__file__).resolve().parents[1] / "probeseq"
MAX_FUNCTION_LINES = 120
MAX_MODULE_LINES = 800


def test_no_function_over_the_limit():
    long = []
    for p in sorted(PACKAGE.rglob("*.py")):
        for node in ast.walk(ast.parse(p.read_text(encoding="utf-8"))):
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
                n = node.end_lineno - node.lineno + 1
                if n > MAX_FUNCTION_LINES:
                    long.append(f"{p.relative_to(PACKAGE)}:{node.lineno} {node.name} ({n} lines)")
    assert not long, "split these into named steps: " + "; ".join(long)


def test_no_module_over_the_limit():
    long = [f"{p.relative_to(PACKAGE)} ({n} lines)" for p in sorted(PACKAGE.rglob("*.py"))
            if (n := len(p.read_text(encoding="utf-8").splitlines())) > MAX_MODULE_LINES]
    assert not long, "split these modules: " + "; ".join(long)


def test_the_limits_see_a_long_function_and_a_long_module(tmp_path):
    # the checks above would pass vacuously if the parser saw nothing: plant one of each
    body = "\n".join(f"    x{i} = {i}" for i in range(MAX_FUNCTION_LINES + 1))
    tree = ast.parse(f"def f():\n{body}\n")
    fn = tree.body[0]
    assert fn.end_lineno - fn.lineno + 1 > MAX_FUNCTION_LINES
    assert len(list(PACKAGE.rglob("*.py"))) > 30
