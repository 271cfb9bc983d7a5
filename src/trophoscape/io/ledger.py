"""The ledger of resumable work: an SQLite file with one row per finished run.

A sweep (``ledger.sqlite``) and a corridor ranking (``corridors.partial.sqlite`` while it
runs) both record every run the moment it finishes, from the main process, so that a command
stopped at any moment and started again runs only what is missing.

Table ``runs``: ``run_id`` (primary key), the columns of the kind of work (a sweep's point,
replicate, seed and variant; a ranking's fingerprint and variant), then ``status`` ("ok" or
"failed"), ``error``, ``results`` (JSON), ``seconds`` and ``finished`` (UTC, ISO 8601).
Table ``meta``: what the work was started with. Each record is one transaction in WAL mode with
full synchronisation, so a process killed at any moment leaves every committed run whole and
nothing half-written; a run recorded again (a failed attempt retried) replaces its row.
"""
from __future__ import annotations

import datetime as _dt
import json
import sqlite3
from pathlib import Path
from typing import Mapping

__all__ = ["Ledger", "LEDGER_COLUMNS", "now"]

#: Columns every ledger's ``runs`` table has, besides those of its kind of work.
LEDGER_COLUMNS = ("run_id", "status", "error", "results", "seconds", "finished")


def now() -> str:
    """The current time, UTC, ISO 8601 to the millisecond (the ``finished`` column)."""
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="milliseconds")


class Ledger:
    """A ledger file (see the module text).

    Parameters
    ----------
    path
        The SQLite file; created with its tables when missing.
    columns
        The columns of this kind of work, in order: name → SQL type (for example
        ``"INTEGER NOT NULL"``). Columns named in ``json_columns`` hold JSON text and are
        written and read as Python values.
    json_columns
        Which of ``columns`` hold JSON.
    allow_nan
        Whether ``results`` may hold NaN and infinities (written as JSON's common extension).

    Raises
    ------
    sqlite3.DatabaseError
        When the file exists and is not an SQLite database. The caller names the file.
    """

    def __init__(self, path, columns: Mapping[str, str] | None = None, *,
                 json_columns=(), allow_nan: bool = False):
        self.path = Path(path)
        self.columns = dict(columns or {})
        self.json_columns = frozenset(json_columns)
        self.allow_nan = allow_nan
        self.conn = sqlite3.connect(self.path, timeout=30.0, isolation_level=None)
        try:
            self.conn.execute("PRAGMA journal_mode=WAL")
            self.conn.execute("PRAGMA synchronous=FULL")
            with self:
                for statement in self.schema(self.columns).split(";"):
                    if statement.strip():
                        self.conn.execute(statement)
        except BaseException:
            self.conn.close()
            raise

    @staticmethod
    def schema(columns: Mapping[str, str]) -> str:
        """The SQL that makes a ledger's tables, with ``columns`` after ``run_id``."""
        kind = "".join(f"    {name:<9} {sql},\n" for name, sql in columns.items())
        return (
            "CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);\n"
            "CREATE TABLE IF NOT EXISTS runs (\n"
            "    run_id    TEXT PRIMARY KEY,\n"
            f"{kind}"
            "    status    TEXT NOT NULL CHECK (status IN ('ok', 'failed')),\n"
            "    error     TEXT,\n"
            "    results   TEXT,\n"
            "    seconds   REAL,\n"
            "    finished  TEXT NOT NULL\n"
            ");\n")

    def __enter__(self):
        self.conn.execute("BEGIN IMMEDIATE")
        return self

    def __exit__(self, kind, exc, tb):
        self.conn.execute("COMMIT" if kind is None else "ROLLBACK")
        return False

    def close(self) -> None:
        self.conn.close()

    def meta(self) -> dict:
        return dict(self.conn.execute("SELECT key, value FROM meta"))

    def set_meta(self, **values) -> None:
        with self:
            self.conn.executemany("INSERT OR REPLACE INTO meta (key, value) VALUES (?, ?)",
                                  [(k, str(v)) for k, v in values.items()])

    def ok_ids(self) -> set[str]:
        return {r[0] for r in self.conn.execute("SELECT run_id FROM runs WHERE status = 'ok'")}

    def count(self) -> int:
        return int(self.conn.execute("SELECT COUNT(*) FROM runs").fetchone()[0])

    def record(self, run_id: str, *, ok: bool, results: dict | None = None,
               error: str | None = None, seconds: float | None = None,
               finished: str | None = None, **values) -> None:
        """Write one finished run, replacing an earlier row of the same run. ``values`` gives
        this kind's columns (every one of them)."""
        if set(values) != set(self.columns):
            raise TypeError(f"a ledger row needs {sorted(self.columns)}, got {sorted(values)}")
        names = ["run_id", *self.columns, "status", "error", "results", "seconds", "finished"]
        row = [run_id,
               *[json.dumps(values[c], default=str) if c in self.json_columns else values[c]
                 for c in self.columns],
               "ok" if ok else "failed", error,
               None if results is None else json.dumps(results, allow_nan=self.allow_nan),
               seconds, now() if finished is None else finished]
        update = ", ".join(f"{c}=excluded.{c}" for c in names[1:])
        with self:
            self.conn.execute(
                f"INSERT INTO runs ({', '.join(names)}) VALUES ({', '.join('?' * len(names))}) "
                f"ON CONFLICT(run_id) DO UPDATE SET {update}", row)

    def rows(self) -> list[dict]:
        """Every row, in the order written (rowid), with JSON columns and ``results`` read
        (``{}`` for a failed run)."""
        names = ["run_id", *self.columns, "status", "error", "results", "seconds", "finished"]
        cur = self.conn.execute(f"SELECT {', '.join(names)} FROM runs ORDER BY rowid")
        out = []
        for row in cur:
            r = dict(zip(names, row))
            for c in self.json_columns:
                r[c] = json.loads(r[c])
            r["results"] = json.loads(r["results"]) if r["results"] else {}
            out.append(r)
        return out
