"""Bundle file helpers: SHA-256 digests, the canonical manifest JSON, the bundle target check."""

from __future__ import annotations

import hashlib
import json
import os
from pathlib import Path

from ..errors import OutputError
from ..outputs import check_folder_target

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


def check_outside_inputs(target: Path, inputs, what: str = "output") -> None:
    """Refuse an output folder that would swallow an input, or that is an input's own folder.

    Writing a new bundle folder beside its inputs (``contacts.csv``, ``people.csv``,
    ``release-2026/``) is the common layout and is allowed. Refused: an input file
    inside the output folder (it would be published with the bundle, or deleted by
    ``--overwrite``), and the output being the very folder that holds an input.

    Raises
    ------
    OutputError
    """
    out = Path(target).absolute().resolve()
    for inp in inputs:
        if inp is None or not isinstance(inp, (str, os.PathLike)):
            continue
        path = Path(inp).absolute().resolve()
        if out == path.parent:
            raise OutputError(f"{Path(target)}: the {what} folder would be the folder of input {Path(inp)}; "
                              "choose a new folder (beside the inputs is fine)")
        if out in path.parents:
            raise OutputError(f"{Path(target)}: input {Path(inp)} lies inside the {what} folder; it would be "
                              "published with it or deleted by --overwrite. Choose a folder that holds no input")


def _is_bundle(target: Path) -> bool:
    return (target / MANIFEST).exists()


def prepare_target(target: Path, overwrite: bool) -> None:
    """Refuse an output path that exists (unless ``overwrite`` and it is a bundle), is a file, or sits in a
    missing or read-only folder."""
    check_folder_target(Path(target), overwrite, kind="a bundle", is_kind=_is_bundle, probe=True)
