"""The store on disk: Parquet catalog snapshots, feature shards, one atomic pointer.

Layout of a store folder::

    store.json                 marker: format name and version
    HEAD                       JSON pointer to the current snapshot of everything
    catalog/<snapshot>/        maps, datasets, participants, problems[, labels] .parquet
    features/<set>/            set.json, mask.npy, shard-*.npy, rows-<snapshot>.parquet
    .lock                      advisory lock held by the one writer

A writer creates new files only, then replaces ``HEAD`` with one ``os.replace``:
a reader (or a crash) sees the old snapshot or the new one, never half of one.
Source datasets are never written to.
"""

from __future__ import annotations

import contextlib
import fcntl
import json
import os
import re
import shutil
import tempfile
import time
import uuid
import weakref
from pathlib import Path
from typing import Any, Iterator

import pyarrow as pa

from ._atomic import _fsync_dir, checkpoint, write_json_atomic
from ._paths import RealPaths, inside_store, regular_file, store_file
from ._tables import (
    COPIES_SCHEMA,
    DATASETS_SCHEMA,
    FEATURE_SETS_SCHEMA,
    FPROBLEMS_SCHEMA,
    LABELS_SCHEMA,
    MAPS_SCHEMA,
    MAPS_SCHEMA_ID,
    PARTICIPANTS_SCHEMA,
    PARTS_DIR,
    PROBLEMS_SCHEMA,
    ROWS_SCHEMA,
    CatalogManifest,
    CatalogPart,
    FeatureSetSpec,
    Head,
    conform,
    INDEX_INPUTS_FILE,
    check_index_inputs,
)
from ..errors import (
    MapstoreError,
    NoCatalog,
    QueryError,
    StaleSnapshot,
    StoreBusy,
    StoreCorrupt,
    StoreNotFound,
    StoreUnwritable,
)

__all__ = [
    "STORE_FORMAT",
    "MAPS_SCHEMA",
    "MAPS_SCHEMA_ID",
    "PARTS_DIR",
    "DATASETS_SCHEMA",
    "PROBLEMS_SCHEMA",
    "ROWS_SCHEMA",
    "FPROBLEMS_SCHEMA",
    "Head",
    "write_lock",
    "read_head",
    "commit_head",
    "new_snapshot_id",
    "file_slug",
    "write_parquet_atomic",
    "write_json_atomic",
    "checkpoint",
    "Catalog",
    "CatalogManifest",
    "CatalogPart",
    "conform",
    "ensure_store",
]

# version 2: every part and table has the current columns (stores of version 1 are indexed again)
STORE_FORMAT = {"format": "mapstore-store", "version": 2}

def file_slug(text: str, limit: int = 40) -> str:
    """A dataset key (which may hold '/') as part of a file name in the store."""
    return re.sub(r"[^A-Za-z0-9._-]+", "_", text)[:limit] or "_"


