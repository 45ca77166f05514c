"""Writing outputs: atomic files, all-or-nothing groups, no silent overwrite, strict JSON.

Every file the package writes goes through :func:`atomic_path` (directly or through the
``write_*_atomic`` helpers), which gives four guarantees:

* **atomic files**: the bytes go to a temporary name in the target folder and are renamed
  onto the target only when complete, so nothing half-written ever carries a final name;
* **all or nothing** inside :func:`output_batch`: the files of one group are written into a
  hidden staging folder beside their targets (``.probeplan-partial-<pid>-<token>``) and moved
  into place together when the group ends without error; a failed or interrupted group leaves
  only that hidden folder (removed at once, or by the next run when the process was killed);
* **no silent overwrite** inside :func:`output_policy` (the command line opens one per run):
  a target that already exists and was not written by this same run is refused with an
  :class:`~probeplan.errors.InputError` unless the policy allows overwriting it;
* **write failures are input errors**: a read-only or missing folder, a full disk or a target
  that is a folder becomes one ``InputError`` line naming the path and the fix.

JSON is written by one writer (:func:`json_text`): strict JSON, where NaN and infinities
become ``null`` with a note saying which values they were.  :func:`locked` serialises
read-modify-write updates of a shared file (e.g. a manifest) between concurrent runs.
"""

from __future__ import annotations

import contextlib
import contextvars
import errno
import json
import math
import os
import secrets
import shutil
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from probeplan.errors import InputError, input_error

__all__ = [
    "file_sha256",
    "atomic_path",
    "write_bytes_atomic",
    "write_text_atomic",
    "write_json_atomic",
    "write_csv_atomic",
    "refuse_input_paths",
    "table_to_csv_text",
    "OutputBatch",
    "OutputPolicy",
    "output_batch",
    "output_policy",
    "check_outputs",
    "current_policy",
    "readable_path",
    "make_output_folder",
    "write_error",
    "json_text",
    "strict_json_value",
    "locked",
    "update_json_file",
    "STAGING_PREFIX",
    "signals_held",
]


#: Mode of written files before the process umask (as ``open()`` would create them).
_FILE_MODE = 0o666
#: Name prefix of the hidden staging folders of :func:`output_batch`.
STAGING_PREFIX = ".probeplan-partial-"
#: Key under which :func:`json_text` lists the values it wrote as null.
NULLS_KEY = "null_values"

_NO_SPACE = {errno.ENOSPC, getattr(errno, "EDQUOT", errno.ENOSPC), errno.EFBIG}
_NOT_WRITABLE = {errno.EACCES, errno.EPERM, errno.EROFS}


# --------------------------------------------------------------------------- write errors
def write_error(path: str | Path, exc: OSError) -> InputError:
    """The one-line :class:`InputError` for an operating-system error while writing ``path``.

    Examples
    --------
    >>> print(write_error("out/a.csv", OSError(errno.ENOSPC, "No space left on device")))
    out/a.csv: cannot be written (no space left on the disk); free some space or write to another disk
    """
    code = exc.errno
    folder = Path(path).parent
    if code in _NO_SPACE:
        return input_error(str(path), "cannot be written (no space left on the disk)",
                           "free some space or write to another disk")
    if code in _NOT_WRITABLE:
        return input_error(str(path), f"cannot be written (folder {str(folder) or '.'!r} is read-only or not yours)",
                           "choose a folder you can write to")
    if code == errno.ENOENT:
        return input_error(str(path), f"cannot be written (folder {str(folder) or '.'!r} does not exist)",
                           "create it first or choose another output path")
    if code == errno.EISDIR:
        return input_error(str(path), "is a folder", "give a file name for the output")
    if code == errno.ENOTDIR:
        return input_error(str(path), "cannot be written (a part of the path is a file, not a folder)",
                           "choose another output path")
    if code == errno.ENAMETOOLONG:
        return input_error(str(path), "cannot be written (name too long)", "choose a shorter name")
    reason = (exc.strerror or type(exc).__name__).rstrip(".").lower()
    return input_error(str(path), f"cannot be written ({reason})", "check the path and the disk, then try again")


