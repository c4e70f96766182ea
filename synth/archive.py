"""Run storage: one folder per run, every evaluated candidate, resumable.

Layout of a run folder::

    spec.toml        the requirements file as submitted (verbatim)
    candidates.db    SQLite: one row per evaluated candidate (parameters, unit-cube
                     coordinates, scalar metrics, slack), appended one batch per transaction
    state.json       what the search needs to resume (phase, counters)
    manifest.json    versions, seed, budget, timings, bounds applied

SQLite commits each batch atomically, so an interrupt keeps every batch already
written; JSON files are written to a temporary file and renamed. :class:`RunStore`
is the only interface the rest of synth uses, so a shared database server can
replace the embedded file later without touching the search.
"""

from __future__ import annotations

import json
import os
import sqlite3
import tempfile
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pandas as pd

BOOL_COLUMNS = ("internally_stable", "certified", "feasible", "admissible")
SKIP_COLUMNS = ("closed_loop_poles",)   # recomputed exactly for the rows that are shown


class ArchiveError(Exception):
    """A problem with a run folder; the message names the folder and what was expected."""


def atomic_write_text(path: Path, text: str) -> None:
    """Write ``text`` to ``path`` through a temporary file in the same folder and a rename."""
    path = Path(path)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as f:
            f.write(text)
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

    # -- creation / opening ---------------------------------------------------
    @classmethod
    def create(cls, folder: Path, spec_text: str) -> "RunStore":
        folder = Path(folder)
        if folder.exists() and any(folder.iterdir()):
            raise ArchiveError(f"{folder}: the output folder exists and is not empty; "
                               "expected a new or empty folder (use --resume to continue a run)")
        try:
            folder.mkdir(parents=True, exist_ok=True)
            store = cls(folder)
            atomic_write_text(folder / "spec.toml", spec_text)
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

    @property
    def spec_path(self) -> Path:
        return self.folder / "spec.toml"

    # -- candidates -------------------------------------------------------------
    def append(self, df: pd.DataFrame) -> None:
        """Append one evaluated batch in a single transaction."""
        if df.empty:
            return
        out = df.drop(columns=[c for c in SKIP_COLUMNS if c in df.columns])
        for c in out.columns:
            if out[c].dtype == object:
                out[c] = out[c].astype(str)
        with sqlite3.connect(self.db_path) as con:
            existing = {r[1] for r in con.execute("PRAGMA table_info(candidates)")}
            if existing:
                for c in out.columns:
                    if c not in existing:
                        con.execute(f'ALTER TABLE candidates ADD COLUMN "{c}"')
            out.to_sql("candidates", con, if_exists="append", index=False)

    def load(self) -> pd.DataFrame:
        """Every stored candidate, in evaluation order, with boolean columns restored."""
        if not self.db_path.exists():
            return pd.DataFrame()
        with sqlite3.connect(self.db_path) as con:
            df = pd.read_sql("SELECT * FROM candidates ORDER BY id", con)
        for c in df.columns:
            if c in BOOL_COLUMNS or c.startswith("met_"):
                df[c] = df[c].fillna(0).astype(bool)
            elif c == "hidden_modes":
                df[c] = df[c].fillna("")
            elif df[c].dtype == object and c not in ("source", "hidden_modes"):
                df[c] = pd.to_numeric(df[c], errors="coerce")
        # SQLite keeps no infinities distinction problem: floats round-trip, NaN comes back as None
        return df

    def count(self) -> int:
        if not self.db_path.exists():
            return 0
        with sqlite3.connect(self.db_path) as con:
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


def _json_default(x):
    if isinstance(x, (np.integer,)):
        return int(x)
    if isinstance(x, (np.floating,)):
        return float(x)
    if isinstance(x, np.ndarray):
        return x.tolist()
    return str(x)
