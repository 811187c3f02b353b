"""Low-level file helpers: SHA-256, fsync, atomic directory publication."""

from __future__ import annotations

import ctypes
import ctypes.util
import hashlib
import json
import os
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
    return target.parent / f".{target.name}.{tag}-{secrets.token_hex(4)}"


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
    if not os.access(parent, os.W_OK | os.X_OK):
        raise OutputError(f"{parent}: output folder is not writable")


def publish_directory(tmp: Path, target: Path, overwrite: bool) -> None:
    """Move a fully written and synced ``tmp`` folder to ``target`` in one step.

    A new target appears by one ``rename``. An existing bundle is swapped with
    ``renameat2(RENAME_EXCHANGE)`` so at every instant ``target`` holds either the
    old or the new bundle; the old one is then removed.
    """
    prepare_target(target, overwrite)
    if target.exists():
        if _rename_exchange(tmp, target):
            fsync_path(target.parent)
            shutil.rmtree(tmp, ignore_errors=True)  # tmp now holds the old bundle
            return
        old = temp_sibling(target, "old")  # fallback: two renames (brief window without a bundle)
        os.rename(target, old)
        os.rename(tmp, target)
        fsync_path(target.parent)
        shutil.rmtree(old, ignore_errors=True)
        return
    os.rename(tmp, target)
    fsync_path(target.parent)