# --------------------------------------------------------------------------- overwrite policy
@dataclass
class OutputPolicy:
    """Which existing files a run may replace.

    Attributes
    ----------
    overwrite : bool
        True: any existing file may be replaced (the command line's ``--overwrite``).
    replaceable : set of Path
        Files this run may replace although it did not write them (e.g. the outputs an
        interrupted earlier run recorded in a manifest, redone by ``--resume``).
    written : set of Path
        Files written by this run so far (they may be written again).
    """

    overwrite: bool = False
    replaceable: set[Path] = field(default_factory=set)
    written: set[Path] = field(default_factory=set)
    option: str = "overwrite=True"

    def may_replace(self, target: Path) -> bool:
        key = _key(target)
        return self.overwrite or key in self.written or key in self.replaceable

    def check(self, target: str | Path) -> None:
        """Refuse ``target`` if it exists and may not be replaced."""
        target = Path(target)
        if target.is_dir():
            raise input_error(str(target), "is a folder", "give a file name for the output")
        if (target.exists() or target.is_symlink()) and not self.may_replace(target):
            raise input_error(str(target), "already exists and was not written by this run",
                              f"choose another output path, move the file away, or give {self.option}")

    def allow(self, paths: Iterable[str | Path]) -> None:
        """Let this run replace ``paths``."""
        self.replaceable.update(_key(p) for p in paths)


_POLICY: contextvars.ContextVar[OutputPolicy | None] = contextvars.ContextVar("probeplan_output_policy", default=None)
_BATCH: contextvars.ContextVar[OutputBatch | None] = contextvars.ContextVar("probeplan_output_batch", default=None)


def _key(path: str | Path) -> Path:
    return Path(os.path.abspath(path))


@contextlib.contextmanager
def output_policy(*, overwrite: bool = False, replaceable: Iterable[str | Path] = (),
                  option: str = "overwrite=True") -> Iterator[OutputPolicy]:
    """Refuse, inside the block, to replace any existing file this run did not write.

    Without an active policy (plain library use) the ``write_*`` helpers replace existing
    files, as ``open(..., "w")`` would.  The command line opens one policy per run.

    Examples
    --------
    >>> import tempfile
    >>> folder = Path(tempfile.mkdtemp())
    >>> _ = (folder / "a.txt").write_text("mine")
    >>> with output_policy():
    ...     write_text_atomic(folder / "a.txt", "new")
    Traceback (most recent call last):
    ...
    probeplan.errors.InputError: .../a.txt: already exists and was not written by this run; ...
    >>> (folder / "a.txt").read_text()
    'mine'
    """
    policy = OutputPolicy(overwrite=overwrite, option=option)
    policy.allow(replaceable)
    token = _POLICY.set(policy)
    try:
        yield policy
    finally:
        _POLICY.reset(token)


def current_policy() -> OutputPolicy | None:
    """The active :class:`OutputPolicy`, or None."""
    return _POLICY.get()


def check_outputs(paths: Iterable[str | Path]) -> None:
    """Refuse, before any work, outputs that exist and may not be replaced (no-op without a policy).

    Also refuses a target that is a folder, and a target whose folder does not exist.
    """
    policy = _POLICY.get()
    for p in paths:
        p = Path(p)
        folder = p.parent if str(p.parent) else Path(".")
        if not folder.is_dir() and (_BATCH.get() is None or not _BATCH.get().will_create(folder)):
            raise input_error(str(p), f"folder {str(folder)!r} does not exist", "create it first or choose another output path")
        if policy is not None:
            policy.check(p)
        elif p.is_dir():
            raise input_error(str(p), "is a folder", "give a file name for the output")


# --------------------------------------------------------------------------- all-or-nothing groups
def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OSError):
        return True
    return True


def _remove_stale_staging(folder: Path) -> None:
    """Remove staging folders left in ``folder`` by runs that were killed (their process is gone)."""
    try:
        entries = list(folder.iterdir())
    except OSError:
        return
    for entry in entries:
        if not entry.name.startswith(STAGING_PREFIX):
            continue
        try:
            pid = int(entry.name[len(STAGING_PREFIX):].split("-")[0])
        except ValueError:
            continue
        if pid != os.getpid() and not _pid_alive(pid):
            shutil.rmtree(entry, ignore_errors=True)


