"""Writing outputs so that nothing of the user's is ever lost.

Rules (DEVELOPERS.md, "Outputs and the user's data"):

* **Inputs are never outputs.** An output folder that is, or contains, any input of the command
  (ion file, run folder, range/lattice/run description, analysis folders read by the command) is
  refused before any work starts; an output folder *inside* an input folder (``RUN/analysis``)
  is allowed, since it touches none of the input's files. A file output that is an input, or an
  existing file inside an input folder, is refused.
* **Only probeseq's own files are replaced.** Every output folder holds a manifest
  (:data:`MANIFEST_NAME`) listing the files probeseq wrote into it. An existing, non-empty
  output folder is replaced only with ``force=True`` and only when every file in it is listed in
  its manifest (or in the manifest of a probeseq output folder nested in it); otherwise the
  command stops with an error naming the first foreign file. A single output file is replaced
  only with ``force=True`` and only when it carries probeseq's mark (:data:`MARK`).
* **Complete or not at all.** Outputs are written into a hidden staging folder (or part file)
  beside the target, and moved into place only when complete: on Linux by one atomic exchange of
  the two folders (``renameat2(RENAME_EXCHANGE)``), so there is no moment without a complete
  output folder; elsewhere by two renames that the next writer of the same folder completes or
  undoes (:func:`recover_outdir`). Old results are removed only after the new ones are in place,
  and only the files their manifest lists.
* **One writer at a time.** A lock file beside the output folder (``flock``, released by the
  kernel even when the process is killed) is held from the first check to the swap: a second
  command writing the same folder stops at once with a clear message. Whoever holds the lock
  removes the staging folders that interrupted runs left behind.

Staging folders are hidden (their names start with a dot and carry :data:`STAGING_TAG`), and
:func:`is_staging_name` tells readers (``compare``) to skip them.
"""

from __future__ import annotations

import ctypes
import errno
import json
import os
import shutil
import sys
import uuid
from contextlib import contextmanager
from pathlib import Path

from ..exceptions import InputError
from ..utils.marks import MARK, MARK_BYTES, to_jsonable

__all__ = ['MANIFEST_NAME', 'staged_outdir', 'staged_file', 'check_outdir', 'check_outfile', 'recover_outdir', 'is_staging_name', 'is_probeseq_file', 'read_manifest', 'write_json']

MANIFEST_NAME = "probeseq-manifest.json"


STAGING_TAG = ".probeseq-"


_STAGING_KINDS = ("staging", "previous", "lock", "part", "ahead")


# ---------------------------------------------------------------------- names and marks
def is_staging_name(name: str) -> bool:
    """True for the hidden staging, swap, lock and part names probeseq uses beside its outputs."""
    return name.startswith(".") and any(f"{STAGING_TAG}{k}" in name for k in _STAGING_KINDS)


def _side(target: Path, kind: str, tag: str = "") -> Path:
    return target.parent / f".{target.name}{STAGING_TAG}{kind}{'-' + tag if tag else ''}"


def _leftovers(target: Path, kind: str) -> list:
    prefix = f".{target.name}{STAGING_TAG}{kind}-"
    try:
        return sorted(p for p in target.parent.iterdir() if p.name.startswith(prefix))
    except OSError:
        return []


def is_probeseq_file(path) -> bool:
    """True when ``path`` is a file carrying probeseq's mark (see :data:`MARK`).

    HDF5 files carry it as the root attribute ``written_by``; text files (TOML, JSON, CSV, SVG)
    and figures (PNG text chunk, PDF info) carry the text in their first or last 64 KiB.
    """
    p = Path(path)
    if not p.is_file() or p.is_symlink():
        return False
    if p.suffix.lower() in (".h5", ".hdf5"):
        try:
            import h5py

            with h5py.File(p, "r") as f:
                v = f.attrs.get("written_by", b"")
            v = v.decode("utf-8", "replace") if isinstance(v, bytes) else str(v)
            return v.startswith("written by probeseq")
        except Exception:  # any unreadable file is simply not recognised as ours
            return False
    try:
        size = p.stat().st_size
        with open(p, "rb") as fh:
            head = fh.read(65536)
            fh.seek(max(0, size - 65536))
            tail = fh.read(65536)
    except OSError:
        return False
    return MARK_BYTES in head or MARK_BYTES in tail


