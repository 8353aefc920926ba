"""Writing results safely: atomic files and output folders that never hold a half-finished run.

Every writer goes through :func:`atomic_write_bytes` / :func:`atomic_write_text` (write to a temporary file
in the same folder, then ``os.replace``), so an interrupted or failed run leaves either the old file or the
new one, never a partial file.  :func:`check_out_path` refuses, before any work, an output path that is a
file, lies under a file or cannot be written; :func:`check_out_dir` also refuses a folder that already holds
siteproof results unless ``force`` is set.  :class:`StagedOutput` writes a whole result folder beside the
final one and publishes it with one rename (or a swap), so a folder never mixes two runs.
"""

from __future__ import annotations

import json
import math
import os
import secrets
import shutil
import signal
import tempfile
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np

from .errors import SiteproofError

RESULT_FILES = ("claims.json", "scorecard.json", "report.html", "report.md", "units.parquet")


def atomic_write_bytes(path: Path | str, data: bytes) -> Path:
    """Write ``data`` to ``path`` through a temporary file in the same folder and an atomic rename."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return path


def atomic_write_text(path: Path | str, text: str) -> Path:
    """UTF-8 text version of :func:`atomic_write_bytes`."""
    return atomic_write_bytes(path, text.encode("utf-8"))


def _json_default(obj: Any) -> Any:
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.floating):
        return None if not np.isfinite(obj) else float(obj)
    if isinstance(obj, np.ndarray):
        return [_json_default(v) if isinstance(v, np.generic) else v for v in obj.tolist()]
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, Path):
        return str(obj)
    raise TypeError(f"cannot serialise {type(obj).__name__} to JSON")


def _finite(obj: Any) -> Any:
    """Replace non-finite floats by None so that the JSON is standard (no NaN/Infinity tokens)."""
    if isinstance(obj, float):
        return obj if np.isfinite(obj) else None
    if isinstance(obj, dict):
        return {k: _finite(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_finite(v) for v in obj]
    return obj


def json_records(frame: Any) -> list[dict[str, Any]]:
    """Rows of a pandas DataFrame as JSON-ready dicts: NumPy scalars as Python values, NaN and ±inf as None."""
    def plain(v: Any) -> Any:
        v = v.item() if isinstance(v, np.generic) else v
        return None if isinstance(v, float) and not math.isfinite(v) else v

    return [{k: plain(v) for k, v in row.items()} for row in frame.to_dict("records")]


def to_json_text(obj: Any) -> str:
    """Standard JSON (NaN → null, numpy scalars → numbers), indented for people to read."""
    plain = json.loads(json.dumps(obj, default=_json_default, allow_nan=True))
    return json.dumps(_finite(plain), indent=2, allow_nan=False) + "\n"


def atomic_write_json(path: Path | str, obj: Any) -> Path:
    """Write ``obj`` as standard JSON atomically."""
    return atomic_write_text(path, to_json_text(obj))


# ----------------------------------------------------------------------------------------------------------
# output folders: checked before any work, published with one rename
# ----------------------------------------------------------------------------------------------------------
STAGING_PREFIX = ".siteproof-staging-"
RETIRED_PREFIX = ".siteproof-retired-"
MANIFEST_FILE = ".siteproof-manifest.json"
MANIFEST_SCHEMA = "siteproof/output-folder"
#: entries that earlier versions wrote without a manifest (they count as siteproof's own when replacing)
KNOWN_OUTPUTS = RESULT_FILES + (
    "figures", "public", "key", "leaderboard.csv", "leaderboard.json", "leaderboard.html", "sites.csv",
)


def _nearest_existing(path: Path) -> Path:
    """``path`` itself or its closest ancestor that exists."""
    for candidate in (path, *path.parents):
        if candidate.exists():
            return candidate
    return Path(path.anchor or ".")


def _probe_writable(folder: Path, out: Path, flag: str) -> None:
    """Create and remove a scratch folder in ``folder``: the only check that also holds for root and for
    read-only file systems (``os.access`` says yes to root)."""
    try:
        Path(tempfile.mkdtemp(prefix=f"{STAGING_PREFIX}probe-", dir=folder)).rmdir()
    except OSError as exc:
        raise SiteproofError(
            f"cannot write {out}: the folder {folder} is not writable ({exc.strerror or type(exc).__name__})",
            f"name a folder you can write to with {flag}",
        ) from None


def check_out_path(out: Path | str, kind: str = "folder", flag: str = "--out") -> Path:
    """Refuse an output path that is of the wrong kind, lies under a file, or cannot be written.

    ``kind`` is "folder" (results folders) or "file" (a single data file such as ``simulate --out``).  The
    folder that will receive the scratch folder (the output's parent) must exist or be creatable and be
    writable; this uses the file system only, so it runs before any data is read.
    """
    out = Path(out)
    if kind == "folder" and out.exists() and not out.is_dir():
        raise SiteproofError(f"output path {out} is a file, not a folder", f"name a folder with {flag}")
    if kind == "file" and out.is_dir():
        raise SiteproofError(f"output path {out} is a folder, not a file", f"name the file to write with {flag}")
    anchor = _nearest_existing(out.absolute().parent)
    if not anchor.is_dir():
        raise SiteproofError(f"output path {out} lies under {anchor}, which is a file", f"name a folder with {flag}")
    _probe_writable(anchor, out, flag)
    if kind == "folder" and out.is_dir():
        _probe_writable(out, out, flag)
    return out


def _manifest_entries(folder: Path) -> set[str] | None:
    """The entries an earlier siteproof publish listed in ``folder``'s manifest (None: no valid manifest)."""
    try:
        record = json.loads((folder / MANIFEST_FILE).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    entries = record.get("entries") if isinstance(record, dict) else None
    return {str(e) for e in entries} if isinstance(entries, list) else None


def own_entries(folder: Path) -> set[str]:
    """The entries of ``folder`` that siteproof wrote (its manifest, or the names earlier versions used)."""
    listed = _manifest_entries(folder) or set()
    present = {p.name for p in folder.iterdir()} if folder.is_dir() else set()
    return present & (listed | set(KNOWN_OUTPUTS) | {MANIFEST_FILE})


def check_out_dir(out_dir: Path | str, force: bool = False) -> Path:
    """Refuse an output folder that cannot be written (:func:`check_out_path`), or that holds earlier
    siteproof results unless ``force`` (then the earlier results are replaced as a whole)."""
    out = check_out_path(out_dir)
    if out.is_dir() and not force:
        earlier = sorted(own_entries(out) - {MANIFEST_FILE})
        if earlier:
            raise SiteproofError(
                f"output folder {out} already holds earlier results ({', '.join(earlier)})",
                "choose another --out folder or add --force to replace them",
            )
    return out


def _process_start() -> float:
    """When this process started (Linux: from /proc; elsewhere: when this module was imported)."""
    try:
        ticks = int(Path("/proc/self/stat").read_text().rsplit(")", 1)[1].split()[19])
        uptime = float(Path("/proc/uptime").read_text().split()[0])
        return time.time() - uptime + ticks / os.sysconf("SC_CLK_TCK")
    except (OSError, ValueError, IndexError):
        return time.time()


PROCESS_START = _process_start()


def _pid_alive(pid: int) -> bool:
    """True when a process with this id runs (signal 0 checks without sending anything)."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OSError):
        return True
    return True


def _is_stale(path: Path) -> bool:
    """A scratch folder of a crashed run: its owner (the pid in its name) is gone, or the pid is this
    process's but the folder is older than this process (the pid was reused)."""
    try:
        pid = int(path.name.rsplit("-", 2)[-2])
        mtime = path.lstat().st_mtime
    except (ValueError, IndexError, OSError):
        return False
    if pid == os.getpid():
        return mtime < PROCESS_START
    return not _pid_alive(pid)


def clean_stale(parent: Path) -> list[Path]:
    """Remove the scratch and retired folders that crashed runs left in ``parent``; return them.

    Recognised by the prefixes :data:`STAGING_PREFIX` / :data:`RETIRED_PREFIX` (and ``.NAME.XXXX.partial``
    folders of earlier versions older than this process).
    """
    removed = []
    if not parent.is_dir():
        return removed
    for path in parent.iterdir():
        ours = path.name.startswith((STAGING_PREFIX, RETIRED_PREFIX)) and _is_stale(path)
        legacy = (path.name.startswith(".") and path.name.endswith(".partial") and path.is_dir()
                  and path.lstat().st_mtime < PROCESS_START)
        if (ours or legacy) and path.is_dir() and not path.is_symlink():
            shutil.rmtree(path, ignore_errors=True)
            removed.append(path)
    return removed


def _scratch_name(prefix: str, name: str) -> str:
    return f"{prefix}{name}-{os.getpid()}-{secrets.token_hex(4)}"


@contextmanager
def _signals_deferred() -> Iterator[None]:
    """Hold SIGINT/SIGTERM while the output folder is swapped, so Ctrl-C never lands between the renames."""
    blockable = hasattr(signal, "pthread_sigmask") and threading.current_thread() is threading.main_thread()
    if blockable:
        old = signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGINT, signal.SIGTERM})
    try:
        yield
    finally:
        if blockable:
            signal.pthread_sigmask(signal.SIG_SETMASK, old)


