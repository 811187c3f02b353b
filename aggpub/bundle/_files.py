"""Low-level file helpers: SHA-256, fsync, atomic directory publication."""

from __future__ import annotations

import ctypes
import ctypes.util
import hashlib
import json
import os
import re
import secrets
import shutil
from pathlib import Path

from ..errors import OutputError

MANIFEST = "manifest.json"


def sha256_file(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def canonical_json(obj) -> bytes:
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), ensure_ascii=False).encode("utf-8")


def manifest_digest(manifest: dict) -> str:
    """SHA-256 of the manifest's canonical JSON without its own ``manifest_sha256`` field."""
    body = {k: v for k, v in manifest.items() if k != "manifest_sha256"}
    return hashlib.sha256(canonical_json(body)).hexdigest()


def fsync_path(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def temp_sibling(target: Path, tag: str) -> Path:
    """A hidden sibling ``.NAME.TAG-PID-RANDOM`` of ``target`` (the writer's process id lets a later
    release tell an abandoned folder from one being written)."""
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

    Only ``tmp`` folders (never-published, partial writes) and empty ``probe`` folders of the
    writability test are removed; an ``old``
    folder can hold a previous bundle and is left for a person to decide.
    """
    removed = []
    for p in stale_temp_siblings(target, ("tmp", "probe")):
        shutil.rmtree(p, ignore_errors=True)
        if not p.exists():
            removed.append(p)
    return removed


def check_outside_inputs(target: Path, inputs) -> None:
    """Refuse an output folder inside (or equal to) the folder of any input file.

    Raises
    ------
    OutputError
        ``target`` lies in an input file's folder.
    """
    out = Path(target).absolute().resolve()
    for inp in inputs:
        if inp is None or not isinstance(inp, (str, os.PathLike)):
            continue
        folder = Path(inp).absolute().resolve().parent
        if out == folder or folder in out.parents:
            raise OutputError(f"{Path(target)}: output would land inside the folder of input {Path(inp)}; "
                              "choose a folder outside it (or pass --allow-inside-input)")


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


def prepare_target(target: Path, overwrite: bool) -> None:
    """Refuse an output path that exists (unless ``overwrite``), is a file, or sits in a missing folder."""
    if target.exists() or target.is_symlink():
        if not target.is_dir():
            raise OutputError(f"{target}: output path exists and is not a folder")
        if not overwrite:
            raise OutputError(f"{target}: output folder already exists (use --overwrite to replace it)")
        if not (target / MANIFEST).exists() and any(target.iterdir()):
            raise OutputError(f"{target}: refusing to replace a non-empty folder that is not a bundle")
    parent = target.parent
    if not parent.exists():
        raise OutputError(f"{parent}: parent folder of the output does not exist")
    if not parent.is_dir():
        raise OutputError(f"{parent}: parent of the output is not a folder")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise OutputError(f"{parent}: output folder is not writable")
    probe = temp_sibling(target, "probe")  # os.access says yes to root even on read-only file systems
    try:
        probe.mkdir()
        probe.rmdir()
    except OSError as exc:
        raise OutputError(f"{parent}: cannot create a folder there ({exc.strerror})") from None


def publish_directory(tmp: Path, target: Path, overwrite: bool, _fault=None) -> None:
    """Move a fully written and synced ``tmp`` folder to ``target`` in one step.

    A new target appears by one ``rename``. An existing bundle is swapped with
    ``renameat2(RENAME_EXCHANGE)`` so at every instant ``target`` holds either the
    old or the new bundle; the old one is then removed.
    """
    prepare_target(target, overwrite)
    if target.exists():
        if _rename_exchange(tmp, target):
            fsync_path(target.parent)
            if _fault:
                _fault("after exchange")
            shutil.rmtree(tmp, ignore_errors=True)  # tmp now holds the old bundle
            return
        old = temp_sibling(target, "old")  # fallback: two renames (brief window without a bundle)
        os.rename(target, old)
        try:
            os.rename(tmp, target)
        except BaseException:
            os.rename(old, target)  # put the previous bundle back
            raise
        fsync_path(target.parent)
        shutil.rmtree(old, ignore_errors=True)
        return
    os.rename(tmp, target)
    fsync_path(target.parent)
