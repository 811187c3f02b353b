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
  || canonical JSON of the row's fixed fields)``, a hash chain starting from a
  per-ledger random genesis value; the ``meta`` table stores the number of rows
  and the head of the chain, updated in the same transaction as each charge.
  Editing a charged epsilon, deleting or reordering rows, or dropping the last
  row without also rewriting the chain and the head breaks the check. The
  chain detects accidental damage and naive edits; it is not a signature: a
  person who can write the file and recomputes every hash can rewrite history.
  Each bundle's manifest therefore records the chain head after its own charge
  (``ledger.row_sha256``), so published bundles can be compared with the
  ledger by an auditor who keeps them.
* The ``status`` column is outside the chain (it is updated once, from
  ``charged`` to ``published`` or ``failed``); only those three values are
  accepted, and since every status counts the same, changing it cannot free
  budget.

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
"""

from __future__ import annotations

__all__ = ["Ledger", "LedgerSpend", "Charge", "ChargeOnFirstDraw", "ReleaseLedger", "LEDGER_SCHEMA_VERSION",
           "STATUSES"]

import hashlib
import json
import math
import os
import secrets
import sqlite3
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

from ..errors import BudgetError, InputError
from ..noise.sampler import RandomSource

#: Version of the table layout; a ledger with another version is refused.
LEDGER_SCHEMA_VERSION = "1"
#: The ``application`` value in the ``meta`` table: tells our ledger from any other SQLite file.
LEDGER_APPLICATION = "aggpub lifetime ledger"
#: Allowed values of the ``status`` column.
STATUSES = ("charged", "published", "failed")

_SQLITE_MAGIC = b"SQLite format 3\x00"
_RELATIVE_SLACK = 1e-12
_BUSY_TIMEOUT_S = 60.0

_SPEND_COLUMNS = ("id", "dataset", "epsilon", "lifetime_epsilon", "components", "created_utc", "bundle_path",
                  "tool_version", "policy_title", "prev_sha256", "row_sha256", "status")
#: Columns covered by the hash chain, in the order they are hashed.
_CHAINED = ("id", "dataset", "epsilon", "lifetime_epsilon", "components", "created_utc", "bundle_path",
            "tool_version", "policy_title")

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
    status TEXT NOT NULL CHECK (status IN {STATUSES!r})
);
"""


@dataclass(frozen=True)
class LedgerSpend:
    """One row of the ledger."""

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


@dataclass(frozen=True)
class Charge:
    """What :meth:`Ledger.charge` committed."""

    id: int
    dataset: str
    epsilon: float
    lifetime_epsilon: float
    spent_after: float
    row_sha256: str

    @property
    def remaining(self) -> float:
        return max(0.0, self.lifetime_epsilon - self.spent_after)

    def as_dict(self) -> dict:
        """The manifest's ``ledger`` record."""
        return {"dataset": self.dataset, "spend_id": self.id, "epsilon": self.epsilon,
                "lifetime_epsilon": self.lifetime_epsilon, "spent_after": self.spent_after,
                "row_sha256": self.row_sha256}


def _utc_now() -> str:
    return datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def _row_digest(prev: str, fields: dict) -> str:
    body = json.dumps([fields[c] for c in _CHAINED], separators=(",", ":"), ensure_ascii=False,
                      allow_nan=False)
    return hashlib.sha256(prev.encode("ascii") + b"\n" + body.encode("utf-8")).hexdigest()


def _fits(spent: float, epsilon: float, cap: float) -> bool:
    return spent + epsilon <= cap * (1.0 + _RELATIVE_SLACK)


