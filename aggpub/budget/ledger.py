"""The lifetime ledger: a persistent, tamper-evident record of every epsilon spent on a dataset.

Repeated releases of the same people add up (sequential composition), so each
dataset carries a lifetime cap on its total epsilon. The ledger is one SQLite
file (Python standard library ``sqlite3``) holding one row per release.

Guarantees
----------
* **Check and charge are one transaction.** :meth:`Ledger.charge` opens a
  ``BEGIN IMMEDIATE`` transaction (SQLite's write lock, taken before reading),
  verifies the file, sums what the dataset has spent, refuses with
  :class:`~aggpub.errors.BudgetError` when the new spend would pass the cap,
  and otherwise appends the spend with status ``charged`` and commits. Two
  processes racing on one ledger are serialised by that lock, so they cannot
  both slip under the cap.
* **Charged before noise, kept whatever happens.** The release pipeline charges
  the ledger before the first random number is drawn. Afterwards the row is
  marked ``published`` or ``failed``, but every row counts towards the cap
  whatever its status: a crash after the noise was drawn (when the noisy
  values may already have leaked to a log, a core file or a half-written
  folder) still costs its epsilon.
* **A damaged ledger is refused, never reset.** The file must be a SQLite
  database that passes ``PRAGMA integrity_check``, with the expected tables,
  columns, application tag and schema version. A missing file is created
  (atomically, so two first releases cannot each create their own); an empty
  or foreign file is an error.
* **Tamper evidence.** Each spend row stores ``row_sha256 = SHA-256(prev_sha256
  || canonical JSON of the row's chained fields)``, a hash chain starting from
  a per-ledger random genesis value; the ``meta`` table stores the number of
  rows and the head of the chain, updated in the same transaction as each
  charge. Editing a charged epsilon, deleting or reordering rows, or dropping
  the last row without also rewriting the chain and the head breaks the check.
  The chain detects accidental damage and naive edits; it is not a signature:
  a person who can write the file and recomputes every hash can rewrite
  history. Each bundle's manifest therefore records the chain head after its
  own charge (``ledger.row_sha256``), so published bundles can be compared
  with the ledger by an auditor who keeps them.
* The ``status`` column is outside the chain (it is updated once, from
  ``charged`` to ``published`` or ``failed``); only those three values are
  accepted, and since every status counts the same, changing it cannot free
  budget.
* **Renaming a dataset does not reset its budget.** A release attaches a keyed
  fingerprint of its people (:meth:`Ledger.fingerprint`) to its charge. A
  charge whose fingerprint is already recorded under *another* dataset id,
  while the charged dataset has no row with that fingerprint yet, is refused
  with :class:`~aggpub.errors.BudgetError` naming the other id(s), unless the
  steward declares a new dataset about the same people (``new_dataset=True``,
  ``--new-dataset`` on the command line; for example a new survey wave); the
  declaration is recorded in the row (``declared_new``, chained). Repeated
  releases under the same id with the same people are the normal case. Once
  a dataset id holds a row with a fingerprint, further charges of that id
  with it need no declaration, whatever other ids share it.

Schema versions
---------------
Version 2 (this code) adds four columns to ``spends``, after ``status``:
``row_version`` (1 or 2), ``privacy_unit`` (the policy's ``privacy.unit``),
``input_fingerprint`` (64 hex digits, or empty) and ``declared_new`` (0 or
1); and two ``meta`` keys: ``fingerprint_key`` (the per-ledger secret, 64 hex
digits) and ``v1_spends`` (how many rows were written under version 1).

The chained fields are fixed per row, by the row's ``row_version``:

* version-1 rows: ``id, dataset, epsilon, lifetime_epsilon, components,
  created_utc, bundle_path, tool_version, policy_title`` -- exactly what the
  version-1 code hashed, so their digests keep verifying unchanged;
* version-2 rows: the same nine, then ``row_version, privacy_unit,
  input_fingerprint, declared_new``.

Changing a row's ``row_version`` changes which fields are hashed, so it breaks
the chain in either direction. A version-1 row must hold the defaults of the
new columns (``''``, ``''``, ``0``), which are not hashed for it, so they are
checked instead; version-1 rows can only precede version-2 rows, and their
number must equal ``meta.v1_spends``.

**Upgrade.** A version-1 ledger (written by earlier aggpub) is read as it is:
listing, :meth:`Ledger.spends` and :meth:`Ledger.check` never write. The first
:meth:`Ledger.charge` (or :meth:`Ledger.fingerprint`, which needs the key, or
:meth:`Ledger.upgrade`) upgrades it in place, inside the ``BEGIN IMMEDIATE``
transaction that first verifies it: ``ALTER TABLE ... ADD COLUMN`` for the four
columns (existing rows keep their bytes and digests, and read as version-1
rows), the new ``meta`` keys, ``upgraded_utc``, then ``schema_version = '2'``,
and the file is verified again before the commit. :meth:`Ledger.charge`
upgrades inside its own charging transaction, so a refused charge leaves a
version-1 file as it was. A damaged or
tampered version-1 ledger fails the first verification and is refused
unchanged. Earlier aggpub refuses a version-2 file (its schema version check),
so it cannot append version-1 rows after the upgrade.

Input fingerprint
-----------------
``HMAC-SHA256(key, canonical form)`` (Bellare, Canetti, Krawczyk 1996) of the
*set* of person ids, under the per-ledger ``fingerprint_key`` (32 bytes from
:mod:`secrets`, created with the ledger or at its upgrade, stored only in the
ledger's ``meta`` table). Canonical form: the ids sorted by
:func:`pyarrow.compute.sort_indices` (byte order of their UTF-8 encoding),
repeated ids dropped; then the domain tag ``b"aggpub person-id set 1\\0"``,
the number of ids ``n`` (unsigned 64-bit little-endian), the ``n`` byte
lengths of the ids (the same encoding) and the concatenated UTF-8 bytes of the
ids. The lengths table makes the split unambiguous (no separator can occur
inside an id because none is used). The hash is fed from the Arrow buffers in
chunks, with no Python loop over ids. The fingerprint is stored only in the
ledger row; it is not part of :meth:`Charge.as_dict` (the manifest's record),
of any message or of the listing. With the key, anyone holding the ledger can
test a guessed *complete* list of ids against it, but not whether one person
is in it; without the key (for instance from a copy of the fingerprint alone)
not even that.

The check only sees identical sets: a renamed dataset with one person added
or removed has another fingerprint and is not caught; keeping the dataset id
stable remains the steward's duty (see ``docs/privacy.md``).

Floating point: spends are summed with :func:`math.fsum`; a spend is refused
when ``spent + epsilon > cap * (1 + 1e-12)``, the small relative allowance only
absorbing the rounding of decimal epsilons such as ``0.1`` (common practice).

References
----------
C. Dwork, A. Roth, "The Algorithmic Foundations of Differential Privacy",
Foundations and Trends in Theoretical Computer Science 9(3-4), 2014
(Theorem 3.14, sequential composition).
R. C. Merkle, "A digital signature based on a conventional encryption
function", CRYPTO 1987 (hash chaining; citation recalled from memory).
M. Bellare, R. Canetti, H. Krawczyk, "Keying Hash Functions for Message
Authentication", CRYPTO 1996; H. Krawczyk, M. Bellare, R. Canetti, "HMAC:
Keyed-Hashing for Message Authentication", RFC 2104, 1997 (HMAC).
NIST, "Secure Hash Standard (SHS)", FIPS 180-4, 2015 (SHA-256).
"""

