"""Writing output folders so that nothing is lost.

Outputs are written into a hidden staging folder beside the target and moved into place only when
complete. An existing output folder is replaced only with ``force=True``, and then only after the
new results are complete; an interrupted run (error or Ctrl-C) removes its staging folder and
leaves the previous results as they were.
"""

from __future__ import annotations

import json
import os
import shutil
import uuid
from contextlib import contextmanager
from pathlib import Path

import numpy as np

from .exceptions import InputError

__all__ = ["staged_outdir", "check_outdir", "to_jsonable", "write_json"]


def check_outdir(outdir, force: bool = False) -> Path:
    """Refuse an existing, non-empty output folder unless ``force``; refuse a file in its place."""
    p = Path(outdir)
    if p.exists() and not p.is_dir():
        raise InputError(f"--out {p}: exists and is not a folder")
    if p.is_dir() and any(p.iterdir()) and not force:
        raise InputError(f"--out {p}: folder exists and is not empty; use --force to replace it "
                         "(the old results are kept until the new ones are complete)")
    return p


@contextmanager
def staged_outdir(outdir, force: bool = False):
    """Context manager yielding a staging folder that replaces ``outdir`` on success.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> d = pathlib.Path(tempfile.mkdtemp()) / "out"
    >>> with staged_outdir(d) as tmp:
    ...     _ = (tmp / "a.txt").write_text("x")
    >>> (d / "a.txt").read_text()
    'x'
    """
    target = check_outdir(outdir, force)
    target.parent.mkdir(parents=True, exist_ok=True)
    tag = uuid.uuid4().hex[:8]
    stage = target.parent / f".{target.name}.staging-{tag}"
    stage.mkdir()
    try:
        yield stage
    except BaseException:
        shutil.rmtree(stage, ignore_errors=True)
        raise
    old = None
    if target.exists():
        old = target.parent / f".{target.name}.previous-{tag}"
        os.replace(target, old)
    try:
        os.replace(stage, target)
    except BaseException:
        if old is not None:
            os.replace(old, target)
        shutil.rmtree(stage, ignore_errors=True)
        raise
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)


def to_jsonable(obj):
    """Convert numpy scalars/arrays, paths and tuples, recursively, to plain JSON types.

    Non-finite floats become ``None`` (JSON has no NaN).
    """
    if isinstance(obj, dict):
        return {str(k): to_jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [to_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return to_jsonable(obj.tolist())
    if isinstance(obj, (np.bool_, bool)):
        return bool(obj)
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (np.floating, float)):
        v = float(obj)
        return v if np.isfinite(v) else None
    if isinstance(obj, Path):
        return str(obj)
    return obj


def write_json(path, obj):
    """Write ``obj`` as indented, key-sorted JSON."""
    Path(path).write_text(json.dumps(to_jsonable(obj), indent=2, sort_keys=True) + "\n", encoding="utf-8")
