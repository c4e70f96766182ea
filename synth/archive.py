"""Run storage: one folder per run, every evaluated candidate, resumable.

Layout of a run folder::

    spec.toml        the requirements file as submitted (verbatim)
    candidates.db    SQLite: one row per evaluated candidate (parameters, unit-cube
                     coordinates, scalar metrics, slack), appended one batch per transaction
                     and, in the same transaction, the search state that resumes after it;
                     when a search ends also the ranking (rank, front, knee, violation of
                     every row left after de-duplication) and the certified records of the
                     first rows, so that ``synth table`` needs no re-evaluation
    state.json       what the search needs to resume (phase, counters), for people to read
    manifest.json    versions, seed, budget, timings, bounds applied
    lock             the process id of the one writer (see :mod:`synth.runlock`)

SQLite commits each batch atomically, so an interrupt (even ``kill -9``) keeps every
batch already written, with the state that matches it; the database runs in
write-ahead-log mode so that readers see a consistent snapshot while the writer
appends. JSON files are written to a temporary file and renamed. Files get the
ordinary permissions of the user's umask. :class:`RunStore` is the only interface
the rest of synth uses, so a shared database server can replace the embedded file
later without touching the search.
"""

from __future__ import annotations

import json
import os
import sqlite3
import tempfile
from datetime import datetime, timezone
from pathlib import Path

from .runlock import RunFolderBusy, RunLock

LOCK_FILE = "lock"
BOOL_COLUMNS = ("internally_stable", "certified", "feasible", "admissible")
SKIP_COLUMNS = ("closed_loop_poles",)   # recomputed exactly for the rows that are shown


class ArchiveError(Exception):
    """A problem with a run folder; the message names the folder and what was expected."""


def ordinary_mode() -> int:
    """File mode an ordinary ``open()`` would give: 0o666 less the process umask.

    (``tempfile.mkstemp`` creates 0o600 files, which would hide a shared run from
    colleagues once renamed into place.)"""
    umask = os.umask(0)
    os.umask(umask)
    return 0o666 & ~umask


def atomic_write_text(path: Path, text: str) -> None:
    """Write ``text`` to ``path`` through a temporary file in the same folder and a rename."""
    path = Path(path)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as f:
            f.write(text)
        os.chmod(tmp, ordinary_mode())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def default_run_dir(spec_name: str, root: Path = Path("runs")) -> Path:
    stamp = datetime.now(timezone.utc).strftime("%Y%m%d-%H%M%S")
    safe = "".join(c if c.isalnum() or c in "-_" else "-" for c in spec_name).strip("-") or "run"
    return root / f"{safe}-{stamp}"


