"""Atomic output files and folders, written once for every writer (bundle, report, sweep, sample).

pyarrow and plain ``open`` writes are not atomic: a crash leaves half a file.
Every output is therefore written under a hidden temporary name beside its
target (``.NAME.tmp-PID-RANDOM``), synced to disk, and moved into place in one
step; an existing target is replaced only when asked, and only when it is an
output of the same kind.
"""

from __future__ import annotations

__all__ = ["fsync_path", "write_synced", "temp_sibling", "stale_temp_siblings", "remove_stale_temp_siblings",
           "remove_abandoned", "check_folder_target", "publish_directory", "write_folder", "write_file"]

import ctypes
import ctypes.util
import os
import re
import secrets
import shutil
from pathlib import Path

from .errors import OutputError


def fsync_path(path: Path) -> None:
    """Flush a file or folder to disk."""
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def write_synced(path: Path, data) -> None:
    """Write ``data`` (bytes, or text as UTF-8) to ``path`` and sync it."""
    if isinstance(data, str):
        data = data.encode("utf-8")
    with open(path, "wb") as fh:
        fh.write(data)
        fh.flush()
        os.fsync(fh.fileno())


def temp_sibling(target: Path, tag: str) -> Path:
    """A hidden sibling ``.NAME.TAG-PID-RANDOM`` of ``target`` (the writer's process id lets a later
    writer tell an abandoned folder from one being written)."""
    return target.parent / f".{target.name}.{tag}-{os.getpid()}-{secrets.token_hex(4)}"


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OverflowError, ValueError):
        return True  # exists (owned by someone else) or unknowable: keep its folder
    return True


def stale_temp_siblings(target: Path, tags=("tmp",)) -> list[Path]:
    """Temporary siblings of ``target`` left by a writer that no longer runs (killed mid-write).

    A folder ``.NAME.tmp-PID-RANDOM`` is stale when process ``PID`` is gone. This
    assumes every writer to one folder runs on this machine in the same process
    namespace (the usual case); a folder whose writer may still run is kept.
    """
    target = Path(target)
    parent = target.parent
    out = []
    if not parent.is_dir():
        return out
    pattern = re.compile(r"^\." + re.escape(target.name) + r"\.(" + "|".join(map(re.escape, tags)) +
                         r")-(\d+)-[0-9a-f]{8}$")
    try:
        entries = list(parent.iterdir())
    except OSError:
        return out
    for p in entries:
        m = pattern.match(p.name)
        if m and p.is_dir() and not p.is_symlink() and not _pid_alive(int(m.group(2))):
            out.append(p)
    return sorted(out)


def remove_stale_temp_siblings(target: Path) -> list[Path]:
    """Delete abandoned ``.NAME.tmp-*`` siblings of ``target`` (see :func:`stale_temp_siblings`).

    Only ``tmp`` folders (never-published, partial writes) and empty ``probe``
    folders of the writability test are removed; an ``old`` folder can hold a
    previous output and is left for a person to decide.
    """
    removed = []
    for p in stale_temp_siblings(target, ("tmp", "probe")):
        shutil.rmtree(p, ignore_errors=True)
        if not p.exists():
            removed.append(p)
    return removed


def remove_abandoned(target: Path, own_files) -> None:
    """Remove hidden ``.NAME.tmp-*`` / ``.NAME.old-*`` siblings of ``target`` that hold nothing but
    ``own_files`` (what this writer writes): leftovers of a run killed mid-write, whatever their writer."""
    own = set(own_files)
    for pattern in (f".{target.name}.tmp-*", f".{target.name}.old-*"):
        for p in target.parent.glob(pattern):
            try:
                if p.is_dir() and not p.is_symlink() and {c.name for c in p.iterdir()} <= own:
                    shutil.rmtree(p, ignore_errors=True)
            except OSError:
                pass


def _rename_exchange(a: Path, b: Path) -> bool:
    """Atomically swap two paths with Linux ``renameat2(RENAME_EXCHANGE)``; False if unsupported."""
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6", use_errno=True)
        fn = libc.renameat2
    except (OSError, AttributeError):
        return False
    AT_FDCWD, RENAME_EXCHANGE = -100, 2
    fn.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
    res = fn(AT_FDCWD, os.fsencode(a), AT_FDCWD, os.fsencode(b), RENAME_EXCHANGE)
    return res == 0