class Ledger:
    """A lifetime ledger file.

    Parameters
    ----------
    path : str or Path
        The SQLite file. Created (empty ledger) if it does not exist; any
        existing file must be a valid, untampered ledger.
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
                    ("n_spends", "0")])
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

    def _verify(self, con) -> list[LedgerSpend]:
        """Check structure, integrity and the hash chain; return all rows. Call inside a transaction."""
        try:
            result = [r[0] for r in con.execute("PRAGMA integrity_check").fetchall()]
            if result != ["ok"]:
                raise self._damaged(f"integrity check failed: {result[0][:120]}")
            tables = {r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type = 'table'").fetchall()}
            for t in ("meta", "spends"):
                if t not in tables:
                    raise self._damaged(f"table '{t}' is missing")
            cols = tuple(r[1] for r in con.execute("PRAGMA table_info(spends)").fetchall())
            if cols != _SPEND_COLUMNS:
                raise self._damaged("table 'spends' does not have the expected columns")
            meta = dict(con.execute("SELECT key, value FROM meta").fetchall())
            rows = con.execute(f"SELECT {', '.join(_SPEND_COLUMNS)} FROM spends ORDER BY id").fetchall()
        except sqlite3.DatabaseError as exc:
            raise self._damaged(f"SQLite error: {exc}") from None
        if meta.get("application") != LEDGER_APPLICATION:
            raise self._damaged("not an aggpub ledger (meta 'application' is missing or different)")
        if meta.get("schema_version") != LEDGER_SCHEMA_VERSION:
            raise self._damaged(f"schema version {meta.get('schema_version')!r}, this version reads "
                                f"{LEDGER_SCHEMA_VERSION!r}")
        for key in ("genesis_sha256", "head_sha256", "n_spends"):
            if key not in meta:
                raise self._damaged(f"meta '{key}' is missing")
        prev = meta["genesis_sha256"]
        spends = []
        for expected_id, row in enumerate(rows, start=1):
            rec = dict(zip(_SPEND_COLUMNS, row))
            rid = rec["id"]
            if rid != expected_id:
                raise self._damaged(f"spend rows are not numbered 1..n (row {expected_id} has id {rid}): "
                                    "a row was deleted")
            if rec["prev_sha256"] != prev:
                raise self._damaged(f"hash chain broken at spend {rid}: a row before it was edited or deleted")
            try:
                digest = _row_digest(prev, rec)
            except (TypeError, ValueError):
                raise self._damaged(f"spend {rid} holds a value of the wrong type") from None
            if digest != rec["row_sha256"]:
                raise self._damaged(f"hash chain broken at spend {rid}: the row was edited")
            if rec["status"] not in STATUSES:
                raise self._damaged(f"spend {rid} has an unknown status")
            try:
                components = json.loads(rec["components"])
            except (TypeError, ValueError):
                raise self._damaged(f"spend {rid}: unreadable components") from None
            rec["components"] = components
            spends.append(LedgerSpend(**rec))
            prev = digest
        if str(len(rows)) != meta["n_spends"] or prev != meta["head_sha256"]:
            raise self._damaged(f"the chain head does not match ({len(rows)} spend rows, meta says "
                                f"{meta['n_spends']}): rows were added or removed outside aggpub")
        return spends

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

    def charge(self, dataset: str, lifetime_epsilon: float, epsilon: float, *, components=None,
               bundle_path="", tool_version="", policy_title="") -> Charge:
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

        Returns
        -------
        Charge

        Raises
        ------
        BudgetError
            The spend would pass the cap, or the cap differs from the recorded one.
        InputError
            The ledger is damaged.
        """
        dataset = str(dataset)
        epsilon = float(epsilon)
        lifetime_epsilon = float(lifetime_epsilon)
        if not (math.isfinite(epsilon) and epsilon > 0):
            raise BudgetError(f"ledger {self.path}: a spend must be a finite epsilon > 0, got {epsilon!r}")
        comp_json = json.dumps(components or {}, sort_keys=True, separators=(",", ":"), allow_nan=False)
        with self._connect() as con:
            try:
                con.execute("BEGIN IMMEDIATE")
            except sqlite3.OperationalError as exc:
                raise BudgetError(f"ledger {self.path}: could not lock the ledger ({exc}); "
                                  "nothing was charged") from None
            try:
                rows = self._verify(con)
                mine = [r for r in rows if r.dataset == dataset]
                spent = self._check_fit(dataset, lifetime_epsilon, epsilon, mine)
                prev = rows[-1].row_sha256 if rows else dict(con.execute(
                    "SELECT key, value FROM meta WHERE key = 'genesis_sha256'").fetchall())["genesis_sha256"]
                fields = {"id": len(rows) + 1, "dataset": dataset, "epsilon": epsilon,
                          "lifetime_epsilon": lifetime_epsilon, "components": comp_json,
                          "created_utc": _utc_now(), "bundle_path": str(bundle_path),
                          "tool_version": str(tool_version), "policy_title": str(policy_title)}
                digest = _row_digest(prev, fields)
                con.execute(f"INSERT INTO spends({', '.join(_SPEND_COLUMNS)}) VALUES "
                            f"({', '.join('?' * len(_SPEND_COLUMNS))})",
                            [*(fields[c] for c in _CHAINED), prev, digest, "charged"])
                con.execute("UPDATE meta SET value = ? WHERE key = 'head_sha256'", (digest,))
                con.execute("UPDATE meta SET value = ? WHERE key = 'n_spends'", (str(fields["id"]),))
                con.execute("COMMIT")
            except BaseException:
                if con.in_transaction:
                    con.execute("ROLLBACK")
                raise
        return Charge(id=fields["id"], dataset=dataset, epsilon=epsilon, lifetime_epsilon=lifetime_epsilon,
                      spent_after=spent + epsilon, row_sha256=digest)

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
    """The ledger side of one release run: early check, charge before noise, outcome.

    Parameters
    ----------
    policy : ReleasePolicy
        Must have a ``[ledger]`` section.
    bundle_path : str or Path
        Where the bundle will be written (recorded with the spend).

    Notes
    -----
    The release is charged its declared total ``privacy.epsilon`` (the
    components' shares add up to it, see :func:`aggpub.policy.epsilon_shares`),
    which is known from the policy before any noise is drawn.
    """

    def __init__(self, policy, bundle_path):
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
        self.charged: Charge | None = None
        # Fail fast (read only) before the inputs are read; charge() decides under the lock.
        self.ledger.check(self.dataset, self.lifetime_epsilon, self.epsilon)

    def charge(self) -> Charge:
        """Charge the release once (later calls return the same charge)."""
        if self.charged is None:
            self.charged = self.ledger.charge(self.dataset, self.lifetime_epsilon, self.epsilon,
                                              components=self.components, bundle_path=self.bundle_path,
                                              tool_version=self.tool_version, policy_title=self.title)
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