class RunStore:
    """Embedded (SQLite + JSON) storage of one run."""

    def __init__(self, folder: Path):
        self.folder = Path(folder)
        self.db_path = self.folder / "candidates.db"
        self.lock: RunLock | None = None

    # -- creation / opening ---------------------------------------------------
    @classmethod
    def create(cls, folder: Path, spec_text: str) -> "RunStore":
        """A new run folder, locked for writing by this process (release with :meth:`close`)."""
        folder = Path(folder)
        if folder.exists() and any(p.name != LOCK_FILE for p in folder.iterdir()):
            raise ArchiveError(f"{folder}: the output folder exists and is not empty; "
                               "expected a new or empty folder (use --resume to continue a run)")
        try:
            folder.mkdir(parents=True, exist_ok=True)
            store = cls(folder)
            store.lock_for_writing()
            if any(p.name != LOCK_FILE for p in folder.iterdir()):   # another writer got here first
                store.close()
                raise ArchiveError(f"{folder}: the output folder exists and is not empty; "
                                   "expected a new or empty folder (use --resume to continue a run)")
            atomic_write_text(folder / "spec.toml", spec_text)
            # created here, not by SQLite (which would use 0644): the umask decides, as for any
            # file; SQLite gives its -wal and -shm files the database file's mode
            os.close(os.open(store.db_path, os.O_RDWR | os.O_CREAT, 0o666))
        except OSError as e:
            raise ArchiveError(f"{folder}: cannot create the run folder ({e.strerror or e}); "
                               "expected a writable location") from None
        return store

    @classmethod
    def open(cls, folder: Path) -> "RunStore":
        folder = Path(folder)
        if not (folder / "spec.toml").is_file() or not (folder / "manifest.json").is_file():
            raise ArchiveError(f"{folder}: not a synth run folder; expected spec.toml and manifest.json "
                               "written by 'synth design'")
        return cls(folder)

    def lock_for_writing(self) -> RunLock:
        """Take the folder's one-writer lock; ArchiveError naming the holder when it is taken."""
        if self.lock is None:
            try:
                self.lock = RunLock(self.folder).acquire()
            except RunFolderBusy as e:
                raise ArchiveError(str(e)) from None
        return self.lock

    def close(self) -> None:
        """Release the writer lock (if held)."""
        if self.lock is not None:
            self.lock.release()
            self.lock = None

    @property
    def spec_path(self) -> Path:
        return self.folder / "spec.toml"

    def _connect(self) -> sqlite3.Connection:
        con = sqlite3.connect(self.db_path, timeout=30.0)
        if self.lock is not None:       # the writer: write-ahead log, so readers never wait
            con.execute("PRAGMA journal_mode=WAL")
        return con

    # -- candidates -------------------------------------------------------------
    def append(self, df: "pd.DataFrame", state: dict | None = None) -> None:
        """Append one evaluated batch, and the search state that follows it, in one transaction."""
        if df.empty and state is None:
            return
        out = df.drop(columns=[c for c in SKIP_COLUMNS if c in df.columns])
        for c in out.columns:
            if out[c].dtype == object:
                out[c] = out[c].astype(str)
        con = self._connect()
        try:
            with con:
                if state is not None:
                    _put_meta(con, "search_state", state)
                if not out.empty:
                    existing = {r[1] for r in con.execute("PRAGMA table_info(candidates)")}
                    if existing:
                        for c in out.columns:
                            if c not in existing:
                                con.execute(f'ALTER TABLE candidates ADD COLUMN "{c}"')
                    out.to_sql("candidates", con, if_exists="append", index=False)
        finally:
            con.close()

    def load(self, ids=None, columns=None) -> "pd.DataFrame":
        """Every stored candidate (or those of ``ids``), in id order, with boolean columns restored;
        only the stored ones of ``columns`` (and id) when given."""
        import pandas as pd
        if not self.db_path.exists():
            return pd.DataFrame()
        con = sqlite3.connect(self.db_path, timeout=30.0)
        try:
            if columns is not None:
                have = [r[1] for r in con.execute("PRAGMA table_info(candidates)")]
                want = set(columns) | {"id"}
                what = ", ".join(f'"{c}"' for c in have if c in want) or "*"
            else:
                what = "*"
            if ids is None:
                df = pd.read_sql(f"SELECT {what} FROM candidates ORDER BY id", con)
            else:
                ids = [int(i) for i in ids]
                df = pd.read_sql(f"SELECT * FROM candidates WHERE id IN ({','.join('?' * len(ids))}) "
                                 "ORDER BY id", con, params=ids) if ids else \
                    pd.read_sql("SELECT * FROM candidates WHERE 0", con)
        except (sqlite3.OperationalError, pd.errors.DatabaseError):
            return pd.DataFrame()
        finally:
            con.close()
        return restore_types(df)

    def count(self) -> int:
        if not self.db_path.exists():
            return 0
        con = sqlite3.connect(self.db_path, timeout=30.0)
        try:
            return int(con.execute("SELECT COUNT(*) FROM candidates").fetchone()[0])
        except sqlite3.OperationalError:
            return 0
        finally:
            con.close()

    # -- search state -----------------------------------------------------------
    def load_state(self) -> dict:
        """The search state committed with the last stored batch (state.json for older runs)."""
        return self._meta("search_state") or self.load_json("state.json")

    def _meta(self, key: str):
        if not self.db_path.exists():
            return None
        con = sqlite3.connect(self.db_path, timeout=30.0)
        try:
            row = con.execute("SELECT value FROM synth_meta WHERE key = ?", (key,)).fetchone()
        except sqlite3.OperationalError:
            return None
        finally:
            con.close()
        return json.loads(row[0]) if row else None

    # -- stored ranking -----------------------------------------------------------
    def save_ranking(self, columns: "pd.DataFrame", records: list[dict], meta: dict) -> None:
        """Store the ranking of the current candidates (one row per ranked id, best first),
        the JSON records of the first rows (certified) and a summary, in one transaction."""
        con = self._connect()
        try:
            with con:
                con.execute("DROP TABLE IF EXISTS ranking")
                con.execute("DROP TABLE IF EXISTS shown")
                columns.to_sql("ranking", con, index=False)
                con.execute("CREATE TABLE shown (position INTEGER PRIMARY KEY, id INTEGER, record TEXT)")
                con.executemany("INSERT INTO shown VALUES (?, ?, ?)",
                                [(i, int(r["id"]), json.dumps(r, allow_nan=False)) for i, r in enumerate(records)])
                _put_meta(con, "ranking", dict(meta, candidates=self._count(con)))
        finally:
            con.close()

    def ranking_meta(self) -> dict | None:
        """The stored ranking's summary, or None when there is none or new candidates came since."""
        meta = self._meta("ranking")
        if not meta or meta.get("candidates") != self.count():
            return None
        return meta

    def load_ranking(self) -> "pd.DataFrame | None":
        """The stored ranking columns (id, rank, front, ...), best first; None when stale or absent."""
        import pandas as pd
        if self.ranking_meta() is None:
            return None
        con = sqlite3.connect(self.db_path, timeout=30.0)
        try:
            return pd.read_sql("SELECT * FROM ranking ORDER BY rank", con)
        finally:
            con.close()

    def shown_records(self, n: int | None = None, raw: bool = False) -> list:
        """The first ``n`` stored records (all stored when None), best first; their JSON texts
        with ``raw``."""
        return [r if raw else json.loads(r) for r in self._shown("record", n)]

    def shown_ids(self) -> list[int]:
        return [int(i) for i in self._shown("id", None)]

    def _shown(self, col: str, n: int | None) -> list:
        con = sqlite3.connect(self.db_path, timeout=30.0)
        try:
            q = f"SELECT {col} FROM shown ORDER BY position" + ("" if n is None else f" LIMIT {int(n)}")
            return [r[0] for r in con.execute(q)]
        except sqlite3.OperationalError:
            return []
        finally:
            con.close()

    @staticmethod
    def _count(con) -> int:
        try:
            return int(con.execute("SELECT COUNT(*) FROM candidates").fetchone()[0])
        except sqlite3.OperationalError:
            return 0

    # -- small JSON documents ---------------------------------------------------
    def save_json(self, name: str, obj: dict) -> None:
        atomic_write_text(self.folder / name, json.dumps(obj, indent=2, default=_json_default) + "\n")

    def load_json(self, name: str) -> dict:
        p = self.folder / name
        if not p.exists():
            return {}
        try:
            return json.loads(p.read_text(encoding="utf-8"))
        except (OSError, ValueError) as e:
            raise ArchiveError(f"{p}: unreadable ({e}); expected a JSON file written by synth") from None


def restore_types(df: "pd.DataFrame") -> "pd.DataFrame":
    """Boolean and numeric columns back from SQLite's storage classes."""
    import pandas as pd
    for c in df.columns:
        if c in BOOL_COLUMNS or c.startswith("met_"):
            df[c] = df[c].fillna(0).astype(bool)
        elif c == "hidden_modes":
            df[c] = df[c].fillna("")
        elif df[c].dtype == object and c not in ("source", "hidden_modes"):
            df[c] = pd.to_numeric(df[c], errors="coerce")
    return df


def _put_meta(con: sqlite3.Connection, key: str, value: dict) -> None:
    con.execute("CREATE TABLE IF NOT EXISTS synth_meta (key TEXT PRIMARY KEY, value TEXT)")
    con.execute("INSERT OR REPLACE INTO synth_meta VALUES (?, ?)",
                (key, json.dumps(value, default=_json_default)))


def _json_default(x):
    if hasattr(x, "tolist"):          # numpy scalars and arrays
        return x.tolist()
    return str(x)