class OutputBatch:
    """Files staged together and moved into place together (see :func:`output_batch`)."""

    def __init__(self) -> None:
        self._staging: dict[Path, Path] = {}  # target folder -> staging folder
        self._staged: dict[Path, Path] = {}  # target (absolute) -> staged file
        self._created: list[Path] = []  # folders created by make_folder, outermost first
        self.committed: list[Path] = []

    def will_create(self, folder: Path) -> bool:
        return _key(folder) in {_key(p) for p in self._created}

    def make_folder(self, folder: str | Path) -> Path:
        """Create ``folder`` (and missing parents), removed again if the batch fails."""
        folder = Path(folder)
        if folder.exists() and not folder.is_dir():
            raise input_error(str(folder), "is a file", "give a folder path")
        missing = []
        for parent in (folder, *folder.absolute().parents):
            if parent.exists():
                break
            missing.append(parent)
        try:
            folder.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise write_error(folder / "-", exc) from None
        if missing:
            self._created.append(missing[-1])
        return folder

    def staging_folder(self, folder: Path) -> Path:
        key = _key(folder)
        if key not in self._staging:
            _remove_stale_staging(folder)
            path = folder / f"{STAGING_PREFIX}{os.getpid()}-{secrets.token_hex(4)}"
            try:
                path.mkdir()
            except OSError as exc:
                raise write_error(path.parent / "-", exc) from None
            self._staging[key] = path
        return self._staging[key]

    def staged_path(self, target: Path) -> Path:
        """Where ``target`` is held until the batch commits."""
        return self.staging_folder(target.parent if str(target.parent) else Path(".")) / target.name

    def register(self, target: Path, staged: Path) -> None:
        self._staged[_key(target)] = staged

    def current(self, target: str | Path) -> Path:
        """The file to read ``target`` from now: its staged copy while the batch is open."""
        return self._staged.get(_key(target), Path(target))

    def commit(self) -> list[Path]:
        """Move every staged file onto its target; return the targets."""
        policy = _POLICY.get()
        done: list[Path] = []
        with signals_held():
            return self._commit(policy, done)

    def _commit(self, policy: OutputPolicy | None, done: list[Path]) -> list[Path]:
        try:
            for target, staged in self._staged.items():
                _move_into_place(staged, target, may_replace=policy is None or policy.may_replace(target))
                done.append(target)
                if policy is not None:
                    policy.written.add(target)
        except BaseException:
            for target in done:  # put the group back to "not at all"
                with contextlib.suppress(OSError):
                    target.unlink()
            raise
        finally:
            self._remove_staging()
        for folder in {t.parent for t in done}:
            _fsync_folder(folder)
        self.committed += done
        self._staged.clear()
        return done

    def abort(self) -> None:
        """Drop every staged file; remove the folders this batch created if nothing was committed."""
        self._staged.clear()
        self._remove_staging()
        if not self.committed:
            for folder in self._created:
                shutil.rmtree(folder, ignore_errors=True)
        self._created.clear()

    def _remove_staging(self) -> None:
        for path in self._staging.values():
            shutil.rmtree(path, ignore_errors=True)
        self._staging.clear()


@contextlib.contextmanager
def signals_held() -> Iterator[None]:
    """Hold SIGINT and SIGTERM back while a group is moved into place and recorded (delivered right after)."""
    import signal
    import threading

    held = {signal.SIGINT, signal.SIGTERM}
    if not hasattr(signal, "pthread_sigmask") or threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = signal.pthread_sigmask(signal.SIG_BLOCK, held)
    try:
        yield
    finally:
        signal.pthread_sigmask(signal.SIG_SETMASK, previous)