# ---------------------------------------------------------------------- inputs
def _resolved(p) -> Path:
    try:
        return Path(p).expanduser().resolve()
    except (OSError, RuntimeError):
        return Path(os.path.abspath(Path(p)))


def _same_file(a: Path, b: Path) -> bool:
    try:
        return os.path.samefile(a, b)
    except OSError:
        return False


def _check_against_inputs(target: Path, inputs, *, is_folder: bool, what: str):
    """Refuse an output that is an input, contains one, or (a file) is one of an input folder's files.

    A file inside an input folder may be written only where it is not one of the folder's own
    outputs (its manifest) and, when it exists, carries probeseq's mark (``OUTDIR/exports/...``).
    """
    rt = _resolved(target)
    for inp in inputs or ():
        if inp is None:
            continue
        ri = _resolved(inp)
        if rt == ri or (target.exists() and Path(inp).exists() and _same_file(target, inp)):
            raise InputError(f"{what} {target} is an input of this command ({inp}); choose another "
                             "output path (inputs are never changed)")
        if is_folder and rt in ri.parents:
            raise InputError(f"{what} {target} contains the input {inp}; choose a new folder "
                             "(an output folder is replaced as a whole, inputs are never changed)")
        if not is_folder and ri.is_dir() and ri in rt.parents and (target.exists() or target.is_symlink()):
            own = read_manifest(ri) or set()
            if rt.relative_to(ri).as_posix() in own or not is_probeseq_file(target):
                raise InputError(f"{what} {target} is a file of the input folder {inp}; choose another "
                                 "output path (inputs are never changed)")


