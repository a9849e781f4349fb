"""Backup and restore of the store (``whirlwatch db backup|restore``; docs/deploy.md).

SQLite: SQLite's online backup API (Python's ``sqlite3.Connection.backup``), which copies
the database as of one moment while the service goes on writing (in WAL mode a reader
never blocks the writer; https://www.sqlite.org/backup.html). The copy is written beside
the target as ``FILE.partial`` and renamed over it when complete, so a crash never leaves
half a backup under the real name. A restore copies the file into the store the same way.

PostgreSQL: ``pg_dump --format=custom`` and ``pg_restore`` (PostgreSQL's own client tools;
a dump is one consistent snapshot taken without blocking writers,
https://www.postgresql.org/docs/current/app-pgdump.html). When they are not on PATH the
command says what to run instead.

A restore checks the file's schema revision (the ``alembic_version`` row it holds) against
the migrations this release ships, refuses a store that already holds rows unless forced,
and brings an older file up to the newest schema after restoring it.
"""

from __future__ import annotations

import os
import re
import shutil
import sqlite3
import subprocess
from dataclasses import dataclass
from pathlib import Path
from urllib.parse import unquote

from sqlalchemy import Engine, func, inspect, select, table
from sqlalchemy.engine.url import URL

from monitor.store.db import _sqlite_file, make_engine, normalise_url
from monitor.store.migrate import alembic_config, current_revision, upgrade_engine

#: Seconds a PostgreSQL client tool may take before the command gives up.
PG_TOOL_TIMEOUT_S = 3600.0

#: The table Alembic keeps the schema revision in; not counted when deciding "empty".
VERSION_TABLE = "alembic_version"


class BackupError(RuntimeError):
    """A backup or restore that cannot be done, in one sentence naming the input."""


@dataclass(frozen=True)
class RestoreResult:
    """What a restore did: the file's schema revision and the one the store is at now."""

    file_revision: str
    store_revision: str


def known_revisions() -> list[str]:
    """The schema revisions this release ships, oldest first."""
    from alembic.script import ScriptDirectory

    script = ScriptDirectory.from_config(alembic_config())
    return [s.revision for s in reversed(list(script.walk_revisions()))]


def check_revision(revision: str | None, file: Path) -> str:
    """``revision`` (of backup ``file``) when this release knows it; else BackupError."""
    known = known_revisions()
    if revision is None:
        raise BackupError(f"{file} holds no whirlwatch schema revision; it is not a whirlwatch backup.")
    if revision not in known:
        raise BackupError(
            f"{file} is at schema revision {revision!r}, which this release does not know "
            f"(it knows {known[0]} to {known[-1]}); restore it with the release that made it.")
    return revision


def is_empty(engine: Engine) -> bool:
    """True when no table of the store (but the revision table) holds a row."""
    names = [n for n in inspect(engine).get_table_names() if n != VERSION_TABLE]
    with engine.connect() as conn:
        for name in names:
            if conn.execute(select(func.count()).select_from(table(name))).scalar():
                return False
    return True


def sqlite_file(url: URL) -> Path | None:
    """The database file of a SQLite ``url``; None for another database or an in-memory one."""
    return _sqlite_file(url) if url.get_backend_name() == "sqlite" else None


# --- SQLite ----------------------------------------------------------------------------


def _open_existing(path: Path, busy_timeout_s: float) -> sqlite3.Connection:
    """A connection to the existing SQLite file ``path`` (never creates one)."""
    if not path.is_file():
        raise BackupError(f"SQLite file {path} does not exist.")
    return sqlite3.connect(f"file:{path}?mode=rw", uri=True, timeout=busy_timeout_s)


def sqlite_revision(path: Path) -> str | None:
    """The schema revision stored in SQLite file ``path``; None when it has none;
    BackupError when it is not a SQLite database."""
    conn = _open_existing(path, 10.0)
    try:
        row = conn.execute(f"SELECT version_num FROM {VERSION_TABLE}").fetchone()
    except sqlite3.DatabaseError as exc:
        if "no such table" in str(exc):
            return None
        raise BackupError(f"{path} is not a SQLite database ({exc}).") from None
    finally:
        conn.close()
    return None if row is None else str(row[0])