from __future__ import annotations

__all__ = ["Ledger", "LedgerSpend", "Charge", "ChargeOnFirstDraw", "ReleaseLedger", "LEDGER_SCHEMA_VERSION",
           "STATUSES"]

import hashlib
import hmac
import json
import math
import os
import re
import secrets
import sqlite3
import struct
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path

from ..errors import BudgetError, InputError
from ..noise.sampler import RandomSource

#: Version of the table layout written by this code. Version 1 is read and upgraded; any other is refused.
LEDGER_SCHEMA_VERSION = "2"
#: Schema versions this code reads.
_READABLE_VERSIONS = ("1", "2")
#: The ``application`` value in the ``meta`` table: tells our ledger from any other SQLite file.
LEDGER_APPLICATION = "aggpub lifetime ledger"
#: Allowed values of the ``status`` column.
STATUSES = ("charged", "published", "failed")

_SQLITE_MAGIC = b"SQLite format 3\x00"
_RELATIVE_SLACK = 1e-12
_BUSY_TIMEOUT_S = 60.0
_HEX64 = re.compile(r"[0-9a-f]{64}")

#: The columns of schema version 1, in table order.
_V1_COLUMNS = ("id", "dataset", "epsilon", "lifetime_epsilon", "components", "created_utc", "bundle_path",
               "tool_version", "policy_title", "prev_sha256", "row_sha256", "status")
#: Columns added by schema version 2 (appended, so an upgraded table and a new one have the same order),
#: with their SQL definitions. The defaults are what version-1 rows read after the upgrade.
_V2_ADDED = (("row_version", "INTEGER NOT NULL DEFAULT 1 CHECK (row_version IN (1, 2))"),
             ("privacy_unit", "TEXT NOT NULL DEFAULT ''"),
             ("input_fingerprint", "TEXT NOT NULL DEFAULT ''"),
             ("declared_new", "INTEGER NOT NULL DEFAULT 0 CHECK (declared_new IN (0, 1))"))
_SPEND_COLUMNS = _V1_COLUMNS + tuple(name for name, _ in _V2_ADDED)
_COLUMNS_BY_VERSION = {"1": _V1_COLUMNS, "2": _SPEND_COLUMNS}
#: Columns covered by the hash chain, in the order they are hashed, by the row's ``row_version``.
_CHAINED = {1: ("id", "dataset", "epsilon", "lifetime_epsilon", "components", "created_utc", "bundle_path",
                "tool_version", "policy_title")}
_CHAINED[2] = _CHAINED[1] + ("row_version", "privacy_unit", "input_fingerprint", "declared_new")
#: What a version-1 row holds in the columns added by version 2 (not hashed for it, so checked).
_V1_ROW_DEFAULTS = {"privacy_unit": "", "input_fingerprint": "", "declared_new": 0}