# ---------------------------------------------------------------------- manifests
def read_manifest(folder) -> set | None:
    """The relative paths a probeseq output folder's manifest lists, or None without a valid one."""
    p = Path(folder) / MANIFEST_NAME
    try:
        if not p.is_file() or p.stat().st_size > 16 << 20:
            return None
        m = json.loads(p.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if not isinstance(m, dict) or not str(m.get("written_by", "")).startswith("written by probeseq"):
        return None
    files = m.get("files")
    if not isinstance(files, list) or not all(isinstance(f, str) for f in files):
        return None
    return set(files) | {MANIFEST_NAME}


def _write_manifest(folder: Path, command: str | None):
    files = []
    for root, dirs, names in os.walk(folder):
        dirs.sort()
        for n in sorted(names):
            rel = os.path.relpath(os.path.join(root, n), folder)
            if rel != MANIFEST_NAME:
                files.append(rel.replace(os.sep, "/"))
    body = {"written_by": MARK, "command": command, "files": files,
            "note": "files probeseq wrote here; 'probeseq ... --force' replaces this folder only while "
                    "it holds nothing else"}
    tmp = folder / f".{MANIFEST_NAME}.part"
    tmp.write_text(json.dumps(body, indent=1) + "\n", encoding="utf-8")
    os.replace(tmp, folder / MANIFEST_NAME)


def _owned_files(folder: Path):
    """Split the files under ``folder`` into probeseq's and foreign ones (relative paths).

    A file is probeseq's when the manifest of its folder or of a folder above it (up to
    ``folder``) lists it, or when it carries probeseq's mark (an export written into the folder).
    Symbolic links and special files are foreign.
    """
    manifests = {}
    owned, foreign = [], []
    for root, dirs, names in os.walk(folder):
        dirs.sort()
        here = Path(root)
        links = [d for d in dirs if os.path.islink(os.path.join(root, d))]
        for n in sorted(names) + sorted(links):
            f = here / n
            rel = f.relative_to(folder).as_posix()
            ok = False
            if not f.is_symlink():
                d = here
                while True:
                    if d not in manifests:
                        manifests[d] = read_manifest(d)
                    m = manifests[d]
                    if m is not None and f.relative_to(d).as_posix() in m:
                        ok = True
                        break
                    if d == folder:
                        break
                    d = d.parent
                ok = ok or is_probeseq_file(f)
            (owned if ok else foreign).append(rel)
    return owned, foreign


def _remove_owned(folder: Path) -> list:
    """Remove probeseq's files under ``folder``, then its empty folders; return what is left."""
    owned, foreign = _owned_files(folder)
    for rel in owned:
        try:
            os.unlink(folder / rel)
        except OSError:
            pass
    for root, _dirs, _names in os.walk(folder, topdown=False):
        try:
            os.rmdir(root)
        except OSError:
            pass
    return foreign


# ---------------------------------------------------------------------- folder checks
def check_outdir(outdir, force: bool = False, inputs=()) -> Path:
    """Check an output folder before any work starts; return it as a Path.

    Refused: a folder that is or contains an input; a file in its place; an existing non-empty
    folder without ``force``; with ``force``, a folder holding anything probeseq did not write.
    """
    p = Path(outdir)
    if str(outdir).strip() == "":
        raise InputError("--out is empty: give an output folder")
    _check_against_inputs(p, inputs, is_folder=True, what="--out")
    if p.is_symlink():
        raise InputError(f"--out {p}: is a symbolic link; give the real folder")
    if p.exists() and not p.is_dir():
        raise InputError(f"--out {p}: exists and is not a folder; choose a folder name")
    if is_staging_name(p.name):
        raise InputError(f"--out {p}: names one of probeseq's hidden staging folders; choose another name")
    if p.is_dir():
        try:
            empty = not any(p.iterdir())
        except OSError as e:
            raise InputError(f"--out {p}: cannot be read ({e.strerror})") from None
        if not empty:
            if not force:
                raise InputError(f"--out {p}: folder exists and is not empty; use --force to replace it "
                                 "(only probeseq's own outputs are replaced, once the new ones are complete)")
            foreign = _owned_files(p)[1]
            if foreign:
                raise InputError(f"--out {p}: holds '{foreign[0]}', which probeseq did not write; --force "
                                 "replaces only a previous probeseq output folder (choose a new folder)")
    _check_creatable(p, "--out")
    return p


def check_outfile(path, force: bool = False, inputs=(), what: str = "--out") -> Path:
    """Check a single output file before any work starts (see the module rules); return it as a Path."""
    p = Path(path)
    if str(path).strip() == "":
        raise InputError(f"{what} is empty: give a file name")
    _check_against_inputs(p, inputs, is_folder=False, what=what)
    if p.is_dir():
        raise InputError(f"{what} {p}: is a folder; give a file name")
    if p.exists() or p.is_symlink():
        if not force:
            raise InputError(f"{what} {p}: file exists; use --force to replace it")
        if p.is_symlink() or not is_probeseq_file(p):
            raise InputError(f"{what} {p}: exists and was not written by probeseq; --force replaces only "
                             "probeseq's own files (choose another name)")
    if p.parent.exists() and not p.parent.is_dir():
        raise InputError(f"{what} {p}: {p.parent} is not a folder")
    _check_creatable(p, what)
    return p


def _check_creatable(p: Path, what: str) -> None:
    """Refuse, before any work, an output whose missing folders could not be made when it is written.

    The folders above ``p`` that do not exist yet are made when the output is written; here the
    nearest one that exists must be a folder this process may write in.
    """
    anc = p.parent
    while not (anc.exists() or anc.is_symlink()) and anc != anc.parent:
        anc = anc.parent
    if anc.exists() and not anc.is_dir():
        raise InputError(f"{what} {p}: {anc} is a file, not a folder, so the output's folder cannot be made; "
                         "choose another place")
    if anc.is_dir() and not os.access(anc, os.W_OK | os.X_OK):
        raise InputError(f"{what} {p}: no permission to write in {anc}; choose another place")


# ---------------------------------------------------------------------- locking and recovery
class _Lock:
    """An exclusive, non-blocking ``flock`` on a lock file beside the target."""

    def __init__(self, target: Path):
        self.path = _side(target, "lock")
        self.fd = None

    def acquire(self, what: str):
        try:
            import fcntl
        except ImportError:  # pragma: no cover - not on POSIX: no lock, the rest still holds
            return self
        while True:
            try:
                fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
            except OSError as e:
                raise InputError(f"{what}: cannot write in {self.path.parent} ({e.strerror})") from None
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except OSError as e:
                os.close(fd)
                if e.errno in (errno.EWOULDBLOCK, errno.EAGAIN, errno.EACCES):
                    raise InputError(f"{what}: another probeseq command is writing it right now; wait "
                                     "for it to finish (or choose another output)") from None
                raise
            # the file may have been removed by the previous holder between open and lock
            try:
                same = os.path.samestat(os.fstat(fd), os.stat(self.path))
            except OSError:
                same = False
            if same:
                self.fd = fd
                os.write(fd, f"{os.getpid()}\n".encode())
                return self
            os.close(fd)

    def release(self):
        if self.fd is None:
            return
        try:
            os.unlink(self.path)
        except OSError:
            pass
        os.close(self.fd)
        self.fd = None


def recover_outdir(outdir) -> Path:
    """Complete or undo a swap that an interrupted run left, and remove its staging folders.

    Call only while holding the folder's lock. When the target is missing but a previous copy was
    moved aside, the complete new results (a staging folder with its manifest) take its place if
    there are any, else the previous results are moved back. Every other staging folder of this
    target is removed (they are probeseq's own, half-written outputs).
    """
    target = Path(outdir)
    previous = _leftovers(target, "previous")
    staging = _leftovers(target, "staging")
    if not target.exists() and previous:
        complete = [s for s in staging if read_manifest(s) is not None]
        src = complete[-1] if complete else previous[-1]
        os.replace(src, target)
        staging = [s for s in staging if s != src]
        previous = [p for p in previous if p != src]
    for s in staging:
        shutil.rmtree(s, ignore_errors=True)
    for p in previous:
        _remove_owned(p)
    for a in _leftovers(target, "ahead"):  # those of ended processes only: a running one writes there
        if not _process_alive(a.name.rsplit("-", 2)[-2]):
            shutil.rmtree(a, ignore_errors=True)
    return target


def _process_alive(pid: str) -> bool:
    """Whether the process with this id (text) still runs (False for a malformed id)."""
    try:
        n = int(pid)
    except ValueError:
        return False
    if n == os.getpid():
        return True
    try:
        os.kill(n, 0)
    except ProcessLookupError:
        return False
    except OSError:  # it exists but is not ours
        return True
    return True


def _exchange(a: Path, b: Path) -> bool:
    """Atomically exchange two paths (Linux ``renameat2``); False where that is not available."""
    if not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        fn = libc.renameat2
    except (OSError, AttributeError):
        return False
    fn.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
    at_fdcwd, rename_exchange = -100, 2
    if fn(at_fdcwd, os.fsencode(a), at_fdcwd, os.fsencode(b), rename_exchange) == 0:
        return True
    err = ctypes.get_errno()
    if err in (errno.EINVAL, errno.ENOSYS, errno.EOPNOTSUPP, errno.ENOTSUP):
        return False
    raise OSError(err, os.strerror(err), str(b))


def _swap_in(stage: Path, target: Path, tag: str):
    """Put the complete ``stage`` at ``target``; remove the previous results' own files."""
    if not target.exists():
        os.replace(stage, target)
        return
    old = _side(target, "previous", tag)
    if _exchange(stage, target):
        os.replace(stage, old)  # the old results, now at the staging path, are set aside
    else:  # two renames; recover_outdir completes or undoes them after an interruption
        os.replace(target, old)
        os.replace(stage, target)
    left = _remove_owned(old)
    if left:
        import warnings

        from ..exceptions import DataQualityWarning

        warnings.warn(f"{target}: the previous results held files probeseq did not write ({left[0]}); "
                      f"they were kept in {old}", DataQualityWarning, stacklevel=3)


@contextmanager
def staged_outdir(outdir, force: bool = False, inputs=(), command: str | None = None):
    """Context manager yielding a staging folder that replaces ``outdir`` once complete.

    Holds the folder's lock throughout; checks the target with :func:`check_outdir`; writes the
    manifest last; on any exception or interrupt the staging folder is removed and the previous
    results are left as they were.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> d = pathlib.Path(tempfile.mkdtemp()) / "out"
    >>> with staged_outdir(d) as tmp:
    ...     _ = (tmp / "a.txt").write_text("x")
    >>> (d / "a.txt").read_text()
    'x'
    >>> sorted(p.name for p in d.iterdir())
    ['a.txt', 'probeseq-manifest.json']
    """
    target = Path(outdir)
    check_outdir(target, force, inputs)  # before creating anything
    _make_parent(target)
    lock = _Lock(target).acquire(f"--out {target}")
    try:
        recover_outdir(target)
        check_outdir(target, force, inputs)  # again, under the lock
        tag = f"{os.getpid()}-{uuid.uuid4().hex[:8]}"
        stage = _side(target, "staging", tag)
        stage.mkdir()
        try:
            yield stage
            _write_manifest(stage, command)
            check_outdir(target, force, inputs)
            _swap_in(stage, target, tag)
        except BaseException:
            shutil.rmtree(stage, ignore_errors=True)
            raise
    finally:
        lock.release()


def _make_parent(target: Path) -> None:
    """Create the folder that will hold ``target`` (a one-line error when it cannot be made)."""
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise InputError(f"--out {target}: cannot create its folder ({e.strerror})") from None


def ahead_folder(outdir) -> Path:
    """A new hidden folder beside ``outdir`` for outputs written before the output stage (the
    tables of :class:`probeseq.pipeline.analysis.TablesAhead`), on the same file system, so the
    output stage moves its files in rather than copying them. Its name holds this process's id:
    one left by a killed run is removed by the next run into ``outdir`` (:func:`recover_outdir`
    removes those whose process has ended)."""
    target = Path(outdir)
    _make_parent(target)
    folder = _side(target, "ahead", f"{os.getpid()}-{uuid.uuid4().hex[:8]}")
    folder.mkdir()
    return folder


@contextmanager
def staged_file(path, force: bool = False, inputs=(), what: str = "--out"):
    """Context manager yielding a hidden part file that replaces ``path`` once complete.

    The caller writes the part file (it must carry :data:`MARK`); missing parent folders are made.
    """
    p = check_outfile(path, force, inputs, what)
    try:
        p.parent.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise InputError(f"{what} {p}: cannot create its folder ({e.strerror})") from None
    part = p.parent / f".{p.stem}{STAGING_TAG}part-{uuid.uuid4().hex[:8]}{p.suffix}"
    try:
        yield part
        check_outfile(p, force, inputs, what)
        os.replace(part, p)
    finally:
        if part.exists():
            part.unlink()


def write_json(path, obj, mark: bool = False):
    """Write ``obj`` as indented, key-sorted JSON (``mark``: add ``written_by``, see :data:`MARK`)."""
    if mark and isinstance(obj, dict):
        obj = {**obj, "written_by": MARK}
    Path(path).write_text(json.dumps(to_jsonable(obj), indent=2, sort_keys=True) + "\n", encoding="utf-8")