def new_snapshot_id() -> str:
    """Ids sort in creation order (to the microsecond), which garbage collection relies on."""
    now = time.time_ns()
    return time.strftime("%Y%m%dT%H%M%S", time.gmtime(now // 10 ** 9)) + f".{now // 1000 % 10 ** 6:06d}-" + \
        uuid.uuid4().hex[:8]


_TMP_MARKER = re.compile(r"^\.store\.json\.[0-9a-f]{32}\.tmp$")


def ensure_store(path: str | os.PathLike[str]) -> Path:
    """Create an empty store folder (or check an existing one) and return its path."""
    p = Path(path).expanduser().absolute()
    marker = p / "store.json"
    if p.exists() and not p.is_dir():
        raise StoreCorrupt(f"{p}: exists and is not a folder; choose another --store path")
    if p.is_dir() and not marker.exists():
        # another run creating the store at this moment (or one killed before its marker was in place)
        # leaves only temporary markers: they do not make the folder foreign, and are not ours to delete
        if any(not _TMP_MARKER.match(e.name) for e in p.iterdir()) and not marker.exists():
            raise StoreCorrupt(f"{p}: folder exists, is not empty and is not a mapstore store; "
                               "choose an empty or new folder for --store")
    try:
        p.mkdir(parents=True, exist_ok=True)
        if not marker.exists():
            write_json_atomic(marker, STORE_FORMAT)  # two runs at once both write the same marker
    except OSError as exc:
        raise StoreUnwritable(f"{p}: cannot create the store here ({exc.strerror}); choose a folder you can "
                              "write (--store)") from exc
    return p


def _check_store(p: Path) -> None:
    marker = p / "store.json"
    if not marker.exists():
        if p.is_dir() and any(p.iterdir()):  # a folder of something else (data?): never suggest a store in it
            raise StoreNotFound(f"{p}: a folder, but not a mapstore store (no store.json); give the folder "
                                "'mapstore index' made as --store, or index into a new folder beside it: "
                                f"mapstore index {p} --store {p.parent / (p.name + '-store')}")
        raise StoreNotFound(f"{p}: no mapstore store here (no store.json); run 'mapstore index ROOT "
                            f"--store {p}' first")
    try:
        if marker.stat().st_size > 4096:
            raise ValueError("larger than a store marker is")
        doc = json.loads(marker.read_text())
    except (OSError, ValueError, RecursionError) as exc:
        raise StoreCorrupt(f"{marker}: unreadable store marker ({exc})") from exc
    if not isinstance(doc, dict) or not isinstance(doc.get("version", 0), int) or isinstance(doc.get("version"), bool):
        raise StoreCorrupt(f"{marker}: a damaged store marker (expected an object with a whole-number version); "
                           "restore it from a backup, or index the datasets again into a new store")
    if doc.get("format") != STORE_FORMAT["format"] or doc.get("version", 0) > STORE_FORMAT["version"]:
        raise StoreCorrupt(f"{marker}: store format {doc} is not one this mapstore reads "
                           f"({STORE_FORMAT}); upgrade mapstore")
    if doc.get("version", 0) < STORE_FORMAT["version"]:
        raise StoreCorrupt(f"{p}: written by an older mapstore (store format {doc.get('version')}; this one reads "
                           f"format {STORE_FORMAT['version']}); index the datasets again into a new folder "
                           "(mapstore index ROOTS --store NEW_FOLDER), then delete this one")


@contextlib.contextmanager
def write_lock(path: Path) -> Iterator[None]:
    """Hold the store's single-writer lock, failing at once if another process has it."""
    try:
        lock = open(path / ".lock", "a+")
    except OSError as exc:
        raise StoreUnwritable(f"{path}: this store cannot be written from here ({exc.strerror}); reading it "
                              "(sql, check, export to a folder of yours, verify) works. Ask whoever owns it to "
                              "run this, or copy the store to a folder you can write") from exc
    try:
        try:
            fcntl.flock(lock.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError as exc:
            raise StoreBusy(f"{path}: another mapstore process is writing to this store; "
                            "wait for it to finish and run the command again") from exc
        yield
    finally:
        with contextlib.suppress(OSError):
            fcntl.flock(lock.fileno(), fcntl.LOCK_UN)
        lock.close()


def read_head(path: Path) -> Head:
    _check_store(path)
    f = path / "HEAD"
    if not f.exists():
        return Head()
    try:
        regular_file(f, "HEAD")
        head = Head.from_json(json.loads(f.read_text()))
    except StoreCorrupt:
        raise
    except (OSError, ValueError) as exc:
        raise StoreCorrupt(f"{f}: unreadable ({exc}); restore it from a backup or re-index") from exc
    for record, rel, folder in head.paths():  # every path HEAD names stays inside the store, before any is opened
        store_file(path, rel, record, folder=folder)
    return head


def replace_dir(tmp: Path, out: Path) -> None:
    """Put the finished folder ``tmp`` at ``out`` in one step, and delete what ``out`` held.

    On Linux the two are swapped by one ``renameat2(RENAME_EXCHANGE)`` call: a reader sees the
    old folder or the new one, never neither.  Where the kernel or file system cannot swap, the
    old folder is renamed aside first (a moment with no folder at ``out``).
    """
    checkpoint()
    if out.exists() and _exchange(tmp, out):
        checkpoint()
        shutil.rmtree(tmp, ignore_errors=True)  # tmp's name now holds the old folder
    elif out.exists():
        old = out.parent / f".{out.name}.{uuid.uuid4().hex[:8]}.old"
        os.replace(out, old)
        checkpoint()
        os.replace(tmp, out)
        shutil.rmtree(old, ignore_errors=True)
    else:
        os.replace(tmp, out)
    _fsync_dir(out.parent)
    checkpoint()


def _exchange(a: Path, b: Path) -> bool:
    """Swap two paths atomically (Linux ``renameat2`` with ``RENAME_EXCHANGE``); False where unsupported."""
    import ctypes
    import errno
    import sys

    if not sys.platform.startswith("linux"):
        return False
    try:
        fn = ctypes.CDLL(None, use_errno=True).renameat2
    except (OSError, AttributeError):  # a C library without renameat2 (glibc < 2.28, musl < 1.2.?)
        return False
    fn.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
    fn.restype = ctypes.c_int
    at_fdcwd, rename_exchange = -100, 2  # <fcntl.h> AT_FDCWD, <linux/fs.h> RENAME_EXCHANGE
    if fn(at_fdcwd, os.fsencode(a), at_fdcwd, os.fsencode(b), rename_exchange) == 0:
        return True
    err = ctypes.get_errno()
    if err in (errno.ENOSYS, errno.EINVAL, errno.EOPNOTSUPP):
        return False
    raise OSError(err, os.strerror(err), str(b))


def read_parquet(path: str | os.PathLike[str], columns: list[str] | None = None) -> pa.Table:
    """One Parquet file as a table.  ``pq.read_table`` goes through pyarrow's dataset layer, whose import
    pulls in pandas (~0.2 s): more than a warm ``features`` run costs otherwise."""
    import pyarrow.parquet as pq

    with pq.ParquetFile(path) as f:
        return f.read(columns=columns)


def write_parquet_atomic(table: pa.Table, path: Path, row_group_size: int | None = None) -> None:
    checkpoint()
    tmp = path.with_name(f".{path.name}.{uuid.uuid4().hex}.tmp")
    import pyarrow.parquet as pq  # not at import: a query needs only DuckDB

    pq.write_table(table, tmp, compression="zstd", row_group_size=row_group_size)
    with open(tmp, "rb") as fh:
        os.fsync(fh.fileno())
    checkpoint()
    os.replace(tmp, path)
    checkpoint()


# --- reader leases --------------------------------------------------------------------------
# A reader (mapstore.open) records which snapshot files it serves in STORE/.readers/; writers'
# garbage collection keeps every file a live lease names.  A lease is live while its process runs
# (same host: pid and process start time; another host: for a day).

_LEASES = ".readers"
_LEASE_NAME = re.compile(r"^[0-9]+-[0-9a-f]{12}\.json$")
_OTHER_HOST_LEASE_S = 24 * 3600


def _start_time(pid: int) -> str | None:
    try:
        with open(f"/proc/{pid}/stat", "rb") as fh:
            return fh.read().rsplit(b")", 1)[1].split()[19].decode()  # field 22: start time in ticks
    except (OSError, IndexError):
        return None


def head_files(head: Head) -> dict[str, Any]:
    """The files a reader of ``head`` may open later (relative to the store)."""
    return {"catalog": head.catalog, "labels": head.labels.table if head.labels else None,
            "features": {n: {"rows": e.rows, "problems": e.problems, "copies": e.copies}
                         for n, e in head.features.items()}}


def take_lease(path: Path, head: Head) -> Path | None:
    """Record that this process reads ``head``; None when the store cannot be written (read-only)."""
    import socket

    doc = {"pid": os.getpid(), "start": _start_time(os.getpid()), "host": socket.gethostname(),
           "time": time.time(), **head_files(head)}
    folder = path / _LEASES
    f = folder / f"{os.getpid()}-{uuid.uuid4().hex[:12]}.json"
    try:
        folder.mkdir(exist_ok=True)
        tmp = folder / f".{f.name}.tmp"
        tmp.write_text(json.dumps(doc))
        os.replace(tmp, f)
    except OSError:
        return None
    return f


def release_lease(lease: Path | None) -> None:
    if lease is not None:
        with contextlib.suppress(OSError):
            lease.unlink()


def leased_files(path: Path) -> list[dict[str, Any]]:
    """The file sets of live leases; leases of ended processes are removed on the way."""
    import socket

    host = socket.gethostname()
    out = []  # type: ignore[var-annotated]
    folder = path / _LEASES
    if not folder.is_dir():
        return out
    for f in folder.iterdir():
        if not _LEASE_NAME.match(f.name):
            continue  # not a lease this code wrote: neither read nor deleted
        try:
            doc = json.loads(regular_file(f, "a reader's lease").read_text())
            if not isinstance(doc, dict):
                raise ValueError("not an object")
            if doc.get("host") == host:
                live = doc.get("start") is not None and _start_time(int(doc.get("pid", -1))) == doc.get("start")
            else:
                live = time.time() - float(doc.get("time", 0)) < _OTHER_HOST_LEASE_S
        except (OSError, ValueError, TypeError, OverflowError):
            continue  # unreadable or damaged (a FIFO, garbage): it protects nothing and is left alone
        if live:
            out.append(doc)
        else:
            with contextlib.suppress(OSError):
                f.unlink()
    return out


def commit_head(path: Path, head: Head, event: dict[str, Any]) -> None:
    """Publish ``head`` as the store's current state (the one atomic step of a write)."""
    head.history.append({"time": time.strftime("%Y-%m-%dT%H:%M:%S"), **event})
    write_json_atomic(path / "HEAD", head.to_json())
    _collect_garbage(path, head)
    checkpoint()


def _collect_garbage(path: Path, head: Head) -> None:
    # keep the current and the previous catalog snapshot (for readers still on it), every snapshot a
    # live lease names, and the maps parts those snapshots are made of
    cat = path / "catalog"
    if not cat.is_dir():
        return
    snaps = sorted((p for p in cat.iterdir() if p.is_dir() and not p.name.startswith(".") and p.name != "parts"),
                   key=lambda p: p.name)
    current = Path(head.catalog).name if head.catalog else None
    keep = {current} | {Path(d["catalog"]).name for d in leased_files(path) if d.get("catalog")}
    older = [p.name for p in snaps if p.name != current]
    if older:
        keep.add(older[-1])
    for p in snaps:
        if p.name not in keep:
            shutil.rmtree(p, ignore_errors=True)
    parts = path / PARTS_DIR
    if not parts.is_dir():
        return
    used: set[str] = set()
    for name in keep:
        if not (cat / name).is_dir():
            continue
        try:
            manifest = CatalogManifest.read(path, f"catalog/{name}")
        except (OSError, MapstoreError):
            return  # not sure what is in use: collect nothing
        for part in manifest.parts:
            used.update(Path(f).name for f in (part.maps, part.problems) if f)
    # only the writer (holding the lock) creates parts, so an unlisted one is left by a run that died
    for f in parts.iterdir():
        if f.name not in used:
            with contextlib.suppress(OSError):
                f.unlink()


class Catalog:
    """Read side of the catalog: a read-only DuckDB whose views read the snapshot's Parquet files.

    Nothing is loaded at open: each query reads the columns and row groups it needs
    (projection and filter pushdown), so opening a store of a million maps costs what
    reading its small HEAD costs.
    """

    TABLES = ("maps", "datasets", "participants", "problems", "labels")

    def __init__(self, path: str | os.PathLike[str], head: Head | None = None) -> None:
        self.path = Path(path).expanduser().absolute()
        if not self.path.exists():
            raise StoreNotFound(f"{self.path}: no such store; run 'mapstore index ROOT --store "
                                f"{self.path}' first")
        self.head = head if head is not None else read_head(self.path)
        self._given: dict[str, pa.Table] = {}
        self._con: Any = None  # a duckdb connection, made on the first query
        self._made: set[str] = set()  # the views made on it
        self._scratch = ""

    def close(self) -> None:
        """Close the DuckDB connection (opened again on the next query)."""
        if self._con is not None:
            self._con.close()
            self._con, self._made = None, set()
            shutil.rmtree(self._scratch, ignore_errors=True)

    def index_inputs(self) -> dict[str, Any] | None:
        """The name rules and origins the catalog snapshot was made with (``{"rules": [...], "origins":
        ...}``, each file as ``file``, ``sha256`` and parsed ``content``, a preset as ``{"preset": name}``),
        or None for a snapshot written before they were kept."""
        if not self.head.catalog:
            return None
        record = f"{self.head.catalog}/{INDEX_INPUTS_FILE}"
        try:
            path = store_file(self.path, record, "HEAD's catalog snapshot")
            doc = json.loads(path.read_text(encoding="utf-8"))
        except FileNotFoundError:
            return None
        except (OSError, ValueError) as exc:
            raise StoreCorrupt(f"{self.path / record}: unreadable ({exc}); re-run 'mapstore index'") from exc
        return check_index_inputs(doc, str(self.path / record))

    def require_catalog(self) -> None:
        """Raise :class:`~mapstore.errors.NoCatalog` when nothing has been indexed into the store."""
        if not self.head.catalog:
            raise NoCatalog(f"{self.path}: the store has no catalog yet; run 'mapstore index ROOT --store "
                            f"{self.path}' first")

    def manifest(self) -> CatalogManifest:
        """The maps parts of the opened snapshot."""
        if not self.head.catalog:
            return CatalogManifest()
        try:
            return CatalogManifest.read(self.path, self.head.catalog)
        except FileNotFoundError as exc:
            self._raise_missing(Path(exc.filename or self.head.catalog))
            raise

    def use_table(self, name: str, table: pa.Table) -> None:
        """Serve ``name`` from ``table`` instead of its file (labels derived for a newer catalog)."""
        if self._con is not None:
            raise RuntimeError("use_table must be called before the first query")
        self._given[name] = table

    def table(self, name: str) -> pa.Table:
        """A whole catalog table (all rows, all columns): prefer :meth:`sql` with a WHERE."""
        return self.sql(f'SELECT * FROM "{name}"')

    def _raise_missing(self, p: Path) -> None:
        """A file of the opened snapshot is gone: stale (the store moved on) or corrupt."""
        try:
            now = read_head(self.path)
        except MapstoreError:
            now = None
        if now is not None and now.to_json() != self.head.to_json():
            raise StaleSnapshot(f"{self.path}: the store changed since it was opened (index, features or labels "
                                f"ran) and the snapshot this reader serves was collected ({p.name}); open it "
                                "again with mapstore.open()")
        raise StoreCorrupt(f"{p}: catalog file missing; re-run 'mapstore index'")

    def connection(self, tables: "set[str] | None" = None):
        """A DuckDB connection with a view per table named in ``tables`` (every table when None), made
        on first use; file access limited to this store."""
        import duckdb

        if self._con is None:
            con = duckdb.connect(":memory:")
            con.execute("SET parquet_metadata_cache = true")
            # a query that spills writes into a folder of its own, removed with the connection
            self._scratch = tempfile.mkdtemp(prefix="mapstore-sql-")
            weakref.finalize(self, shutil.rmtree, self._scratch, True)
            con.execute(f"SET temp_directory = {_sql_str(self._scratch)}")
            # restricted before any view binds to a file (a view reads its Parquet footers)
            con.execute(f"SET allowed_directories = [{_sql_str(str(self.path) + os.sep)}]")
            con.execute("SET enable_external_access = false")
            con.execute("SET lock_configuration = true")
            self._con, self._made = con, set()
        # a view binds to its files when made (reads their footers): a query makes only the ones it reads
        wanted = set(VIEWS) if tables is None else {n for t in tables for n in VIEWS.get(t, ())}
        for group in dict.fromkeys(VIEWS[n][0] for n in wanted if n not in self._made):
            try:
                self._views(self._con, group)
            except duckdb.IOException as exc:  # a view binds to its files: a part may be gone
                self._io_error(exc)
            except duckdb.Error as exc:  # a damaged file (not Parquet, cut short)
                self._damaged(exc)
            self._made |= {n for n, made_by in VIEWS.items() if made_by[0] == group}
        return self._con

    def _io_error(self, exc: Exception) -> None:
        missing = _missing_file(str(exc))
        if missing is not None:
            self._raise_missing(Path(missing))
        raise StoreCorrupt(f"{self.path}: cannot read the catalog ({exc}); re-run 'mapstore index'") from exc

    def _damaged(self, exc: Exception) -> None:
        """A DuckDB error naming a file of this store: the file is damaged (StoreCorrupt, with the remedy)."""
        text = str(exc).splitlines()[0]
        hit = re.search(r"'([^']+)'|\"([^\"]+)\"", text)
        where = (hit.group(1) or hit.group(2)) if hit else str(self.path)
        raise StoreCorrupt(f"{where}: a store file is damaged ({text}); re-run 'mapstore index' (a catalog "
                           "file), 'mapstore labels' (labels) or 'mapstore features' (a feature set's rows)") from exc

    def _views(self, con, group: str) -> None:
        """The views of one group (see ``VIEWS``), reading the snapshot's files at query time."""
        views = _ViewBuilder(con, self)
        if group == "features":
            self._feature_views(views)
        elif group == "maps":
            manifest = self.manifest()
            files = [self.path / p.maps for p in manifest.parts]
            if any(p.schema != MAPS_SCHEMA_ID for p in manifest.parts) and "maps" not in self._given:
                views.older_files("maps", MAPS_SCHEMA, files)  # parts an earlier mapstore wrote
            else:
                views.files("maps", MAPS_SCHEMA, files)
            # the maps of one contrast of one model (effect, variance, t, z, p): names equal but for stat-<x>
            con.execute("CREATE VIEW map_families AS SELECT md5(dataset || '/' || regexp_replace(relpath, "
                        "'_stat-[^_/]+', '') || '#' || coalesce(CAST(map_index AS VARCHAR), ''))[:16] AS family, "
                        "map_id, stat, dataset, sub, ses, run, task, contrast, relpath FROM maps")
        elif group == "labels":
            labels = self.head.labels and self.path / self.head.labels.table
            views.files("labels", LABELS_SCHEMA, [labels] if labels else [])
        else:
            schema = {"datasets": DATASETS_SCHEMA, "problems": PROBLEMS_SCHEMA,
                      "participants": PARTICIPANTS_SCHEMA}[group]
            snap = self.path / self.head.catalog if self.head.catalog else None
            f = snap / f"{group}.parquet" if snap else None
            if f is not None and not f.exists() and group != "participants":
                self._raise_missing(f)
            views.files(group, schema, [f] if f is not None and f.exists() else [], loose=group == "participants")

    def _feature_views(self, views: "_ViewBuilder") -> None:
        """Views over every feature set: rows (``features``), failures, copies, and one row per set."""
        rows, probs, copies, sets = [], [], [], []  # type: ignore[var-annotated]
        for name, entry in sorted(self.head.features.items()):
            try:
                spec = FeatureSetSpec.read(self.path / entry.dir)
            except FileNotFoundError as exc:
                self._raise_missing(Path(exc.filename or entry.dir))
            except (OSError, ValueError) as exc:
                raise StoreCorrupt(f"{self.path / entry.dir}: feature set {name!r} unreadable ({exc}); "
                                   f"rebuild it with 'mapstore features --name {name}'") from exc
            for kind, out in (("rows", rows), ("problems", probs), ("copies", copies)):
                if getattr(entry, kind):
                    f = self.path / getattr(entry, kind)
                    if not f.exists():
                        self._raise_missing(f)
                    out.append((name, f))
            sets.append({"feature_set": name, "default": name == self.head.default_features,
                         "rows": entry.n_rows, "grid": spec.grid["name"], "grid_id": spec.grid_id,
                         "shape": spec.grid["shape"], "mask": spec.mask["name"], "n_voxels": spec.mask["n_voxels"],
                         "method": spec.method, "stat": spec.stat, "spec_id": spec.spec_id})
        # the sketch bytes are for the copy scan, not for SQL
        views.per_set("features", ROWS_SCHEMA, rows, exclude=("sketch",))
        views.per_set("feature_problems", FPROBLEMS_SCHEMA, probs)
        views.per_set("feature_copies", COPIES_SCHEMA, copies)
        if any(s["rows"] is None for s in sets):  # sets written before HEAD counted their rows
            counts = dict(views.con.sql("SELECT feature_set, count(*) FROM features GROUP BY ALL").fetchall())
            for s in sets:
                s["rows"] = counts.get(s["feature_set"], 0)
        views.literal("feature_sets", FEATURE_SETS_SCHEMA, sets)

    def sql(self, query: str) -> pa.Table:
        """Run one read-only SQL statement over the catalog views and return an Arrow table."""
        return self._run(query, lambda rel: rel.to_arrow_table())

    def stream(self, query: str, batch_rows: int = 65536) -> pa.RecordBatchReader:
        """Like :meth:`sql`, as a stream of Arrow record batches (for results larger than memory)."""
        return self._run(query, lambda rel: rel.to_arrow_reader(batch_rows))

    def _run(self, query: str, fetch):
        import duckdb

        con = self.connection(set())
        try:
            statements = con.extract_statements(query)
        except duckdb.Error as exc:
            raise QueryError(f"SQL does not parse: {str(exc).strip().splitlines()[0]}") from exc
        if len(statements) != 1:
            raise QueryError(f"give exactly one SQL statement, got {len(statements)}")
        kind = statements[0].type
        if kind == duckdb.StatementType.EXPLAIN:  # EXPLAIN ANALYZE runs what it explains: that must read only
            kind = _explained(con, statements[0].query)
        if kind != duckdb.StatementType.SELECT:
            raise QueryError(f"only read-only queries (SELECT, WITH ... SELECT) are allowed, "
                             f"got a {kind.name} statement; the catalog is changed by "
                             "'mapstore index', 'features' and 'labels'")
        self.connection(_tables_read(query))
        try:
            return fetch(con.sql(query))  # DuckDB runs the query (and opens the files) in fetch
        except duckdb.IOException as exc:
            self._io_error(exc)
        except duckdb.InvalidInputException as exc:
            if str(self.path) in str(exc):  # a file of the store, not the query, is at fault
                self._damaged(exc)
            raise QueryError(f"{str(exc).splitlines()[0]}") from exc
        except duckdb.Error as exc:
            raise QueryError(_one_line(exc, self.path)) from exc


# each view, and the group of views made together (the first name) with the views it reads
VIEWS: dict[str, tuple[str, ...]] = {
    "maps": ("maps",), "map_families": ("maps",), "datasets": ("datasets",), "problems": ("problems",),
    "participants": ("participants",), "labels": ("labels",), "features": ("features",),
    "feature_problems": ("features",), "feature_copies": ("features",), "feature_sets": ("features",)}


def _tables_read(query: str) -> set[str] | None:
    """The views ``query`` may read (every word naming one: a name in a string or a comment only makes one
    view too many), or None (all of them) when it may list or inspect the database."""
    words = set(re.findall(r"[a-z_][a-z0-9_]*", query.lower()))
    if words & {"show", "pragma", "describe", "summarize", "information_schema", "pg_catalog", "sqlite_master"} \
            or "duckdb_" in query.lower():
        return None
    return (words & set(VIEWS)) or None


def _one_line(exc: Exception, store: Path) -> str:
    """DuckDB's error as one line with a hint: never its candidate lists, caret lines or the query itself."""
    first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
    missing = re.search(r'Referenced column "([^"]+)" not found', first)
    if missing:
        return (f"{first.rstrip('!')}: no such column (a text value needs quotes: '{missing.group(1)}'); the views' "
                f"columns are listed by mapstore sql --store {store} \"DESCRIBE maps\"")
    return (f"{first} (views: maps, datasets, participants, problems, labels, features, feature_sets, "
            "feature_problems, feature_copies, map_families)")


_EXPLAIN = re.compile(r"^(?:\s+|--[^\n]*(?:\n|$)|/\*.*?\*/)*EXPLAIN\b"
                      r"(?:\s+|--[^\n]*(?:\n|$)|/\*.*?\*/|ANALY[SZ]E\b|\([^()]*\))*", re.IGNORECASE | re.DOTALL)


def _explained(con, query: str):
    """The statement type an EXPLAIN explains (a QueryError when it cannot be told)."""
    import duckdb

    hit = _EXPLAIN.match(query)
    try:
        inner = con.extract_statements(query[hit.end():]) if hit else []
    except duckdb.Error:
        inner = []
    if len(inner) != 1:
        raise QueryError("EXPLAIN is allowed in front of one SELECT only; write it as EXPLAIN [ANALYZE] SELECT ...")
    return inner[0].type


def _missing_file(message: str) -> str | None:
    import re

    hit = re.search(r'(?:No files found that match the pattern|[Cc]annot open file) "([^"]+)"', message)
    return hit.group(1) if hit else None


def _sql_str(text: str) -> str:
    return "'" + text.replace("'", "''") + "'"


_DUCK_TYPES = {pa.string(): "VARCHAR", pa.int32(): "INTEGER", pa.int64(): "BIGINT", pa.float64(): "DOUBLE",
               pa.bool_(): "BOOLEAN", pa.binary(): "BLOB"}


def _duck_type(t: pa.DataType) -> str:
    if pa.types.is_list(t):
        return _duck_type(t.value_type) + "[]"
    return _DUCK_TYPES[t]


def _sql_value(v: Any, t: pa.DataType) -> str:
    if v is None:
        return f"NULL::{_duck_type(t)}"
    if pa.types.is_list(t):
        return "[" + ", ".join(_sql_value(x, t.value_type) for x in v) + f"]::{_duck_type(t)}"
    if pa.types.is_boolean(t):
        return "true" if v else "false"
    if pa.types.is_string(t):
        return _sql_str(str(v))
    return f"{v!r}::{_duck_type(t)}"


class _ViewBuilder:
    """Creates the catalog's views: over Parquet files (read at query time) or small literal tables.

    Views are plain SQL: registering an Arrow table with DuckDB imports pandas (~0.2 s), which
    would be most of the cost of opening a store.
    """

    def __init__(self, con, cat: Catalog) -> None:
        self.con = con
        self.cat = cat
        self.real_paths = RealPaths()

    @staticmethod
    def _empty(schema: pa.Schema) -> str:
        return "SELECT " + ", ".join(f'NULL::{_duck_type(f.type)} AS "{f.name}"' for f in schema) + " WHERE false"

    def literal(self, name: str, schema: pa.Schema, rows: list[dict[str, Any]]) -> None:
        """A view holding ``rows`` (a few: one per feature set)."""
        if not rows:
            body = self._empty(schema)
        else:
            values = ", ".join("(" + ", ".join(_sql_value(r.get(f.name), f.type) for f in schema) + ")" for r in rows)
            names = ", ".join(f'"{f.name}"' for f in schema)
            body = f"SELECT * FROM (VALUES {values}) AS t({names})"
        self.con.execute(f'CREATE VIEW "{name}" AS {body}')

    def arrow(self, name: str, table: pa.Table) -> None:
        self.con.register(f"_t_{name}", table)
        self.con.execute(f'CREATE VIEW "{name}" AS SELECT * FROM "_t_{name}"')

    def _source(self, files: list[Path], loose: bool) -> str:
        """A FROM clause over the files (every file of a store has its table's current columns); each
        proven a regular file inside the store first."""
        for f in files:
            with contextlib.suppress(FileNotFoundError):  # a missing file is named by the query's error
                regular_file(inside_store(self.cat.path, f, "a catalog table", self.real_paths), "a catalog table")
        lst = "[" + ", ".join(_sql_str(str(f)) for f in files) + "]"
        if loose:  # participants: columns vary by store; every file's columns, whatever they are
            return f"read_parquet({lst}, union_by_name = true)"
        return f"read_parquet({lst})"

    def files(self, name: str, schema: pa.Schema, files: list[Path], loose: bool = False) -> None:
        if name in self.cat._given:
            self.arrow(name, self.cat._given[name])
        elif not files:
            self.con.execute(f'CREATE VIEW "{name}" AS {self._empty(schema)}')
        else:
            self.con.execute(f'CREATE VIEW "{name}" AS SELECT * FROM {self._source(files, loose)}')

    def older_files(self, name: str, schema: pa.Schema, files: list[Path]) -> None:
        """A view over files written with earlier versions of ``schema``: every column of the current one,
        null where a file predates it (until the next index writes the part again)."""
        source = self._source(files, loose=True)
        have = {r[0] for r in self.con.execute(f"DESCRIBE SELECT * FROM {source}").fetchall()}
        cols = ", ".join(f'"{f.name}"' if f.name in have else f'NULL::{_duck_type(f.type)} AS "{f.name}"'
                         for f in schema)
        self.con.execute(f'CREATE VIEW "{name}" AS SELECT {cols} FROM {source}')

    def per_set(self, name: str, schema: pa.Schema, files: list[tuple[str, Path]], exclude: tuple[str, ...] = ()
                ) -> None:
        """One view over a table of every feature set, with a ``feature_set`` column first."""
        if not files:
            empty = pa.schema([("feature_set", pa.string()), *[f for f in schema if f.name not in exclude]])
            self.con.execute(f'CREATE VIEW "{name}" AS {self._empty(empty)}')
            return
        drop = f" EXCLUDE ({', '.join(exclude)})" if exclude else ""
        parts = [f"SELECT {_sql_str(set_name)} AS feature_set, *{drop} FROM {self._source([f], False)}"
                 for set_name, f in files]
        self.con.execute(f'CREATE VIEW "{name}" AS ' + " UNION ALL ".join(parts))


def collect_feature_garbage(store: Path, set_dir: Path, current: str, previous: str | None) -> None:
    """Delete shards and rows tables that neither the current, the previous, nor a live reader's uses."""
    keep_tables = {Path(current).name} | ({Path(previous).name} if previous else set())
    for lease in leased_files(store):
        entry = (lease.get("features") or {}).get(set_dir.name) or {}
        if entry.get("rows"):
            keep_tables.add(Path(entry["rows"]).name)
    keep_tables = {t for t in keep_tables if (set_dir / t).exists()}
    used: set[str] = set()
    for t in keep_tables:
        used |= set(read_parquet(set_dir / t, columns=["shard"])["shard"].to_pylist())
    for p in set_dir.glob("rows-*.parquet"):
        if p.name not in keep_tables:
            p.unlink(missing_ok=True)
            for kind in ("problems-", "copies-"):
                (set_dir / p.name.replace("rows-", kind)).unlink(missing_ok=True)
    for p in (set_dir / "shards").glob("shard-*.npy"):
        if p.name not in used:
            p.unlink(missing_ok=True)
    for p in (set_dir / "shards").glob("*.tmp"):
        if time.time() - p.stat().st_mtime > 3600:  # left by a crashed run
            p.unlink(missing_ok=True)
