"""A Prefect server database with every migration applied, built once and copied into fresh state folders.

A Prefect server started on an empty SQLite database spends most of its start (about 15 of
25 s on 2 cores) applying the schema migrations one by one.  The test session builds one
migrated database in the background while the tests are collected (``python
tests/prefect_template.py TARGET``: the official ``prefect server database upgrade``, then a
WAL checkpoint so the single file holds everything), and every fresh state folder whose
server a test starts receives a copy of it first (:func:`seed_state`).  The server then
finds its schema up to date; everything else it does is unchanged.

The copy is placed with :func:`os.link` from a private temporary file, which fails when the
database already exists: a server that began creating its own database is never
overwritten.
"""
from __future__ import annotations

import os
import shutil
import sqlite3
import subprocess
import sys
import threading
import time
from importlib import metadata
from pathlib import Path

#: Longest wait for the background build [s] before a test's server starts on an empty database instead.
TEMPLATE_WAIT_S = 240.0


def template_path(base):
    """Where the migrated database of this Prefect version lives under the session's base state folder."""
    return Path(base) / f"prefect-template-{metadata.version('prefect')}" / "prefect.db"


def start_build(base):
    """Start building the template in the background unless it exists or a build is running; return the path."""
    target = template_path(base)
    target.parent.mkdir(parents=True, exist_ok=True)
    if target.exists():
        return target
    try:  # one build per base folder, even from two sessions
        fd = os.open(target.parent / "build.started", os.O_CREAT | os.O_EXCL | os.O_WRONLY)
    except FileExistsError:
        return target
    os.close(fd)
    log = open(target.parent / "build.log", "ab")
    subprocess.Popen([sys.executable, str(Path(__file__).resolve()), str(target)], stdin=subprocess.DEVNULL,
                     stdout=log, stderr=subprocess.STDOUT, start_new_session=True)
    log.close()
    return target


def _wait(target, timeout_s=TEMPLATE_WAIT_S):
    deadline = time.monotonic() + timeout_s
    while not target.exists():
        if time.monotonic() > deadline or (target.parent / "build.failed").exists():
            return None
        time.sleep(0.2)
    return target


def seed_database(database, base, timeout_s=TEMPLATE_WAIT_S):
    """Copy the migrated database to ``database`` unless a file is there; True when copied."""
    template = _wait(template_path(base), timeout_s)
    if template is None:
        return False
    database = Path(database)
    database.parent.mkdir(parents=True, exist_ok=True)
    if database.exists():
        return False
    tmp = database.with_name(f".{database.name}.seed-{os.getpid()}-{threading.get_ident()}")
    shutil.copyfile(template, tmp)
    try:
        os.link(tmp, database)  # fails if a server created its database meanwhile
        return True
    except FileExistsError:
        return False
    finally:
        tmp.unlink()


def seed_state(state, base, timeout_s=TEMPLATE_WAIT_S):
    """Seed the database of the local server that quakefolio starts for the state folder ``state``."""
    return seed_database(Path(state) / "server" / "prefect.db", base, timeout_s)


def seed_in_background(databases, base):
    """Seed ``databases`` from a daemon thread as soon as the template is built (a session's own databases)."""
    def seed():
        for database in databases:
            seed_database(database, base)

    threading.Thread(target=seed, daemon=True, name="prefect-template-seed").start()


def _build(target):
    target = Path(target)
    tmp = target.with_name(f"prefect.db.building-{os.getpid()}")
    env = {k: v for k, v in os.environ.items() if not k.startswith("PREFECT_")}
    env.update(PREFECT_HOME=str(target.parent / "home"), PREFECT_SERVER_ANALYTICS_ENABLED="false",
               PREFECT_SERVER_DATABASE_CONNECTION_URL=f"sqlite+aiosqlite:///{tmp}")
    done = subprocess.run([sys.executable, "-m", "prefect", "server", "database", "upgrade", "-y"], env=env,
                          stdin=subprocess.DEVNULL, timeout=600)
    if done.returncode != 0:
        (target.parent / "build.failed").touch()
        return done.returncode
    with sqlite3.connect(tmp) as con:  # everything into the main file: the copy is one file
        con.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        con.execute("PRAGMA journal_mode=DELETE")
    os.replace(tmp, target)
    return 0


if __name__ == "__main__":
    sys.exit(_build(sys.argv[1]))
