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
import shutil
import time
import uuid
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterator

import pyarrow as pa
import pyarrow.parquet as pq

from .errors import (MapstoreError, NoCatalog, QueryError, StaleSnapshot, StoreBusy, StoreCorrupt, StoreNotFound,
                     StoreUnwritable)

__all__ = [
    "STORE_FORMAT",
    "MAPS_SCHEMA",
    "DATASETS_SCHEMA",
    "PROBLEMS_SCHEMA",
    "ROWS_SCHEMA",
    "FPROBLEMS_SCHEMA",
    "Head",
    "write_lock",
    "read_head",
    "commit_head",
    "new_snapshot_id",
    "write_parquet_atomic",
    "write_json_atomic",
    "checkpoint",
    "Catalog",
    "conform",
    "ensure_store",
]

STORE_FORMAT = {"format": "mapstore-store", "version": 1}

_s, _i32, _i64, _f64 = pa.string(), pa.int32(), pa.int64(), pa.float64()
MAPS_SCHEMA = pa.schema([
    ("map_id", _s), ("dataset", _s), ("relpath", _s),
    ("sub", _s), ("ses", _s), ("task", _s), ("acq", _s), ("run", _s), ("rec", _s),
    ("space", _s), ("res", _s), ("desc", _s), ("contrast", _s), ("stat", _s), ("map_kind", _s),
    ("suffix", _s), ("extension", _s), ("entities", _s), ("named_by", _s),
    ("participant", _s), ("study", _s), ("site", _s), ("lab", _s),
    ("sha256", _s), ("nbytes", _i64), ("mtime_ns", _i64),
    ("nifti_version", _i32), ("endianness", _s), ("shape", pa.list_(_i64)), ("n_volumes", _i64),
    ("dtype", _s), ("bitpix", _i32), ("vox_offset", _i64),
    ("scl_slope", _f64), ("scl_inter", _f64), ("intent_code", _i32), ("intent_name", _s), ("intent_p1", _f64),
    ("qform_code", _i32), ("sform_code", _i32), ("affine_source", _s),
    ("affine", pa.list_(_f64)), ("voxel_size", pa.list_(_f64)), ("orientation", _s),
    ("grid_id", _s), ("descrip", _s), ("dof", _f64), ("dof_source", _s), ("model_mask", _s),
    ("model_mask_sha256", _s), ("metadata", _s), ("sidecars", pa.list_(_s)),
    ("header_warnings", pa.list_(_s)),
])
DATASETS_SCHEMA = pa.schema([
    ("dataset", _s), ("name", _s), ("study", _s), ("root", _s), ("dataset_type", _s),
    ("generated_by", _s), ("bids_version", _s), ("raw_root", _s), ("raw_name", _s),
    ("participants_file", _s), ("n_maps", _i64), ("description", _s),
])
ROWS_SCHEMA = pa.schema([
    ("map_id", _s), ("feature_key", _s), ("sha256", _s),
    ("shard", _s), ("row", _i64), ("coverage", _f64),
    ("stat_in", _s), ("stat_out", _s), ("conversion", _s),
    ("resample_path", _s), ("built_at", _s), ("row_sha256", _s),
    ("vmin", _f64), ("vmax", _f64), ("vmean", _f64),
    ("missing_from", _s), ("p_clipped", _i64), ("sketch", pa.binary()),
])
_ROWS_VIEW_SCHEMA = pa.schema([f for f in ROWS_SCHEMA if f.name != "sketch"])
# pairs of rows of one feature set that are copies (written by features, read by check and export)
COPIES_SCHEMA = pa.schema([("map_a", _s), ("map_b", _s), ("kind", _s), ("r", _f64), ("n_common", _i64)])
FPROBLEMS_SCHEMA = pa.schema([
    ("map_id", _s), ("path", _s), ("code", _s), ("reason", _s),
    ("remedy", _s),
])


PROBLEMS_SCHEMA = pa.schema([
    ("path", _s), ("dataset", _s), ("code", _s), ("level", _s), ("stage", _s),
    ("reason", _s), ("remedy", _s),
])


@dataclass
class Head:
    """What the store currently serves: one catalog snapshot and the feature sets."""

    catalog: str | None = None
    features: dict[str, dict[str, Any]] = field(default_factory=dict)
    default_features: str | None = None
    labels: dict[str, Any] | None = None
    history: list[dict[str, Any]] = field(default_factory=list)

    def to_json(self) -> dict[str, Any]:
        return {"catalog": self.catalog, "features": self.features,
                "default_features": self.default_features, "labels": self.labels,
                "history": self.history[-50:]}

    @classmethod
    def from_json(cls, doc: dict[str, Any]) -> "Head":
        return cls(doc.get("catalog"), dict(doc.get("features") or {}), doc.get("default_features"),
                   doc.get("labels"), list(doc.get("history") or []))


