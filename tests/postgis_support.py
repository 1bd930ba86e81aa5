"""A throwaway PostgreSQL/PostGIS cluster for the database tests, and loading layers into it.

:func:`start` runs ``initdb`` in a temporary folder and starts the server on a Unix socket in that
folder only (no TCP port), under ``$GEOPRESS_TEST_PG_ROOT`` when set (``.ci/run`` sets it and its exit
trap stops any cluster a killed test run left there). PostgreSQL refuses to run as root, so under root the cluster belongs to
the unprivileged user ``nobody``. The binaries are PostgreSQL's from Debian's packages
(``/usr/lib/postgresql/<version>/bin``) or the first ``initdb`` on PATH; PostGIS must be
installed for that server (Debian: ``postgresql-postgis``; ``.ci/run`` installs both).
"""

from __future__ import annotations

import glob
import os
import pwd
import shutil
import subprocess
import tempfile
from dataclasses import dataclass
from pathlib import Path

import geopandas as gpd

#: a role that logs in with a password (SCRAM), to check that the password reaches no output
PASSWORD_ROLE = "geopress_pw"
PASSWORD = "Pw-4a7e1c9b-never-in-outputs"
#: a role that may read but not create anything in the schema ``published``
READER_ROLE = "geopress_reader"
#: every wait on the server's commands: initdb and a start take a few seconds
TIMEOUT_S = 120


def binaries() -> Path | None:
    """The folder of ``initdb``, ``pg_ctl`` and ``postgres``, or None."""
    found = sorted(glob.glob("/usr/lib/postgresql/*/bin/initdb"), key=lambda p: int(Path(p).parts[-3]))
    if found:
        return Path(found[-1]).parent
    initdb = shutil.which("initdb")
    return Path(initdb).resolve().parent if initdb else None


def missing() -> str | None:
    """Why no cluster can be started here, or None."""
    folder = binaries()
    if folder is None:
        return "PostgreSQL server binaries (initdb) not found; install postgresql and postgresql-postgis"
    share = subprocess.run([folder / "pg_config", "--sharedir"], capture_output=True, text=True, timeout=TIMEOUT_S
                           ).stdout.strip() if (folder / "pg_config").exists() else ""
    version = folder.parts[-2]
    controls = [Path(share) / "extension/postgis.control", Path(f"/usr/share/postgresql/{version}/extension/postgis.control")]
    if not any(p.exists() for p in controls):
        return f"PostGIS for PostgreSQL {version} not found; install postgresql-postgis"
    try:
        import adbc_driver_postgresql  # noqa: F401
    except ImportError:
        return "adbc-driver-postgresql not installed; pip install -e '.[test]'"
    return None


@dataclass
class Server:
    """A running cluster: its folder (the socket is there) and the database ``geopress`` with PostGIS."""

    folder: Path
    bindir: Path
    user: str | None

    def dsn(self, user: str = "postgres", dbname: str = "geopress") -> str:
        return f"host={self.folder} port=5432 dbname={dbname} user={user}"

    def run(self, *args: str) -> subprocess.CompletedProcess:
        return subprocess.run([str(a) for a in args], capture_output=True, text=True, timeout=TIMEOUT_S, check=True,
                              user=self.user, cwd=self.folder)

    def sql(self, statement: str, user: str = "postgres", dbname: str = "geopress") -> list[tuple]:
        """Run ``statement`` (autocommit) and return its rows."""
        import adbc_driver_postgresql.dbapi as dbapi

        with dbapi.connect(self.dsn(user, dbname), autocommit=True) as con, con.cursor() as cur:
            cur.execute(statement)
            try:
                return cur.fetchall()
            except Exception:  # a statement without rows
                return []

    def stop(self) -> None:
        self.run(self.bindir / "pg_ctl", "-D", self.folder / "data", "-m", "immediate", "-w", "stop")


def start() -> Server:
    """initdb, start and prepare a cluster (see the module docstring)."""
    bindir = binaries()
    # under .ci/run, in the folder its exit trap cleans (a cluster a killed test run left is stopped there)
    folder = Path(tempfile.mkdtemp(prefix="geopress-pg-", dir=os.environ.get("GEOPRESS_TEST_PG_ROOT")))
    user = None
    if os.geteuid() == 0:
        user = "nobody"
        os.chown(folder, pwd.getpwnam(user).pw_uid, -1)
    server = Server(folder=folder, bindir=bindir, user=user)
    server.run(bindir / "initdb", "-D", folder / "data", "-U", "postgres", "--auth=trust", "-E", "UTF8", "--no-sync")
    hba = folder / "data/pg_hba.conf"
    hba.write_text(f"local all {PASSWORD_ROLE} scram-sha-256\nlocal all {READER_ROLE} scram-sha-256\n"
                   "local all all trust\n")
    server.run(bindir / "pg_ctl", "-D", folder / "data", "-l", folder / "log", "-w", "-t", "60", "-o",
               f"-k {folder} -c listen_addresses='' -c fsync=off -c full_page_writes=off", "start")
    try:
        server.sql("CREATE DATABASE geopress", dbname="postgres")
        server.sql("CREATE EXTENSION postgis")
        server.sql(f"CREATE ROLE {PASSWORD_ROLE} LOGIN PASSWORD '{PASSWORD}'")
        server.sql(f"CREATE ROLE {READER_ROLE} LOGIN PASSWORD '{PASSWORD}'")
        server.sql(f"GRANT CREATE ON DATABASE geopress TO {PASSWORD_ROLE}")
    except BaseException:
        server.stop()
        raise
    return server


def remove(server: Server) -> None:
    server.stop()
    shutil.rmtree(server.folder, ignore_errors=True)


def load(server: Server, table: str, frame: gpd.GeoDataFrame, *, srid: int | None = None,
         geometry: str = "geom") -> None:
    """Create ``table`` (``schema.name``) holding ``frame``, its geometry in column ``geometry`` with SRID
    ``srid`` (default: the frame's EPSG code; 0 for none)."""
    import adbc_driver_postgresql.dbapi as dbapi

    from geopress.io import postgis

    frame = frame.rename_geometry(geometry)
    layer = postgis.geo_table(frame)
    columns = [f"{postgis.quote(f.name)} geometry" if f.name == geometry else
               f"{postgis.quote(f.name)} {postgis._sql_type(f, table)}" for f in layer.data.schema]
    schema, _, name = table.rpartition(".")
    with dbapi.connect(server.dsn()) as con, con.cursor() as cur:
        if schema:
            cur.execute(f"CREATE SCHEMA IF NOT EXISTS {postgis.quote(schema)}")
        cur.execute(f"CREATE TABLE {postgis.qualified(table)} ({', '.join(columns)})")
        cur.adbc_ingest(name, postgis._plain_types(layer.data), mode="append", db_schema_name=schema or None)
        cur.execute(f"UPDATE {postgis.qualified(table)} SET {postgis.quote(geometry)} = "
                    f"ST_SetSRID({postgis.quote(geometry)}, {layer.srid if srid is None else srid})")
        con.commit()
