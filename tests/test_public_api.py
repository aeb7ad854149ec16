"""The public API and the declared dependencies are what the package really offers and uses."""

import ast
import sys
import tomllib
from pathlib import Path

import probeseq

ROOT = Path(__file__).resolve().parents[1]
PACKAGE = ROOT / "probeseq"

# import name -> distribution name, where they differ
DISTRIBUTION = {"sklearn": "scikit-learn", "yaml": "pyyaml"}
# imports that a declared dependency brings: the CLI falls back to click's exceptions under typer
# releases that depend on click instead of carrying their own copy
BROUGHT_BY = {"click": "typer", "PIL": "pillow"}  # import name -> distribution name


def test_public_api_is_pinned():
    """A change of the top-level API is a decision: it must show up here (and in docs/CHANGELOG.md)."""
    assert sorted(probeseq.__all__) == sorted([
        "__version__", "ConvergenceWarning", "DataQualityWarning", "InputError", "IonList", "IonMeta",
        "Lattice", "ProbeseqError",
    ])
    for name in probeseq.__all__:
        assert hasattr(probeseq, name), name


def _third_party_imports() -> set:
    names = set()
    stdlib = set(sys.stdlib_module_names)
    for p in PACKAGE.rglob("*.py"):
        for node in ast.walk(ast.parse(p.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Import):
                mods = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
                mods = [node.module]
            else:
                continue
            for m in mods:
                top = m.split(".")[0]
                if top not in stdlib and top != "probeseq":
                    names.add(DISTRIBUTION.get(top, top))
    return names


def _declared(extra: str | None = None) -> set:
    """The runtime dependencies, or those of one optional extra."""
    meta = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
    out = set()
    reqs = meta["project"]["dependencies"] if extra is None else meta["project"]["optional-dependencies"][extra]
    for req in reqs:
        name = req.split(";")[0]
        for sep in "<>=!~[ ":
            name = name.split(sep)[0]
        out.add(name.strip().lower())
    return out


def test_runtime_dependencies_are_what_the_package_imports():
    declared = _declared()
    # the 'cluster' extra (dask) is imported only when a batch or a plan runs (probeseq.study.cluster)
    optional = _declared("cluster")
    used = {BROUGHT_BY.get(n, n).lower() for n in _third_party_imports()}
    assert used - declared - optional == set(), f"imported but not declared: {sorted(used - declared - optional)}"
    assert declared - used == set(), f"declared but never imported: {sorted(declared - used)}"
    assert optional - used == set(), f"declared in the cluster extra but never imported: {sorted(optional - used)}"