def new_snapshot_id() -> str:
    """Ids sort in creation order (to the microsecond), which garbage collection relies on."""
    now = time.time_ns()
    return time.strftime("%Y%m%dT%H%M%S", time.gmtime(now // 10 ** 9)) + f".{now // 1000 % 10 ** 6:06d}-" + \
        uuid.uuid4().hex[:8]


def ensure_store(path: str | os.PathLike[str]) -> Path:
    """Create an empty store folder (or check an existing one) and return its path."""
    p = Path(path).expanduser().absolute()
    marker = p / "store.json"
    if p.exists() and not p.is_dir():
        raise StoreCorrupt(f"{p}: exists and is not a folder; choose another --store path")
    if p.is_dir() and not marker.exists():
        # a creation killed before its marker was in place leaves only its temporary marker
        for left in p.glob(".store.json.*.tmp"):
            with contextlib.suppress(OSError):
                left.unlink()
        if any(p.iterdir()):
            raise StoreCorrupt(f"{p}: folder exists, is not empty and is not a mapstore store; "
                               "choose an empty or new folder for --store")
    try:
        p.mkdir(parents=True, exist_ok=True)
        if not marker.exists():
            write_json_atomic(marker, STORE_FORMAT)
    except OSError as exc:
        raise StoreUnwritable(f"{p}: cannot create the store here ({exc.strerror}); choose a folder you can "
                              "write (--store)") from None
    return p


def _check_store(p: Path) -> None:
    marker = p / "store.json"
    if not marker.exists():
        raise StoreNotFound(f"{p}: no mapstore store here (no store.json); run 'mapstore index ROOT "
                            f"--store {p}' first")
    try:
        doc = json.loads(marker.read_text())
    except (OSError, ValueError) as exc:
        raise StoreCorrupt(f"{marker}: unreadable store marker ({exc})") from None
    if doc.get("format") != STORE_FORMAT["format"] or doc.get("version", 0) > STORE_FORMAT["version"]:
        raise StoreCorrupt(f"{marker}: store format {doc} is not one this mapstore reads "
                           f"({STORE_FORMAT}); upgrade mapstore")


@contextlib.contextmanager
def write_lock(path: Path) -> Iterator[None]:
    """Hold the store's single-writer lock, failing at once if another process has it."""
    try:
        lock = open(path / ".lock", "a+")
    except OSError as exc:
        raise StoreUnwritable(f"{path}: this store cannot be written from here ({exc.strerror}); reading it "
                              "(sql, check, export to a folder of yours, verify) works. Ask whoever owns it to "
                              "run this, or copy the store to a folder you can write") from None
    try:
        try:
            fcntl.flock(lock.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            raise StoreBusy(f"{path}: another mapstore process is writing to this store; "
                            "wait for it to finish and run the command again") from None
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
        return Head.from_json(json.loads(f.read_text()))
    except (OSError, ValueError) as exc:
        raise StoreCorrupt(f"{f}: unreadable ({exc}); restore it from a backup or re-index") from None


def _fsync_dir(path: Path) -> None:
    with contextlib.suppress(OSError):
        fd = os.open(path, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


def checkpoint() -> None:
    """A point where a crash must leave the store consistent; a test hook can kill the process here.

    With ``MAPSTORE_TEST_KILL_COUNTER=FILE`` and ``MAPSTORE_TEST_KILL_AFTER=N`` set, every
    checkpoint (in any process) adds a byte to FILE and the N-th one sends this process SIGKILL.
    Unset, it costs one environment lookup.
    """
    counter = os.environ.get("MAPSTORE_TEST_KILL_COUNTER")
    if not counter:
        return
    with open(counter, "ab") as fh:
        fh.write(b".")
    if os.path.getsize(counter) >= int(os.environ.get("MAPSTORE_TEST_KILL_AFTER", "0") or 0) > 0:
        import signal

        os.kill(os.getpid(), signal.SIGKILL)


def write_json_atomic(path: Path, doc: Any) -> None:
    checkpoint()
    tmp = path.with_name(f".{path.name}.{uuid.uuid4().hex}.tmp")
    with open(tmp, "w") as fh:
        json.dump(doc, fh, indent=1, sort_keys=True, default=str)
        fh.flush()
        os.fsync(fh.fileno())
    checkpoint()
    os.replace(tmp, path)
    _fsync_dir(path.parent)
    checkpoint()


def write_parquet_atomic(table: pa.Table, path: Path) -> None:
    checkpoint()
    tmp = path.with_name(f".{path.name}.{uuid.uuid4().hex}.tmp")
    pq.write_table(table, tmp, compression="zstd")
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
_OTHER_HOST_LEASE_S = 24 * 3600


def _start_time(pid: int) -> str | None:
    try:
        with open(f"/proc/{pid}/stat", "rb") as fh:
            return fh.read().rsplit(b")", 1)[1].split()[19].decode()  # field 22: start time in ticks
    except (OSError, IndexError):
        return None


def head_files(head: Head) -> dict[str, Any]:
    """The files a reader of ``head`` may open later (relative to the store)."""
    return {"catalog": head.catalog, "labels": (head.labels or {}).get("table"),
            "features": {n: {k: e.get(k) for k in ("rows", "problems", "copies")} for n, e in head.features.items()}}


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
    out = []
    folder = path / _LEASES
    if not folder.is_dir():
        return out
    for f in folder.glob("*.json"):
        try:
            doc = json.loads(f.read_text())
        except (OSError, ValueError):
            continue
        if doc.get("host") == host:
            live = doc.get("start") is not None and _start_time(int(doc.get("pid", -1))) == doc.get("start")
        else:
            live = time.time() - float(doc.get("time", 0)) < _OTHER_HOST_LEASE_S
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
    # keep the current and the previous catalog snapshot, for readers still on it
    cat = path / "catalog"
    if not cat.is_dir():
        return
    snaps = sorted((p for p in cat.iterdir() if p.is_dir() and not p.name.startswith(".")),
                   key=lambda p: p.name)
    current = Path(head.catalog).name if head.catalog else None
    keep = {current} | {Path(d["catalog"]).name for d in leased_files(path) if d.get("catalog")}
    older = [p.name for p in snaps if p.name != current]
    if older:
        keep.add(older[-1])
    for p in snaps:
        if p.name not in keep:
            shutil.rmtree(p, ignore_errors=True)


class Catalog:
    """Read side of the catalog: Arrow tables and a read-only DuckDB over them."""

    TABLES = ("maps", "datasets", "participants", "problems", "labels")

    def __init__(self, path: str | os.PathLike[str]) -> None:
        self.path = Path(path).expanduser().absolute()
        if not self.path.exists():
            raise StoreNotFound(f"{self.path}: no such store; run 'mapstore index ROOT --store "
                                f"{self.path}' first")
        self.head = read_head(self.path)
        self._tables: dict[str, pa.Table] = {}
        self._con = None

    def require_catalog(self) -> None:
        """Raise :class:`~mapstore.errors.NoCatalog` when nothing has been indexed into the store."""
        if not self.head.catalog:
            raise NoCatalog(f"{self.path}: the store has no catalog yet; run 'mapstore index ROOT --store "
                            f"{self.path}' first")

    def table_path(self, name: str) -> Path | None:
        if name == "labels":
            if not self.head.labels:
                return None
            return self.path / self.head.labels["table"]
        if not self.head.catalog:
            return None
        return self.path / self.head.catalog / f"{name}.parquet"

    def table(self, name: str) -> pa.Table:
        if name not in self._tables:
            p = self.table_path(name)
            if p is None or not p.exists():
                if p is not None and self.head.catalog:
                    if name != "participants":
                        self._raise_missing(p)
                self._tables[name] = _empty(name)
            else:
                try:
                    self._tables[name] = pq.read_table(p, memory_map=True)
                except (OSError, pa.ArrowException) as exc:
                    raise StoreCorrupt(f"{p}: cannot read ({exc}); re-run 'mapstore index'") from None
        return self._tables[name]

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

    def connection(self):
        """A DuckDB connection with one view per catalog table, no file access beyond them."""
        if self._con is None:
            import duckdb

            con = duckdb.connect(":memory:")
            for name in self.TABLES:
                con.register(f"_t_{name}", self.table(name))
                con.execute(f'CREATE VIEW "{name}" AS SELECT * FROM "_t_{name}"')
            for view, table in self._feature_tables().items():
                con.register(f"_t_{view}", table)
                con.execute(f'CREATE VIEW "{view}" AS SELECT * FROM "_t_{view}"')
            con.execute("SET enable_external_access = false")
            con.execute("SET lock_configuration = true")
            self._con = con
        return self._con

    def _feature_tables(self) -> dict[str, pa.Table]:
        """Views over every feature set: rows (``features``), failures, and one row per set."""
        rows, probs, sets, copies = [], [], [], []
        for name, entry in sorted(self.head.features.items()):
            try:
                # the sketch bytes are for the copy scan, not for SQL
                r = conform(pq.read_table(self.path / entry["rows"]), _ROWS_VIEW_SCHEMA)
                p = pq.read_table(self.path / entry["problems"])
                if entry.get("copies"):
                    c = pq.read_table(self.path / entry["copies"])
                    copies.append(c.add_column(0, "feature_set", pa.array([name] * c.num_rows, pa.string())))
                spec = json.loads((self.path / entry["dir"] / "set.json").read_text())
            except FileNotFoundError as exc:
                self._raise_missing(Path(exc.filename or entry["rows"]))
            except (OSError, ValueError, pa.ArrowException) as exc:
                raise StoreCorrupt(f"{self.path / entry['dir']}: feature set {name!r} unreadable ({exc}); "
                                   f"rebuild it with 'mapstore features --name {name}'") from None
            rows.append(r.add_column(0, "feature_set", pa.array([name] * r.num_rows, pa.string())))
            probs.append(p.add_column(0, "feature_set", pa.array([name] * p.num_rows, pa.string())))
            sets.append({"feature_set": name, "default": name == self.head.default_features,
                         "rows": r.num_rows, "grid": spec["grid"]["name"], "grid_id": spec["grid_id"],
                         "shape": spec["grid"]["shape"], "mask": spec["mask"]["name"],
                         "n_voxels": spec["mask"]["n_voxels"], "method": spec["method"],
                         "stat": spec["stat"], "spec_id": spec["spec_id"]})
        def union(parts: list[pa.Table], schema: pa.Schema) -> pa.Table:
            if parts:
                return pa.concat_tables(parts)
            return pa.schema([("feature_set", pa.string()), *schema]).empty_table()

        sets_schema = pa.schema([("feature_set", _s), ("default", pa.bool_()), ("rows", _i64), ("grid", _s),
                                 ("grid_id", _s), ("shape", pa.list_(_i64)), ("mask", _s), ("n_voxels", _i64),
                                 ("method", _s), ("stat", _s), ("spec_id", _s)])
        return {"features": union(rows, _ROWS_VIEW_SCHEMA),
                "feature_problems": union(probs, FPROBLEMS_SCHEMA),
                "feature_sets": pa.Table.from_pylist(sets, schema=sets_schema),
                "feature_copies": union(copies, COPIES_SCHEMA)}

    def sql(self, query: str) -> pa.Table:
        """Run one read-only SQL statement over the catalog views and return an Arrow table."""
        import duckdb

        con = self.connection()
        try:
            statements = con.extract_statements(query)
        except duckdb.Error as exc:
            raise QueryError(f"SQL does not parse: {exc}") from None
        if len(statements) != 1:
            raise QueryError(f"give exactly one SQL statement, got {len(statements)}")
        kind = statements[0].type
        if kind not in (duckdb.StatementType.SELECT, duckdb.StatementType.EXPLAIN):
            raise QueryError(f"only read-only queries (SELECT, WITH ... SELECT) are allowed, "
                             f"got a {kind.name} statement; the catalog is changed by "
                             "'mapstore index', 'features' and 'labels'")
        try:
            return con.sql(query).to_arrow_table()
        except duckdb.Error as exc:
            raise QueryError(f"{exc}\n(views: {', '.join(self.TABLES)}, features, feature_sets, "
                             f"feature_problems, feature_copies; see 'mapstore sql --store "
                             f"{self.path} \"DESCRIBE maps\"')") from None


def conform(table: pa.Table, schema: pa.Schema) -> pa.Table:
    """A table with exactly ``schema``'s columns: ones added since it was written are null."""
    cols = [table[f.name].cast(f.type) if f.name in table.column_names else pa.nulls(table.num_rows, f.type)
            for f in schema]
    return pa.Table.from_arrays(cols, schema=schema)


def _empty(name: str) -> pa.Table:
    schema = {"maps": MAPS_SCHEMA, "datasets": DATASETS_SCHEMA, "problems": PROBLEMS_SCHEMA}.get(name)
    if schema is None:
        if name == "labels":
            schema = pa.schema([("map_id", _s), ("concept", _s), ("direct", pa.bool_()),
                                ("rule", _i32), ("vocabulary_sha256", _s)])  # = labels.LABELS_SCHEMA
        else:
            schema = pa.schema([("dataset", _s), ("participant_id", _s), ("sub", _s),
                                ("participant", _s)])
    return schema.empty_table()