def backup_sqlite(source: Path, target: Path, busy_timeout_s: float = 10.0) -> str:
    """Copy the SQLite store ``source`` to ``target`` as of one moment (safe while the
    service writes) and return its schema revision. ``target`` is a self-contained file
    (rollback journal, no ``-wal``)."""
    partial = target.with_name(target.name + ".partial")
    src = _open_existing(source, busy_timeout_s)
    try:
        partial.unlink(missing_ok=True)
        dst = sqlite3.connect(partial)
        try:
            # pages=-1: all pages in one step, under one read transaction, so the copy is
            # one consistent snapshot however the service writes meanwhile.
            src.backup(dst, pages=-1)
            dst.execute("PRAGMA journal_mode=DELETE")
            ok = dst.execute("PRAGMA integrity_check").fetchone()
        finally:
            dst.close()
    except sqlite3.DatabaseError as exc:
        partial.unlink(missing_ok=True)
        raise BackupError(f"SQLite store {source} could not be copied ({exc}).") from None
    finally:
        src.close()
    if ok is None or ok[0] != "ok":
        partial.unlink(missing_ok=True)
        raise BackupError(f"the copy of {source} failed SQLite's integrity check ({ok}).")
    revision = sqlite_revision(partial)
    if revision is None:
        partial.unlink(missing_ok=True)
        raise BackupError(f"SQLite file {source} has no whirlwatch schema; nothing to back up.")
    os.replace(partial, target)
    return revision


def restore_sqlite(file: Path, target: Path, busy_timeout_s: float = 10.0) -> None:
    """Replace the whole content of the SQLite store ``target`` (created when missing) by
    that of backup ``file``, page by page under the target's write lock."""
    src = _open_existing(file, busy_timeout_s)
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        dst = sqlite3.connect(target, timeout=busy_timeout_s)
        try:
            src.backup(dst, pages=-1)
        finally:
            dst.close()
    except sqlite3.DatabaseError as exc:
        raise BackupError(f"{file} could not be restored into {target} ({exc}).") from None
    finally:
        src.close()


# --- PostgreSQL ------------------------------------------------------------------------

_SEARCH_PATH = re.compile(r"-c\s*search_path\s*=\s*([^\s,]+)")


@dataclass(frozen=True)
class PgTarget:
    """How PostgreSQL's client tools reach the database of a URL: options, environment
    (the password goes in PGPASSWORD, never on a command line) and the schema named by
    ``options=-csearch_path=...`` (None: the whole database)."""

    args: tuple[str, ...]
    env: dict[str, str]
    schema: str | None


def pg_target(url: URL) -> PgTarget:
    """The client-tool arguments of PostgreSQL ``url``."""
    args: list[str] = []
    if url.host:
        args += ["--host", url.host]
    if url.port:
        args += ["--port", str(url.port)]
    if url.username:
        args += ["--username", url.username]
    args += ["--dbname", url.database or "postgres"]
    env = dict(os.environ)
    if url.password:
        env["PGPASSWORD"] = str(url.password)
    options = url.query.get("options")
    text = unquote(options if isinstance(options, str) else " ".join(options or ()))
    if text:
        env["PGOPTIONS"] = text
    found = _SEARCH_PATH.search(text)
    return PgTarget(tuple(args), env, found.group(1) if found else None)


def _tool(name: str, runs: str) -> str:
    """The path of PostgreSQL client tool ``name``; BackupError saying what to run when
    it is not on PATH (``runs``: the command to run by hand)."""
    path = shutil.which(name)
    if path is None:
        raise BackupError(f"{name} is not on PATH: install PostgreSQL's client tools, or run "
                          f"`{runs}` yourself (docs/deploy.md, \"Backup and restore\").")
    return path


def _run(cmd: list[str], env: dict[str, str], what: str) -> str:
    try:
        done = subprocess.run(cmd, env=env, capture_output=True, text=True,
                              timeout=PG_TOOL_TIMEOUT_S, check=False)
    except subprocess.TimeoutExpired:
        raise BackupError(f"{what} took longer than {PG_TOOL_TIMEOUT_S:g} s and was stopped.") from None
    if done.returncode != 0:
        first = (done.stderr.strip().splitlines() or ["no message"])[0]
        raise BackupError(f"{what} failed: {first.rstrip('.')}.")
    return done.stdout


def backup_postgres(url: URL, target: Path) -> None:
    """``pg_dump --format=custom`` of the store at ``url`` (its schema only, when the URL
    names one) into ``target``, written as ``target.partial`` and renamed when done."""
    pg = pg_target(url)
    exe = _tool("pg_dump", f"pg_dump --format=custom --file {target} {url.database}")
    partial = target.with_name(target.name + ".partial")
    cmd = [exe, "--format=custom", "--no-owner", "--no-privileges", "--file", str(partial), *pg.args]
    if pg.schema:
        cmd += ["--schema", pg.schema]
    try:
        _run(cmd, pg.env, f"pg_dump of database {url.database}")
    except BackupError:
        partial.unlink(missing_ok=True)
        raise
    os.replace(partial, target)


