"""Write a release bundle atomically: temporary folder beside the target, fsync, rename."""

from __future__ import annotations

__all__ = ["write_bundle", "prepare_target", "check_outside_inputs"]

import json
import shutil
from pathlib import Path

import pyarrow.parquet as pq

from ..errors import OutputError
from ..outputs import fsync_path, publish_directory, remove_stale_temp_siblings, temp_sibling, write_synced
from ._files import MANIFEST, check_outside_inputs, manifest_digest, prepare_target, sha256_file

#: key of the privacy parameters in each Parquet file's key-value metadata
PARQUET_META_KEY = b"aggpub.privacy"


def write_bundle(target, tables: dict, manifest: dict, guide: str, overwrite: bool = False,
                 _fault=None) -> Path:
    """Write ``tables`` (name -> pyarrow.Table), the manifest and the reader's guide as a bundle.

    Parameters
    ----------
    target : str or Path
        The bundle folder to create.
    tables : dict
        File stem -> Arrow table; each becomes ``<stem>.parquet`` with page checksums
        and the privacy parameters in its key-value metadata.
    manifest : dict
        The manifest without ``files``; ``files`` (SHA-256 of every other file) and
        ``manifest_sha256`` are added here.
    guide : str
        Markdown text of the reader's guide (``README.md``).
    overwrite : bool
        Replace an existing bundle (atomically).
    _fault : callable, optional
        Test hook called with a stage name while writing (fault injection).

    Returns
    -------
    Path
        The published bundle folder.
    """
    target = Path(target).absolute()
    prepare_target(target, overwrite)
    remove_stale_temp_siblings(target)  # partial folders of a writer that was killed
    tmp = temp_sibling(target, "tmp")
    try:
        tmp.mkdir()
    except OSError as exc:
        raise OutputError(f"{target.parent}: cannot create a folder there ({exc.strerror})") from None
    try:
        privacy_meta = json.dumps({
            "privacy_unit": manifest.get("privacy_unit"),
            "epsilon_total": manifest.get("epsilon_total"),
            "min_size": manifest.get("min_size"),
            "seeded": manifest.get("seeded"),
            "components": manifest.get("components"),
            "bundle_format": manifest.get("format"),
        }, sort_keys=True).encode()
        files = {}

        def write_one(stem, table):
            """One table written, synced and digested (Arrow and hashlib release the GIL: two at once)."""
            name = f"{stem}.parquet"
            meta = dict(table.schema.metadata or {})
            meta[PARQUET_META_KEY] = privacy_meta
            path = tmp / name
            pq.write_table(table.replace_schema_metadata(meta), path, write_page_checksum=True, compression="zstd")
            fsync_path(path)
            return name, sha256_file(path)

        from concurrent.futures import ThreadPoolExecutor

        # every file is the same bytes whatever the order; the digests are recorded in the tables' order
        with ThreadPoolExecutor(max_workers=2, thread_name_prefix="aggpub-bundle") as pool:
            written = [pool.submit(write_one, stem, table) for stem, table in tables.items()]
            for job in written:
                name, digest = job.result()
                if _fault:
                    _fault(f"wrote {name}")
                files[name] = digest
        write_synced(tmp / "README.md", guide)
        files["README.md"] = sha256_file(tmp / "README.md")
        manifest = dict(manifest)
        manifest["files"] = dict(sorted(files.items()))
        manifest["manifest_sha256"] = manifest_digest(manifest)
        write_synced(tmp / MANIFEST, json.dumps(manifest, indent=2, sort_keys=True) + "\n")
        fsync_path(tmp)
        if _fault:
            _fault("before publish")
        publish_directory(tmp, target, overwrite, check=lambda: prepare_target(target, overwrite), _fault=_fault)
    except BaseException as exc:
        shutil.rmtree(tmp, ignore_errors=True)
        if isinstance(exc, OSError):
            raise OutputError(f"{target}: cannot write bundle ({exc.strerror or exc})") from None
        raise
    return target