def _move_into_place(staged: Path, target: Path, *, may_replace: bool) -> None:
    try:
        if may_replace:
            os.replace(staged, target)
            return
        try:
            os.link(staged, target)  # fails if the target appeared meanwhile: never replaced silently
        except FileExistsError:
            raise input_error(str(target), "appeared while this run was writing (another run?)",
                              "choose another output path, or allow overwriting") from None
        except OSError as exc:
            if exc.errno not in (errno.EPERM, errno.ENOTSUP, errno.EOPNOTSUPP, errno.EXDEV, errno.EMLINK):
                raise
            if target.exists():  # a file system without hard links: check, then rename
                raise input_error(str(target), "appeared while this run was writing (another run?)",
                                  "choose another output path, or allow overwriting") from None
            os.replace(staged, target)
            return
        staged.unlink()
    except OSError as exc:
        raise write_error(target, exc) from None


def _fsync_folder(folder: Path) -> None:
    with contextlib.suppress(OSError, AttributeError):
        fd = os.open(folder, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


@contextlib.contextmanager
def output_batch() -> Iterator[OutputBatch]:
    """Group the files written inside the block: all appear at its end, or none does.

    Files are staged in a hidden folder beside each target and moved into place when the
    block ends without an exception; on any exception (including ``KeyboardInterrupt``)
    they are dropped, and the folders created with :meth:`OutputBatch.make_folder` are
    removed.  A block inside another block joins the outer one (one group).  While the
    block is open, :func:`readable_path` gives where a written target can be read back.

    Examples
    --------
    >>> import tempfile
    >>> folder = Path(tempfile.mkdtemp())
    >>> with output_batch():
    ...     _ = write_text_atomic(folder / "a.txt", "a")
    ...     (folder / "a.txt").exists()
    False
    >>> (folder / "a.txt").read_text()
    'a'
    """
    outer = _BATCH.get()
    if outer is not None:
        yield outer
        return
    batch = OutputBatch()
    token = _BATCH.set(batch)
    try:
        yield batch
    except BaseException:
        _BATCH.reset(token)
        batch.abort()
        raise
    _BATCH.reset(token)
    try:
        batch.commit()
    except BaseException:
        batch.abort()
        raise


def readable_path(target: str | Path) -> Path:
    """Where a file written in this run can be read now (its staged copy inside an open batch)."""
    batch = _BATCH.get()
    return batch.current(target) if batch is not None else Path(target)


def make_output_folder(folder: str | Path) -> Path:
    """Create an output folder (and its parents); inside a batch it is removed again if the batch fails."""
    batch = _BATCH.get()
    if batch is not None:
        return batch.make_folder(folder)
    folder = Path(folder)
    if folder.exists() and not folder.is_dir():
        raise input_error(str(folder), "is a file", "give a folder path")
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise write_error(folder / "-", exc) from None
    return folder


# --------------------------------------------------------------------------- one file
@contextlib.contextmanager
def atomic_path(target: str | Path, *, suffix: str | None = None) -> Iterator[Path]:
    """Yield a temporary path for ``target``; move it onto ``target`` on success.

    On any exception (including ``KeyboardInterrupt``) the temporary file is
    removed and ``target`` is left as it was.  The temporary name is chosen
    before the file is created, so an interrupt that lands just after the file
    appears still finds and removes it.  Inside :func:`output_policy` an existing
    target is refused unless it may be replaced; inside :func:`output_batch` the
    file is staged and appears with the rest of its group.  An ``OSError`` while
    writing (read-only or missing folder, full disk, a folder in the way) becomes an
    :class:`InputError` naming ``target`` (:func:`write_error`).
    """
    target = Path(target)
    folder = target.parent if str(target.parent) else Path(".")
    batch = _BATCH.get()
    if not folder.is_dir():
        raise input_error(str(target), f"folder {str(folder)!r} does not exist", "create it first or choose another output folder")
    policy = _POLICY.get()
    if policy is not None:
        policy.check(target)
    elif target.is_dir():
        raise input_error(str(target), "is a folder", "give a file name for the output")
    final = batch.staged_path(target) if batch is not None else target
    tmp_path = final.parent / f".{target.name}.{secrets.token_hex(6)}{suffix or '.part'}"
    try:
        try:
            os.close(os.open(tmp_path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, _FILE_MODE))
            yield tmp_path
            if batch is None and policy is not None and not policy.may_replace(target):
                _move_into_place(tmp_path, target, may_replace=False)
            else:
                os.replace(tmp_path, final)
        except OSError as exc:
            raise write_error(target, exc) from None
    except BaseException:
        with contextlib.suppress(OSError):
            tmp_path.unlink()
        raise
    if batch is not None:
        batch.register(target, final)
    elif policy is not None:
        policy.written.add(_key(target))


def write_bytes_atomic(target: str | Path, data: bytes) -> Path:
    """Write ``data`` to ``target`` atomically; return ``target``."""
    with atomic_path(target) as tmp:
        with open(tmp, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
    return Path(target)


def write_text_atomic(target: str | Path, text: str) -> Path:
    """Write UTF-8 ``text`` to ``target`` atomically; return ``target``."""
    return write_bytes_atomic(target, text.encode("utf-8"))


def write_json_atomic(target: str | Path, obj: Any) -> Path:
    """Write ``obj`` as indented, strict JSON to ``target`` atomically (see :func:`json_text`); return ``target``."""
    return write_text_atomic(target, json_text(obj))


def strict_json_value(obj: Any, *, _path: str = "", _nulls: list[str] | None = None) -> Any:
    """``obj`` with numpy values made plain and every NaN / ±inf replaced by ``None``.

    Each replacement is listed in ``_nulls`` as ``"key.path: NaN"`` (or ``inf`` / ``-inf``).
    """
    import numpy as np

    nulls = _nulls if _nulls is not None else []
    if isinstance(obj, np.ndarray):
        obj = obj.tolist()
    elif isinstance(obj, np.generic):
        obj = obj.item()
    if isinstance(obj, float):
        if math.isfinite(obj):
            return obj
        nulls.append(f"{_path or '(value)'}: {'NaN' if math.isnan(obj) else ('inf' if obj > 0 else '-inf')}")
        return None
    if isinstance(obj, Mapping):
        return {str(k): strict_json_value(v, _path=f"{_path}.{k}" if _path else str(k), _nulls=nulls)
                for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [strict_json_value(v, _path=f"{_path}[{i}]", _nulls=nulls) for i, v in enumerate(obj)]
    if isinstance(obj, Path):
        return str(obj)
    return obj


def json_text(obj: Any, *, indent: int | None = 2) -> str:
    """The package's one JSON writer: strict JSON (no ``NaN``/``Infinity``), newline-terminated.

    Numbers that are not finite are written as ``null``; when ``obj`` is a mapping, the
    key ``"null_values"`` lists which values they were (``"residual_rms.rms: NaN"``).

    Examples
    --------
    >>> print(json_text({"rms": float("nan"), "n": 3}, indent=None), end="")
    {"rms": null, "n": 3, "null_values": ["rms: NaN"]}
    """
    nulls: list[str] = []
    plain = strict_json_value(obj, _nulls=nulls)
    if nulls and isinstance(plain, dict):
        plain[NULLS_KEY] = [*plain.get(NULLS_KEY, []), *nulls] if isinstance(plain.get(NULLS_KEY), list) else nulls
    return json.dumps(plain, indent=indent, allow_nan=False, default=_json_default) + "\n"


def _json_default(obj: Any) -> Any:
    raise TypeError(f"not JSON serialisable: {type(obj).__name__}")


def table_to_csv_text(rows: Sequence[Mapping[str, Any]], columns: Sequence[str] | None = None) -> str:
    """Render a list of row dicts as CSV text (columns from the first row unless given), with pandas.

    Keys outside ``columns`` are left out; a missing key or None is an empty cell, a NaN is ``nan``;
    numbers are written at full precision (their ``str``), as Python's csv module would.

    Examples
    --------
    >>> print(table_to_csv_text([{"a": 1, "b": None}, {"a": 2.5, "b": float("nan"), "c": "x"}], ["a", "b"]), end="")
    a,b
    1,
    2.5,nan
    """
    import pandas as pd

    cols = list(columns) if columns is not None else (list(rows[0].keys()) if rows else [])
    # object dtype keeps each value as given (no int -> float promotion of a column with gaps)
    cells = [["" if row.get(c) is None else row.get(c) for c in cols] for row in rows]
    frame = pd.DataFrame(cells, columns=cols, dtype=object)
    return frame.to_csv(index=False, lineterminator="\n", na_rep="nan")


def write_csv_atomic(
    target: str | Path, rows: Sequence[Mapping[str, Any]], columns: Sequence[str] | None = None
) -> Path:
    """Write a list of row dicts as CSV to ``target`` atomically; return ``target``."""
    return write_text_atomic(target, table_to_csv_text(rows, columns))


def refuse_input_paths(outputs: Iterable[str | Path], inputs: Iterable[str | Path], *, option: str = "out") -> None:
    """Raise if any output path is one of the inputs (compared after resolving links).

    Raises
    ------
    InputError
        Naming the clashing path and the option to change.
    """
    resolved_inputs = {Path(p).resolve() for p in inputs}
    for out in outputs:
        if Path(out).resolve() in resolved_inputs:
            raise input_error(option, f"{str(out)!r} is also an input", "choose an output path that is not an input file")




# --------------------------------------------------------------------------- shared files
@contextlib.contextmanager
def locked(path: str | Path) -> Iterator[None]:
    """Hold an exclusive lock on the folder holding ``path`` inside the block.

    Serialises read-modify-write updates of a file shared by concurrent runs (``fcntl.flock``
    on the folder itself, so no lock file is left behind; where that is not available the
    block runs unlocked).
    """
    folder = Path(path).parent if str(Path(path).parent) else Path(".")
    try:
        import fcntl
    except ImportError:  # pragma: no cover - not POSIX
        yield
        return
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError as exc:
        raise write_error(path, exc) from None
    try:
        fcntl.flock(fd, fcntl.LOCK_EX)
        yield
    finally:
        with contextlib.suppress(OSError):
            fcntl.flock(fd, fcntl.LOCK_UN)
        os.close(fd)


def update_json_file(path: str | Path, update: Callable[[Any], Any], *, read: Callable[[Path], Any]) -> Any:
    """Read ``path`` with ``read``, apply ``update`` and write the result back, under :func:`locked`.

    The file is shared state (a manifest), so it is written in place of the old one
    directly, outside any :func:`output_batch` and :func:`output_policy`; concurrent runs
    each add their own entries.  Returns what ``update`` returned.
    """
    path = Path(path)
    with locked(path):
        data = update(read(path))
        tmp = path.with_name(f".{path.name}.{secrets.token_hex(6)}.part")
        try:
            try:
                with open(tmp, "x", encoding="utf-8") as fh:
                    fh.write(json_text(data))
                    fh.flush()
                    os.fsync(fh.fileno())
                os.replace(tmp, path)
            except OSError as exc:
                raise write_error(path, exc) from None
        except BaseException:
            with contextlib.suppress(OSError):
                tmp.unlink()
            raise
    return data


def file_sha256(path) -> str:
    """Checksum of a file, or of every file in a folder (an OME-Zarr image) with its relative name; an
    fsspec URL of a folder is read through fsspec the same way."""
    import hashlib

    h = hashlib.sha256()

    def add(name: str | None, fh) -> None:
        if name is not None:  # a folder's files: each under its relative name
            h.update(name.encode())
        for block in iter(lambda: fh.read(1 << 22), b""):
            h.update(block)

    from probeplan.io.ngff import is_url

    if is_url(path):
        import fsspec

        fs, root = fsspec.core.url_to_fs(path)
        root = root.rstrip("/")
        for f in sorted(fs.find(root)):
            with fs.open(f, "rb") as fh:
                add(f[len(root) + 1:], fh)
        return h.hexdigest()
    p = Path(path)
    files = sorted(f for f in p.rglob("*") if f.is_file()) if p.is_dir() else [p]
    for f in files:
        with open(f, "rb") as fh:
            add(str(f.relative_to(p)) if p.is_dir() else None, fh)
    return h.hexdigest()