def postgres_dump_revision(file: Path) -> str | None:
    """The schema revision in custom-format dump ``file`` (the data of its
    ``alembic_version`` table, read by pg_restore), or None when it has none."""
    exe = _tool("pg_restore", f"pg_restore --list {file}")
    text = _run([exe, "--data-only", "--table", VERSION_TABLE, "--file", "-", str(file)],
                dict(os.environ), f"pg_restore reading {file}")
    lines = text.splitlines()
    for i, line in enumerate(lines):
        if line.startswith("COPY ") and f"{VERSION_TABLE} " in line and i + 1 < len(lines):
            value = lines[i + 1].strip()
            return None if value in ("", "\\.") else value
    return None


def postgres_dump_schema(file: Path) -> str:
    """The schema whose ``alembic_version`` table custom-format dump ``file`` holds
    (from pg_restore's table of contents); BackupError when it holds none."""
    exe = _tool("pg_restore", f"pg_restore --list {file}")
    listing = _run([exe, "--list", str(file)], dict(os.environ), f"pg_restore reading {file}")
    found = re.search(rf"^\d+; \d+ \d+ TABLE (\S+) {VERSION_TABLE} ", listing, re.MULTILINE)
    if found is None:
        raise BackupError(f"{file} holds no whirlwatch schema revision; it is not a whirlwatch backup.")
    return found.group(1)


def restore_postgres(url: URL, file: Path) -> None:
    """``pg_restore`` of dump ``file`` into the database at ``url`` in one transaction,
    dropping first whatever of the dump's objects exist there (``--clean --if-exists``:
    a schema-only dump recreates its schema, and an upgraded empty store has the tables)."""
    pg = pg_target(url)
    dumped = postgres_dump_schema(file)
    if dumped != (pg.schema or "public"):
        raise BackupError(
            f"{file} holds schema {dumped!r} but the database URL names schema {pg.schema or 'public'!r}; "
            "a dump is restored into the schema it was taken from (set options=-csearch_path to it).")
    exe = _tool("pg_restore", f"pg_restore --clean --if-exists --dbname {url.database} {file}")
    cmd = [exe, "--no-owner", "--no-privileges", "--single-transaction", "--exit-on-error",
           "--clean", "--if-exists", *pg.args]
    _run([*cmd, str(file)], pg.env, f"pg_restore of {file} into database {url.database}")


# --- the two commands ------------------------------------------------------------------


def backup(url: str, target: Path, *, force: bool = False) -> str:
    """Back the store at ``url`` up into ``target``; returns the schema revision saved
    (for PostgreSQL, the store's at the time)."""
    if target.exists() and not force:
        raise BackupError(f"{target} exists already; choose a new file or pass --force to replace it.")
    if target.is_dir():
        raise BackupError(f"{target} is a directory; name a file.")
    parsed = normalise_url(url)
    path = sqlite_file(parsed)
    if path is not None and path.exists() and path.resolve() == target.resolve():
        raise BackupError(f"{target} is the store itself; name another file.")
    if path is not None:
        return backup_sqlite(path, target)
    if parsed.get_backend_name() != "postgresql":
        raise BackupError(f"database URL {parsed.render_as_string(hide_password=True)} is neither a SQLite file nor PostgreSQL.")
    engine = make_engine(parsed)
    try:
        revision = current_revision(engine)
    finally:
        engine.dispose()
    if revision is None:
        raise BackupError(f"database {parsed.render_as_string(hide_password=True)} has no whirlwatch schema; nothing to back up.")
    backup_postgres(parsed, target)
    return revision


def restore(url: str, file: Path, *, force: bool = False) -> RestoreResult:
    """Restore backup ``file`` into the store at ``url``: refuses a store holding rows
    unless ``force``; upgrades a file of an older revision to the newest schema."""
    if not file.is_file():
        raise BackupError(f"backup file {file} does not exist.")
    parsed = normalise_url(url)
    shown = parsed.render_as_string(hide_password=True)
    path = sqlite_file(parsed)
    if path is None and parsed.get_backend_name() != "postgresql":
        raise BackupError(f"database URL {shown} is neither a SQLite file nor PostgreSQL.")
    if path is not None and path.exists() and path.resolve() == file.resolve():
        raise BackupError(f"{file} is the store itself; restore from a backup file.")
    revision = check_revision(sqlite_revision(file) if path is not None else postgres_dump_revision(file), file)
    engine = make_engine(parsed)
    try:
        if not force and not is_empty(engine):
            raise BackupError(f"database {shown} already holds data; restore into an empty "
                              "database or pass --force to replace everything in it.")
    finally:
        engine.dispose()
    if path is not None:
        restore_sqlite(file, path)
    else:
        restore_postgres(parsed, file)
    engine = make_engine(parsed)
    try:
        upgrade_engine(engine)
        now = current_revision(engine) or revision
    finally:
        engine.dispose()
    return RestoreResult(file_revision=revision, store_revision=now)