class StagedOutput:
    """A scratch folder beside ``out_dir`` that replaces ``out_dir`` only when everything succeeded.

    Used as a context manager: write every output into the path it yields.  On a clean exit the scratch
    folder gets a manifest (``.siteproof-manifest.json``, the entries it holds) and is published:

    * ``out_dir`` absent: one ``rename`` of the scratch folder;
    * ``out_dir`` holding siteproof outputs only (or nothing): swapped — ``out_dir`` → ``.siteproof-retired-…``,
      scratch → ``out_dir``, the retired folder deleted — so an earlier run's files never sit beside the new
      ones (``force`` was needed to get here when it held results);
    * ``out_dir`` also holding other files: those stay; the earlier siteproof entries are removed and the new
      entries moved in one by one.

    On an error or Ctrl-C the scratch folder is removed and ``out_dir`` is left as it was.  Scratch folders
    of crashed runs (their process is gone) are removed when the next one starts.
    """

    def __init__(self, out_dir: Path | str, force: bool = False) -> None:
        self.out_dir = Path(out_dir)
        self.force = force
        self.path: Path | None = None

    def __enter__(self) -> Path:
        check_out_dir(self.out_dir, self.force)
        parent = self.out_dir.absolute().parent
        parent.mkdir(parents=True, exist_ok=True)
        clean_stale(parent)
        self.path = parent / _scratch_name(STAGING_PREFIX, self.out_dir.absolute().name)
        self.path.mkdir()
        return self.path

    def __exit__(self, exc_type, exc, tb) -> None:
        assert self.path is not None
        try:
            if exc_type is None:
                self._publish(self.path)
        finally:
            shutil.rmtree(self.path, ignore_errors=True)

    def _publish(self, staged: Path) -> None:
        entries = sorted(p.name for p in staged.iterdir())
        (staged / MANIFEST_FILE).write_text(
            to_json_text({"schema": MANIFEST_SCHEMA, "entries": entries}), encoding="utf-8")
        out = self.out_dir.absolute()
        try:
            with _signals_deferred():
                if not out.exists():
                    os.rename(staged, out)
                elif set(p.name for p in out.iterdir()) <= own_entries(out):
                    _swap(staged, out)
                else:
                    _merge(staged, out, entries)
        except OSError as exc:
            raise SiteproofError(
                f"cannot publish the results into {self.out_dir} ({exc.strerror or exc})",
                "check that the folder is not open in another program and can be written, then rerun",
            ) from None


def _swap(staged: Path, out: Path) -> None:
    """``out`` → retired name, ``staged`` → ``out``, retired deleted (two renames; old results intact until then)."""
    retired = out.parent / _scratch_name(RETIRED_PREFIX, out.name)
    os.rename(out, retired)
    try:
        os.rename(staged, out)
    except OSError:
        os.rename(retired, out)
        raise
    shutil.rmtree(retired, ignore_errors=True)


def _merge(staged: Path, out: Path, entries: list[str]) -> None:
    """Into a folder that also holds files siteproof did not write: earlier siteproof entries are removed,
    the new ones moved in (folders swapped one by one), the manifest last."""
    for name in own_entries(out) - set(entries) - {MANIFEST_FILE}:
        target = out / name
        shutil.rmtree(target) if target.is_dir() and not target.is_symlink() else target.unlink()
    for name in entries:
        source, target = staged / name, out / name
        if source.is_dir() and target.exists():
            _swap(source, target)
        else:
            os.replace(source, target)
    os.replace(staged / MANIFEST_FILE, out / MANIFEST_FILE)