_SCHEMA = f"""
CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE spends (
    id INTEGER PRIMARY KEY,
    dataset TEXT NOT NULL,
    epsilon REAL NOT NULL CHECK (epsilon > 0),
    lifetime_epsilon REAL NOT NULL CHECK (lifetime_epsilon > 0),
    components TEXT NOT NULL,
    created_utc TEXT NOT NULL,
    bundle_path TEXT NOT NULL,
    tool_version TEXT NOT NULL,
    policy_title TEXT NOT NULL,
    prev_sha256 TEXT NOT NULL,
    row_sha256 TEXT NOT NULL,
    status TEXT NOT NULL CHECK (status IN {STATUSES!r}),
    {(',' + chr(10) + '    ').join(f'{name} {sql}' for name, sql in _V2_ADDED)}
);
"""

#: Domain tag at the start of the fingerprinted bytes (versions the canonical form).
_FP_DOMAIN = b"aggpub person-id set 1\x00"
#: Ids (lengths table) and bytes (values) fed to the HMAC per update: bounds the temporary copies.
_FP_IDS_PER_CHUNK = 1 << 20
_FP_BYTES_PER_CHUNK = 1 << 24


@dataclass(frozen=True)
class LedgerSpend:
    """One row of the ledger.

    ``row_version`` is 1 for rows written by a version-1 ledger (their
    ``privacy_unit`` and ``input_fingerprint`` are empty and ``declared_new``
    is False: not recorded then). ``input_fingerprint`` is left out of the
    ``repr`` so that it does not end up in a log by accident.
    """

    id: int
    dataset: str
    epsilon: float
    lifetime_epsilon: float
    components: dict
    created_utc: str
    bundle_path: str
    tool_version: str
    policy_title: str
    prev_sha256: str
    row_sha256: str
    status: str
    row_version: int = 1
    privacy_unit: str = ""
    input_fingerprint: str = field(default="", repr=False)
    declared_new: bool = False


@dataclass(frozen=True)
class Charge:
    """What :meth:`Ledger.charge` committed (holds no fingerprint and no path)."""

    id: int
    dataset: str
    epsilon: float
    lifetime_epsilon: float
    spent_after: float
    row_sha256: str
    privacy_unit: str = ""
    declared_new: bool = False

    @property
    def remaining(self) -> float:
        return max(0.0, self.lifetime_epsilon - self.spent_after)

    def as_dict(self) -> dict:
        """The manifest's ``ledger`` record (no fingerprint, no path)."""
        return {"dataset": self.dataset, "spend_id": self.id, "epsilon": self.epsilon,
                "lifetime_epsilon": self.lifetime_epsilon, "spent_after": self.spent_after,
                "row_sha256": self.row_sha256, "privacy_unit": self.privacy_unit}


def _utc_now() -> str:
    return datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def _row_digest(prev: str, fields: dict, row_version: int = 1) -> str:
    body = json.dumps([fields[c] for c in _CHAINED[row_version]], separators=(",", ":"), ensure_ascii=False,
                      allow_nan=False)
    return hashlib.sha256(prev.encode("ascii") + b"\n" + body.encode("utf-8")).hexdigest()


def _fits(spent: float, epsilon: float, cap: float) -> bool:
    return spent + epsilon <= cap * (1.0 + _RELATIVE_SLACK)


def _canonical_ids(ids):
    """The sorted distinct ids as a ``large_string`` array (offset 0), for :func:`_keyed_fingerprint`."""
    import pyarrow as pa
    import pyarrow.compute as pc

    if isinstance(ids, pa.ChunkedArray):
        if pa.types.is_dictionary(ids.type):
            ids = ids.cast(ids.type.value_type)
        ids = ids.cast(pa.large_string()) if pa.types.is_string(ids.type) else ids
        ids = ids.combine_chunks()
    if not isinstance(ids, pa.Array):
        raise TypeError(f"person ids must be a pyarrow Array of strings, got {type(ids).__name__}")
    if pa.types.is_dictionary(ids.type):
        ids = ids.dictionary_decode()
    if not (pa.types.is_string(ids.type) or pa.types.is_large_string(ids.type)
            or getattr(pa.types, "is_string_view", lambda t: False)(ids.type)):
        raise TypeError(f"person ids must be strings, got an array of {ids.type}")
    if len(ids) == 0:
        raise ValueError("no person ids to fingerprint")
    if ids.null_count:
        raise ValueError(f"{ids.null_count:,} person id(s) are missing (null); they cannot be fingerprinted")
    ids = ids.cast(pa.large_string())  # 64-bit offsets: no overflow past 2 GiB of ids
    ids = ids.take(pc.sort_indices(ids))
    if len(ids) > 1:
        keep = pc.not_equal(ids.slice(1), ids.slice(0, len(ids) - 1))
        if keep.false_count:
            ids = ids.filter(pa.concat_arrays([pa.array([True]), keep]))
    return ids


def _keyed_fingerprint(key: bytes, ids) -> str:
    """HMAC-SHA256 under ``key`` of the canonical form of the id set (module docstring)."""
    import numpy as np

    ids = _canonical_ids(ids)
    n = len(ids)
    _, offsets_buf, data_buf = ids.buffers()
    offsets = np.frombuffer(offsets_buf, dtype="<i8", count=n + 1, offset=ids.offset * 8)
    mac = hmac.new(key, digestmod=hashlib.sha256)
    mac.update(_FP_DOMAIN)
    mac.update(struct.pack("<Q", n))
    for start in range(0, n, _FP_IDS_PER_CHUNK):  # a loop over chunks of a million ids, not over ids
        mac.update(np.diff(offsets[start:start + _FP_IDS_PER_CHUNK + 1]).astype("<u8").tobytes())
    lo, hi = int(offsets[0]), int(offsets[n])
    if hi > lo:
        data = memoryview(data_buf)
        for start in range(lo, hi, _FP_BYTES_PER_CHUNK):
            mac.update(data[start:min(hi, start + _FP_BYTES_PER_CHUNK)])
    return mac.hexdigest()