def check_folder_target(target: Path, overwrite: bool, *, kind: str, is_kind=None, probe: bool = False) -> None:
    """Refuse an output folder that cannot or must not be written.

    Parameters
    ----------
    target : Path
        The folder to create.
    overwrite : bool
        Whether an existing folder may be replaced.
    kind : str
        What the folder is, for messages ("bundle", "report", "sweep").
    is_kind : callable, optional
        ``is_kind(target) -> bool``: an existing non-empty folder is replaced only
        when it is an output of this kind.
    probe : bool
        Also create and remove a folder beside it (``os.access`` says yes to root
        even on read-only file systems).

    Raises
    ------
    OutputError
    """
    if target.exists() or target.is_symlink():
        if not target.is_dir():
            raise OutputError(f"{target}: output path exists and is not a folder")
        if not overwrite:
            raise OutputError(f"{target}: output folder already exists (use --overwrite to replace it)")
        if is_kind is not None and any(target.iterdir()) and not is_kind(target):
            raise OutputError(f"{target}: refusing to replace a non-empty folder that is not {kind}")
    parent = target.parent
    if not parent.exists():
        raise OutputError(f"{parent}: parent folder of the output does not exist")
    if not parent.is_dir():
        raise OutputError(f"{parent}: parent of the output is not a folder")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise OutputError(f"{parent}: output folder is not writable")
    if probe:
        p = temp_sibling(target, "probe")
        try:
            p.mkdir()
            p.rmdir()
        except OSError as exc:
            raise OutputError(f"{parent}: cannot create a folder there ({exc.strerror})") from None


def publish_directory(tmp: Path, target: Path, overwrite: bool, check=None, _fault=None) -> None:
    """Move a fully written and synced ``tmp`` folder to ``target`` in one step.

    A new target appears by one ``rename``. An existing one is swapped with
    ``renameat2(RENAME_EXCHANGE)`` so at every instant ``target`` holds either the
    old or the new folder; the old one is then removed. ``check()`` runs first
    (the target is checked again just before the move).
    """
    if check is not None:
        check()
    if target.exists():
        if _rename_exchange(tmp, target):
            fsync_path(target.parent)
            if _fault:
                _fault("after exchange")
            shutil.rmtree(tmp, ignore_errors=True)  # tmp now holds the old folder
            return
        old = temp_sibling(target, "old")  # fallback: two renames (brief window without the folder)
        os.rename(target, old)
        try:
            os.rename(tmp, target)
        except BaseException:
            os.rename(old, target)  # put the previous folder back
            raise
        fsync_path(target.parent)
        shutil.rmtree(old, ignore_errors=True)
        return
    os.rename(tmp, target)
    fsync_path(target.parent)


def write_folder(target, fill, *, overwrite: bool, check, what: str, own_files=None) -> Path:
    """Write a whole output folder atomically.

    ``fill(tmp)`` writes the contents into a fresh hidden folder beside
    ``target``; every file in it and the folder are then synced and the folder
    is published by :func:`publish_directory` (``check()`` is run before the work
    and again before the move). Whatever fails, the temporary folder is removed.
    With ``own_files`` (the names this writer writes), abandoned temporary
    siblings holding only such files are removed first (:func:`remove_abandoned`).

    Raises
    ------
    OutputError
        ``check`` refuses the target, or the disk refuses a write (``what`` names the output).
    """
    target = Path(target).absolute()
    check()
    remove_stale_temp_siblings(target)  # partial folders of a writer that was killed
    if own_files is not None:
        remove_abandoned(target, own_files)
    tmp = temp_sibling(target, "tmp")
    try:
        tmp.mkdir()
        fill(tmp)
        for f in tmp.iterdir():
            fsync_path(f)
        fsync_path(tmp)
        publish_directory(tmp, target, overwrite, check)
    except OSError as exc:
        raise OutputError(f"{target}: cannot write the {what} ({exc.strerror or exc})") from None
    finally:
        if tmp.exists():
            shutil.rmtree(tmp, ignore_errors=True)
    return target


def write_file(out, write, *, overwrite: bool, what: str) -> Path:
    """Write one output file atomically: ``write(tmp)`` beside it, sync, then move into place.

    Without ``overwrite`` the file is linked into place, which fails if it appeared
    meanwhile: an existing file is never replaced silently.

    Raises
    ------
    OutputError
        ``out`` exists (and ``overwrite`` is false), is a folder, or its folder is missing or not writable.
    """
    out = Path(out).absolute()
    if out.is_dir():
        raise OutputError(f"{out}: output path is a folder")
    if (out.exists() or out.is_symlink()) and not overwrite:
        raise OutputError(f"{out}: output file already exists (use --overwrite to replace it)")
    if not out.parent.is_dir():
        raise OutputError(f"{out.parent}: folder of the output does not exist")
    if not os.access(out.parent, os.W_OK | os.X_OK):
        raise OutputError(f"{out.parent}: output folder is not writable")
    tmp = temp_sibling(out, "tmp")
    try:
        write(tmp)
        fsync_path(tmp)
        if overwrite:
            os.replace(tmp, out)
        else:
            os.link(tmp, out)
        fsync_path(out.parent)
    except FileExistsError:
        raise OutputError(f"{out}: output file already exists (use --overwrite to replace it)") from None
    except OSError as exc:
        raise OutputError(f"{out}: cannot write the {what} ({exc.strerror})") from None
    finally:
        if tmp.exists():
            tmp.unlink()
    return out