class Ledger:
    """A lifetime ledger file.

    Parameters
    ----------
    path : str or Path
        The SQLite file. Created (empty ledger, schema version 2) if it does
        not exist; any existing file must be a valid, untampered ledger of
        schema version 1 or 2 (version 1 is upgraded by the next charge).
    create : bool, default True
        ``False`` refuses a missing file (used by the read-only listing).

    Raises
    ------
    InputError
        The file is missing (with ``create=False``), not a SQLite file, fails
        the integrity check, has the wrong tables or schema version, or its
        hash chain does not verify.
    """

    def __init__(self, path, *, create: bool = True):
        self.path = Path(path).absolute()
        self._version = None
        if not self.path.exists():
            if not create:
                raise InputError(f"{self.path}: ledger file not found")
            self._create()
        with self._connect() as con:
            con.execute("BEGIN")
            try:
                self._verify(con)
            finally:
                con.execute("ROLLBACK")

    @property
    def schema_version(self) -> str:
        """The schema version found by the last verification (``"1"`` until a charge upgrades the file)."""
        return self._version

    # ------------------------------------------------------------------ file
    def _create(self) -> None:
        """Create an empty ledger atomically (no clobbering of a concurrent creation)."""
        parent = self.path.parent
        if not parent.is_dir():
            raise InputError(f"{self.path}: the ledger's folder {parent} does not exist")
        tmp = parent / f".{self.path.name}.new-{secrets.token_hex(4)}"
        try:
            con = sqlite3.connect(tmp, isolation_level=None)
            try:
                con.executescript(_SCHEMA)
                con.execute("BEGIN IMMEDIATE")
                genesis = secrets.token_hex(32)
                con.executemany("INSERT INTO meta(key, value) VALUES (?, ?)", [
                    ("application", LEDGER_APPLICATION), ("schema_version", LEDGER_SCHEMA_VERSION),
                    ("created_utc", _utc_now()), ("genesis_sha256", genesis), ("head_sha256", genesis),
                    ("n_spends", "0"), ("fingerprint_key", secrets.token_hex(32)), ("v1_spends", "0")])
                con.execute("COMMIT")
            finally:
                con.close()
            fd = os.open(tmp, os.O_RDONLY)
            try:
                os.fsync(fd)
            finally:
                os.close(fd)
            try:
                os.link(tmp, self.path)  # fails if another process created the ledger first
            except FileExistsError:
                pass
            dfd = os.open(parent, os.O_RDONLY)
            try:
                os.fsync(dfd)
            finally:
                os.close(dfd)
        except OSError as exc:
            raise InputError(f"{self.path}: cannot create the ledger ({exc.strerror or exc})") from None
        finally:
            try:
                tmp.unlink()
            except FileNotFoundError:
                pass

    def _connect(self) -> sqlite3.Connection:
        try:
            with open(self.path, "rb") as fh:
                head = fh.read(len(_SQLITE_MAGIC))
        except OSError as exc:
            raise InputError(f"{self.path}: cannot read the ledger ({exc.strerror or exc})") from None
        if head != _SQLITE_MAGIC:
            what = "empty" if not head else "not a SQLite file"
            raise InputError(f"{self.path}: damaged ledger ({what}); refusing to use it. A ledger is never "
                             "reset automatically: restore it from a backup or ask the data steward")
        try:
            uri = "file:" + self.path.as_posix().replace("?", "%3f").replace("#", "%23") + "?mode=rw"
            con = sqlite3.connect(uri, uri=True, timeout=_BUSY_TIMEOUT_S, isolation_level=None)
        except sqlite3.Error as exc:
            raise InputError(f"{self.path}: cannot open the ledger ({exc})") from None
        try:
            con.execute("PRAGMA synchronous = FULL")  # a committed charge survives a power cut
        except sqlite3.DatabaseError as exc:
            con.close()
            raise self._damaged(f"SQLite error: {exc}") from None
        return _Closing(con)

    def _damaged(self, why: str) -> InputError:
        return InputError(f"{self.path}: damaged ledger ({why}); refusing to use it. A ledger is never reset "
                          "automatically: restore it from a backup or ask the data steward")

    def _read_meta(self, con) -> dict:
        try:
            return dict(con.execute("SELECT key, value FROM meta").fetchall())
        except sqlite3.DatabaseError as exc:
            raise self._damaged(f"SQLite error: {exc}") from None

    def _verify(self, con) -> list[LedgerSpend]:
        """Check structure, integrity and the hash chain; return all rows. Call inside a transaction.

        Sets :attr:`schema_version` to the version found (``"1"`` or ``"2"``).
        """
        try:
            result = [r[0] for r in con.execute("PRAGMA integrity_check").fetchall()]
            if result != ["ok"]:
                raise self._damaged(f"integrity check failed: {result[0][:120]}")
            tables = {r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type = 'table'").fetchall()}
            for t in ("meta", "spends"):
                if t not in tables:
                    raise self._damaged(f"table '{t}' is missing")
            cols = tuple(r[1] for r in con.execute("PRAGMA table_info(spends)").fetchall())
            meta = dict(con.execute("SELECT key, value FROM meta").fetchall())
        except sqlite3.DatabaseError as exc:
            raise self._damaged(f"SQLite error: {exc}") from None
        if meta.get("application") != LEDGER_APPLICATION:
            raise self._damaged("not an aggpub ledger (meta 'application' is missing or different)")
        version = meta.get("schema_version")
        if version not in _READABLE_VERSIONS:
            raise self._damaged(f"schema version {version!r}, this version reads "
                                f"{' and '.join(repr(v) for v in _READABLE_VERSIONS)}")
        columns = _COLUMNS_BY_VERSION[version]
        if cols != columns:
            raise self._damaged(f"table 'spends' does not have the expected columns of schema version {version}")
        keys = ("genesis_sha256", "head_sha256", "n_spends") + (("fingerprint_key", "v1_spends")
                                                                if version == "2" else ())
        for key in keys:
            if key not in meta:
                raise self._damaged(f"meta '{key}' is missing")
        if version == "2" and not _HEX64.fullmatch(meta["fingerprint_key"]):
            raise self._damaged("meta 'fingerprint_key' is not 64 hex digits")
        try:
            rows = con.execute(f"SELECT {', '.join(columns)} FROM spends ORDER BY id").fetchall()
        except sqlite3.DatabaseError as exc:
            raise self._damaged(f"SQLite error: {exc}") from None
        prev = meta["genesis_sha256"]
        spends = []
        n_v1 = 0
        for expected_id, row in enumerate(rows, start=1):
            rec = dict(zip(columns, row))
            rid = rec["id"]
            if rid != expected_id:
                raise self._damaged(f"spend rows are not numbered 1..n (row {expected_id} has id {rid}): "
                                    "a row was deleted")
            if rec["prev_sha256"] != prev:
                raise self._damaged(f"hash chain broken at spend {rid}: a row before it was edited or deleted")
            row_version = rec.setdefault("row_version", 1)
            if type(row_version) is not int or row_version not in _CHAINED:
                raise self._damaged(f"spend {rid} has an unknown row version")
            if row_version == 1:
                n_v1 += 1
                if n_v1 != rid:
                    raise self._damaged(f"spend {rid} is a version-1 row after a version-2 row")
                for col, default in _V1_ROW_DEFAULTS.items():
                    if rec.setdefault(col, default) != default or type(rec[col]) is not type(default):
                        raise self._damaged(f"spend {rid} is a version-1 row with a value in '{col}', which "
                                            "version 1 did not record")
            try:
                digest = _row_digest(prev, rec, row_version)
            except (TypeError, ValueError):
                raise self._damaged(f"spend {rid} holds a value of the wrong type") from None
            if digest != rec["row_sha256"]:
                raise self._damaged(f"hash chain broken at spend {rid}: the row was edited")
            if rec["status"] not in STATUSES:
                raise self._damaged(f"spend {rid} has an unknown status")
            if rec["declared_new"] not in (0, 1) or not isinstance(rec["privacy_unit"], str) \
                    or not isinstance(rec["input_fingerprint"], str):
                raise self._damaged(f"spend {rid} holds a value of the wrong type")
            try:
                components = json.loads(rec["components"])
            except (TypeError, ValueError):
                raise self._damaged(f"spend {rid}: unreadable components") from None
            rec["components"] = components
            rec["declared_new"] = bool(rec["declared_new"])
            spends.append(LedgerSpend(**rec))
            prev = digest
        if str(len(rows)) != meta["n_spends"] or prev != meta["head_sha256"]:
            raise self._damaged(f"the chain head does not match ({len(rows)} spend rows, meta says "
                                f"{meta['n_spends']}): rows were added or removed outside aggpub")
        if version == "2" and str(n_v1) != meta["v1_spends"]:
            raise self._damaged(f"{n_v1} version-1 row(s), meta 'v1_spends' says {meta['v1_spends']}")
        self._version = version
        return spends

    def _upgrade_in(self, con, rows: list[LedgerSpend]) -> list[LedgerSpend]:
        """Upgrade a verified version-1 ledger to version 2 inside the caller's write transaction."""
        try:
            for name, sql in _V2_ADDED:
                con.execute(f"ALTER TABLE spends ADD COLUMN {name} {sql}")
            con.executemany("INSERT INTO meta(key, value) VALUES (?, ?)", [
                ("fingerprint_key", secrets.token_hex(32)), ("v1_spends", str(len(rows))),
                ("upgraded_utc", _utc_now())])
            con.execute("UPDATE meta SET value = ? WHERE key = 'schema_version'", (LEDGER_SCHEMA_VERSION,))
        except sqlite3.DatabaseError as exc:
            raise self._damaged(f"upgrade to schema version {LEDGER_SCHEMA_VERSION} failed: {exc}") from None
        after = self._verify(con)  # the old rows must verify unchanged under the new layout
        if [(r.id, r.row_sha256) for r in after] != [(r.id, r.row_sha256) for r in rows]:
            raise self._damaged("the upgrade changed the rows")  # cannot happen: ADD COLUMN rewrites nothing
        return after

    def _write(self, con) -> None:
        try:
            con.execute("BEGIN IMMEDIATE")
        except sqlite3.OperationalError as exc:
            raise BudgetError(f"ledger {self.path}: could not lock the ledger ({exc}); "
                              "nothing was charged") from None

    def upgrade(self) -> bool:
        """Upgrade a version-1 ledger to version 2 in place (one transaction); False if already version 2.

        Existing rows keep their bytes and digests; a damaged ledger is
        refused (:class:`~aggpub.errors.InputError`) and left unchanged.
        """
        with self._connect() as con:
            self._write(con)
            try:
                rows = self._verify(con)
                done = self._version == "1"
                if done:
                    self._upgrade_in(con, rows)
                con.execute("COMMIT")
            except BaseException:
                if con.in_transaction:
                    con.execute("ROLLBACK")
                raise
        return done

    # -------------------------------------------------------------- queries
    def spends(self, dataset: str | None = None) -> list[LedgerSpend]:
        """Every spend (of ``dataset`` if given), oldest first, after verifying the file."""
        with self._connect() as con:
            con.execute("BEGIN")
            try:
                rows = self._verify(con)
            finally:
                con.execute("ROLLBACK")
        return [r for r in rows if dataset is None or r.dataset == dataset]

    def datasets(self) -> dict[str, tuple[float, float]]:
        """``{dataset: (spent, lifetime_epsilon)}`` for every dataset with a spend."""
        out: dict[str, list] = {}
        for r in self.spends():
            out.setdefault(r.dataset, [[], r.lifetime_epsilon])[0].append(r.epsilon)
        return {d: (math.fsum(e), cap) for d, (e, cap) in out.items()}

    def spent(self, dataset: str) -> float:
        """Total epsilon charged to ``dataset`` (every status counts)."""
        return math.fsum(r.epsilon for r in self.spends(dataset))

    def fingerprint(self, ids) -> str:
        """The keyed fingerprint of a set of person ids, for :meth:`charge`.

        Parameters
        ----------
        ids : pyarrow.Array or pyarrow.ChunkedArray of strings
            The person ids, in any order (repeats count once). Dictionary
            arrays are decoded first.

        Returns
        -------
        str
            64 hex digits: HMAC-SHA256 under this ledger's secret key of the
            canonical form of the id set (see the module docstring). Equal for
            the same set in any order, different (but for a 2^-256 chance)
            for another set or under another ledger's key. Keep it out of
            anything published: it is meant only for :meth:`charge`.

        Raises
        ------
        TypeError
            ``ids`` is not an Arrow array of strings.
        ValueError
            No ids, or a missing (null) id.

        Notes
        -----
        The key lives in the ledger, so on a version-1 ledger this first
        upgrades the file (:meth:`upgrade`).
        """
        key = self._fingerprint_key()
        return _keyed_fingerprint(key, ids)

    def _fingerprint_key(self) -> bytes:
        with self._connect() as con:
            con.execute("BEGIN")
            try:
                self._verify(con)
                meta = self._read_meta(con) if self._version == "2" else None
            finally:
                con.execute("ROLLBACK")
        if meta is None:  # version 1: the key is made by the upgrade
            self.upgrade()
            with self._connect() as con:
                con.execute("BEGIN")
                try:
                    self._verify(con)
                    meta = self._read_meta(con)
                finally:
                    con.execute("ROLLBACK")
        return bytes.fromhex(meta["fingerprint_key"])

    # ----------------------------------------------------------- the charge
    def check(self, dataset: str, lifetime_epsilon: float, epsilon: float) -> None:
        """Refuse early (read only) if ``epsilon`` cannot fit; :meth:`charge` decides for real."""
        rows = self.spends(dataset)
        self._check_fit(dataset, lifetime_epsilon, epsilon, rows)

    def _check_fit(self, dataset, lifetime_epsilon, epsilon, rows) -> float:
        caps = {r.lifetime_epsilon for r in rows}
        if caps and caps != {float(lifetime_epsilon)}:
            recorded = ", ".join(f"{c:g}" for c in sorted(caps))
            raise BudgetError(f"ledger {self.path}: dataset '{dataset}' was charged under lifetime epsilon "
                              f"{recorded}, the policy's 'ledger.lifetime_epsilon' says {lifetime_epsilon:g}; "
                              "a lifetime cap cannot be changed by editing the policy")
        spent = math.fsum(r.epsilon for r in rows)
        if not _fits(spent, epsilon, lifetime_epsilon):
            raise BudgetError(f"ledger {self.path}: dataset '{dataset}' has spent {spent:g} of its lifetime "
                              f"epsilon {lifetime_epsilon:g} in {len(rows)} release(s); this release needs "
                              f"{epsilon:g} but only {max(0.0, lifetime_epsilon - spent):g} is left. "
                              "Refused before any noise was drawn; nothing was published")
        return spent

    def _check_same_people(self, dataset: str, fingerprint: str, new_dataset: bool, rows) -> None:
        """Refuse the first charge of ``dataset`` with people already charged under another dataset id.

        The message names the other dataset ids (not private) and never the fingerprint.
        """
        if not fingerprint or new_dataset:
            return
        same = [r for r in rows if r.input_fingerprint == fingerprint]
        if not same or any(r.dataset == dataset for r in same):
            return  # new people, or this dataset id already holds them: a repeated release
        totals: dict[str, list] = {}
        for r in rows:
            if r.dataset in {s.dataset for s in same}:
                totals.setdefault(r.dataset, [[], r.lifetime_epsilon])[0].append(r.epsilon)
        named = "; ".join(f"'{d}' (spent {math.fsum(e):g} of lifetime epsilon {cap:g})"
                          for d, (e, cap) in sorted(totals.items()))
        raise BudgetError(
            f"ledger {self.path}: the people of this release were already charged under another dataset id: "
            f"{named}. Renaming a dataset does not reset its budget: release these people under "
            f"{'that id' if len(totals) == 1 else 'one of those ids'}. "
            f"If '{dataset}' really is a new dataset about the same people (for example a new survey wave), "
            "say so with --new-dataset (Python: new_dataset=True); the ledger records the declaration. "
            "Refused before any noise was drawn; nothing was published")

    def charge(self, dataset: str, lifetime_epsilon: float, epsilon: float, *, components=None,
               bundle_path="", tool_version="", policy_title="", privacy_unit="", fingerprint="",
               new_dataset=False) -> Charge:
        """Check the cap and record the spend, atomically (one ``BEGIN IMMEDIATE`` transaction).

        Parameters
        ----------
        dataset : str
            The dataset id (``ledger.dataset``).
        lifetime_epsilon : float
            The cap (``ledger.lifetime_epsilon``); must equal the cap of earlier charges.
        epsilon : float
            Total epsilon of this release.
        components : dict, optional
            Component name -> epsilon (stored as JSON).
        bundle_path, tool_version, policy_title : str
            Recorded with the spend.
        privacy_unit : str
            The policy's ``privacy.unit``, recorded (a dataset may be released
            under both units; each row says which).
        fingerprint : str
            :meth:`fingerprint` of the release's person ids, or empty (no
            check, nothing recorded). Recorded in the row only.
        new_dataset : bool, default False
            The steward's declaration that ``dataset`` is a new dataset about
            people already charged under another id; recorded (chained).

        Returns
        -------
        Charge

        Raises
        ------
        BudgetError
            The spend would pass the cap, the cap differs from the recorded
            one, or the people were charged under another dataset id and
            ``new_dataset`` is False.
        InputError
            The ledger is damaged.
        ValueError
            ``fingerprint`` is not 64 lowercase hex digits.

        Notes
        -----
        A version-1 ledger is upgraded to version 2 inside the same
        transaction; if the charge is refused, the upgrade is rolled back too.
        """
        dataset = str(dataset)
        epsilon = float(epsilon)
        lifetime_epsilon = float(lifetime_epsilon)
        fingerprint = str(fingerprint)
        new_dataset = bool(new_dataset)
        if not (math.isfinite(epsilon) and epsilon > 0):
            raise BudgetError(f"ledger {self.path}: a spend must be a finite epsilon > 0, got {epsilon!r}")
        if fingerprint and not _HEX64.fullmatch(fingerprint):
            raise ValueError("'fingerprint' must come from Ledger.fingerprint() (64 lowercase hex digits)")
        comp_json = json.dumps(components or {}, sort_keys=True, separators=(",", ":"), allow_nan=False)
        with self._connect() as con:
            self._write(con)
            try:
                rows = self._verify(con)
                if self._version == "1":
                    rows = self._upgrade_in(con, rows)
                mine = [r for r in rows if r.dataset == dataset]
                spent = self._check_fit(dataset, lifetime_epsilon, epsilon, mine)
                self._check_same_people(dataset, fingerprint, new_dataset, rows)
                prev = rows[-1].row_sha256 if rows else dict(con.execute(
                    "SELECT key, value FROM meta WHERE key = 'genesis_sha256'").fetchall())["genesis_sha256"]
                fields = {"id": len(rows) + 1, "dataset": dataset, "epsilon": epsilon,
                          "lifetime_epsilon": lifetime_epsilon, "components": comp_json,
                          "created_utc": _utc_now(), "bundle_path": str(bundle_path),
                          "tool_version": str(tool_version), "policy_title": str(policy_title),
                          "row_version": 2, "privacy_unit": str(privacy_unit), "input_fingerprint": fingerprint,
                          "declared_new": int(new_dataset)}
                digest = _row_digest(prev, fields, 2)
                columns = _CHAINED[1] + ("prev_sha256", "row_sha256", "status") + _CHAINED[2][len(_CHAINED[1]):]
                values = {**fields, "prev_sha256": prev, "row_sha256": digest, "status": "charged"}
                con.execute(f"INSERT INTO spends({', '.join(columns)}) VALUES ({', '.join('?' * len(columns))})",
                            [values[c] for c in columns])
                con.execute("UPDATE meta SET value = ? WHERE key = 'head_sha256'", (digest,))
                con.execute("UPDATE meta SET value = ? WHERE key = 'n_spends'", (str(fields["id"]),))
                con.execute("COMMIT")
            except BaseException:
                if con.in_transaction:
                    con.execute("ROLLBACK")
                raise
        return Charge(id=fields["id"], dataset=dataset, epsilon=epsilon, lifetime_epsilon=lifetime_epsilon,
                      spent_after=spent + epsilon, row_sha256=digest, privacy_unit=str(privacy_unit),
                      declared_new=new_dataset)

    def mark(self, spend_id: int, status: str) -> None:
        """Set the outcome of a charged spend (``published`` or ``failed``); the charge stays."""
        if status not in ("published", "failed"):
            raise ValueError(f"'status' must be 'published' or 'failed', got {status!r}")
        with self._connect() as con:
            con.execute("BEGIN IMMEDIATE")
            try:
                con.execute("UPDATE spends SET status = ? WHERE id = ? AND status = 'charged'",
                            (status, int(spend_id)))
                con.execute("COMMIT")
            except BaseException:
                if con.in_transaction:
                    con.execute("ROLLBACK")
                raise


class _Closing:
    """Context manager that closes a sqlite3 connection (its own ``with`` only commits)."""

    def __init__(self, con):
        self._con = con

    def __enter__(self):
        return self._con

    def __exit__(self, *exc):
        self._con.close()
        return False


class ChargeOnFirstDraw(RandomSource):
    """A random source that runs ``before_noise()`` once, before handing out its first random value.

    The release pipeline wraps its source in this, so the ledger is charged
    before any random number exists, wherever in the pipeline (grouping,
    sizes, counts) the first draw happens. If ``before_noise`` raises, no
    uniform is produced and the error propagates.

    Parameters
    ----------
    source : RandomSource
    before_noise : callable
        Called with no argument, at most once.
    """

    def __init__(self, source, before_noise):
        self._source = source
        self._before_noise = before_noise
        self._done = False

    @property
    def seeded(self) -> bool:
        return self._source.seeded

    @property
    def description(self) -> str:
        return self._source.description

    def _charge_once(self) -> None:
        if not self._done:
            self._before_noise()
            self._done = True

    def uniform(self, n: int):
        self._charge_once()
        return self._source.uniform(n)

    def random_bytes(self, n: int):
        """The wrapped source's own bytes (the exact sampler's input), after the charge."""
        self._charge_once()
        return self._source.random_bytes(n)

    def __repr__(self) -> str:
        return f"ChargeOnFirstDraw({self._source!r})"


class ReleaseLedger:
    """The ledger side of one release run: early check, input fingerprint, charge before noise, outcome.

    Parameters
    ----------
    policy : ReleasePolicy
        Must have a ``[ledger]`` section.
    bundle_path : str or Path
        Where the bundle will be written (recorded with the spend).
    new_dataset : bool, default False
        The steward declares that the policy's dataset id is a new dataset
        about people already charged under another id (``--new-dataset``);
        passed to :meth:`Ledger.charge`, which records it.

    Notes
    -----
    The release is charged its declared total ``privacy.epsilon`` (the
    components' shares add up to it, see :func:`aggpub.policy.epsilon_shares`),
    which is known from the policy before any noise is drawn. The pipeline
    calls :meth:`attach_input` after ingest, so the charge carries the keyed
    fingerprint of the people (kept in this object only until the charge, and
    never shown).
    """

    def __init__(self, policy, bundle_path, *, new_dataset: bool = False):
        from .._version import __version__
        from ..policy import epsilon_shares

        lp = policy.ledger
        self.ledger = Ledger(lp.path)
        self.dataset = lp.dataset
        self.lifetime_epsilon = float(lp.lifetime_epsilon)
        self.epsilon = float(policy.privacy.epsilon)
        self.components = epsilon_shares(policy)
        self.bundle_path = str(bundle_path)
        self.tool_version = __version__
        self.title = policy.title
        self.privacy_unit = str(policy.privacy.unit)
        self.new_dataset = bool(new_dataset)
        self._fingerprint = ""
        self.charged: Charge | None = None
        # Fail fast (read only) before the inputs are read; charge() decides under the lock.
        self.ledger.check(self.dataset, self.lifetime_epsilon, self.epsilon)

    @property
    def input_attached(self) -> bool:
        """Whether :meth:`attach_input` has run (the charge will check and record the people)."""
        return bool(self._fingerprint)

    def attach_input(self, ids) -> None:
        """Fingerprint the release's person ids (once) for the charge.

        Parameters
        ----------
        ids : pyarrow.Array of strings
            Every person id of the input, in any order.

        Raises
        ------
        RuntimeError
            The release was already charged (the charge would not have
            checked these people).
        """
        if self.charged is not None:
            raise RuntimeError("attach_input() after the ledger charge: call it after ingest, before any noise")
        self._fingerprint = self.ledger.fingerprint(ids)

    def charge(self) -> Charge:
        """Charge the release once (later calls return the same charge)."""
        if self.charged is None:
            self.charged = self.ledger.charge(self.dataset, self.lifetime_epsilon, self.epsilon,
                                              components=self.components, bundle_path=self.bundle_path,
                                              tool_version=self.tool_version, policy_title=self.title,
                                              privacy_unit=self.privacy_unit, fingerprint=self._fingerprint,
                                              new_dataset=self.new_dataset)
        return self.charged

    def finish(self, ok: bool) -> bool:
        """Record the outcome of a charged release (no-op when nothing was charged).

        Returns False if the outcome could not be written; the row then keeps
        status ``charged``, which counts towards the cap exactly the same, so
        the error is not raised over the release's own outcome.
        """
        if self.charged is None:
            return True
        try:
            self.ledger.mark(self.charged.id, "published" if ok else "failed")
        except (sqlite3.Error, OSError, InputError):
            return False
        return True
