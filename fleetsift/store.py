"""The results store: Delta Lake tables (`runs`, `recordings`, `windows`), the stage cache and the write lock.

Layout of a store folder:
    runs/ recordings/ windows/     Delta tables (deltalake), one appended version per run
    cache/<stage>/<key>.npz        stage outputs, content-addressed (see `stage_key`)
    baselines/<baseline_id>.npz    every baseline a score was measured against
    catalog.json                   file content hashes keyed by (path, size, mtime) so warm runs do not re-hash
    prefect/                       Prefect's home for runs against the embedded temporary server
    reports/                       HTML reports
    .lock                          held by the one writer (an fcntl lock locally, a lock object on object storage)

The store may live on object storage (`s3://bucket/prefix`, see fleetsift.location): the Delta tables then go
through deltalake's object-store support, everything else is one object per file.
"""

from __future__ import annotations

import ast
import contextlib
import errno
import fcntl
import hashlib
import importlib.util
import inspect
import io
import json
import os
import shutil
import tempfile
import time
from pathlib import Path
from typing import Any, Iterator

import numpy as np
import pandas as pd
import pyarrow as pa

from fleetsift import __version__, codebase
from fleetsift.errors import StoreLockedError
from fleetsift.location import ObjectPath, delta_options, location, resolved, write_atomic
from fleetsift.profile import Storage
from fleetsift.vocabulary import LEGACY_STATUSES

TABLE_SCHEMAS: dict[str, pa.Schema] = {
    "runs": pa.schema([
        ("run_id", pa.string()),
        ("started_at", pa.timestamp("us", tz="UTC")),
        ("finished_at", pa.timestamp("us", tz="UTC")),
        ("code_version", pa.string()),  # deprecated: the fleetsift package version, see fleetsift_version
        ("profile_hash", pa.string()),
        ("baseline_id", pa.string()),
        ("n_recordings", pa.int64()),
        ("n_scored", pa.int64()),
        ("n_unscored", pa.int64()),
        ("n_windows", pa.int64()),
        ("n_flagged", pa.int64()),
        ("status", pa.string()),
        ("inbox", pa.string()),
        # Added in 0.2 (older rows read as empty): what the night's scores were measured against.
        ("baseline_source", pa.string()),
        ("n_references", pa.int64()),
        ("space_key", pa.string()),
        ("score_output", pa.string()),  # the score stage's bank, relative to the store: later nights' references
        ("fleetsift_version", pa.string()),  # added in 0.3: the package version that wrote the run
    ]),
    "recordings": pa.schema([
        ("run_id", pa.string()),
        ("recording_id", pa.string()),
        ("content_hash", pa.string()),
        ("duration_s", pa.float64()),
        ("status", pa.string()),
        ("reason", pa.string()),
        ("path", pa.string()),
    ]),
    "windows": pa.schema([
        ("run_id", pa.string()),
        ("recording_id", pa.string()),
        ("window_index", pa.int64()),
        ("t_start_s", pa.float64()),
        ("t_end_s", pa.float64()),
        ("metric", pa.string()),
        ("score", pa.float64()),
        ("threshold", pa.float64()),
        ("flagged", pa.bool_()),
        ("top_channels", pa.string()),
        ("baseline_id", pa.string()),
    ]),
    # Engineers' verdicts on windows (window_index -1: the whole recording); the latest per window counts.
    "reviews": pa.schema([
        ("review_id", pa.string()),
        ("reviewed_at", pa.timestamp("us", tz="UTC")),
        ("run_id", pa.string()),
        ("recording_id", pa.string()),
        ("content_hash", pa.string()),
        ("window_index", pa.int64()),
        ("t_start_s", pa.float64()),
        ("t_end_s", pa.float64()),
        ("verdict", pa.string()),
        ("note", pa.string()),
        ("reviewer", pa.string()),
    ]),
}
# The column that makes a retried append a no-op.
TABLE_KEYS = {"runs": "run_id", "recordings": "run_id", "windows": "run_id", "reviews": "review_id"}
TABLES = tuple(TABLE_SCHEMAS)


def code_version(*objects: Any) -> str:
    """A stage's code version: the hash of the source of what it runs (so an edit invalidates its cache).

    Each object is a module of the package by dotted name (its source file is read without importing it, so
    building a key for the embedding stage does not load torch), ``"module:function"`` for one function of such
    a module, or any other object, whose source ``inspect`` finds.
    """
    h = hashlib.sha256(__version__.encode())
    for obj in objects:
        if isinstance(obj, str):
            h.update(obj.encode())
            h.update(_source_of(obj).encode())
        else:
            try:
                h.update(inspect.getsource(obj).encode())
            except (OSError, TypeError):
                h.update(repr(obj).encode())
    return h.hexdigest()[:16]


def _source_of(name: str) -> str:
    module, _, function = name.partition(":")
    if module in codebase.module_files():
        src = codebase.read_source(module)
    else:
        spec = importlib.util.find_spec(module)
        if spec is None or not spec.origin or not Path(spec.origin).is_file():
            raise ValueError(f"code_version: no source file for module {module!r}")
        src = Path(spec.origin).read_text(encoding="utf-8")
    if not function:
        return src
    for node in ast.parse(src).body:
        if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef)) and node.name == function:
            return ast.get_source_segment(src, node) or ""
    raise ValueError(f"code_version: {module} has no top-level function {function!r}")


def stage_key(stage: str, content_hash: str, section: Any, version: str) -> str:
    """Cache key = hash(recording content, the profile section the stage reads, the stage's code version)."""
    blob = json.dumps({"stage": stage, "content": content_hash, "section": section, "code": version},
                      sort_keys=True, default=str)
    return hashlib.sha256(blob.encode()).hexdigest()[:24]


def _atomic_write_bytes(path: Path, data: bytes) -> None:
    write_atomic(path, data)


class RowWriter:
    """Rows of one 2-D array appended to a temporary file as they come, then written with small arrays into an
    ``.npz`` atomically: memory stays flat however many rows there are (np.savez needs the whole array).

    The .npz is what np.savez writes (an uncompressed zip of .npy members), so ``Store.load_arrays`` and
    ``np.load`` read it; nothing appears at ``path`` before ``commit``, and ``abort`` (or an exception inside
    ``with``) removes the temporary file."""

    def __init__(self, path: "str | Path | ObjectPath", name: str, width: int, dtype: Any = np.float32):
        self.path = path if isinstance(path, ObjectPath) else Path(path)
        self.name, self.width, self.dtype = name, int(width), np.dtype(dtype)
        # An object is put whole at commit: its rows gather in the local temporary folder meanwhile.
        self._dir = Path(tempfile.gettempdir()) if isinstance(self.path, ObjectPath) else self.path.parent
        self._dir.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(dir=self._dir, prefix=f".{self.path.name}.", suffix=".rows.tmp")
        self._tmp = Path(tmp)
        self._fh = os.fdopen(fd, "wb")
        self.n = 0

    def append(self, rows: np.ndarray) -> None:
        rows = np.ascontiguousarray(rows, dtype=self.dtype).reshape(-1, self.width)
        self._fh.write(rows.tobytes())
        self.n += len(rows)

    def commit(self, **small: Any) -> Path:
        import zipfile

        self._fh.close()
        fd, tmp = tempfile.mkstemp(dir=self._dir, prefix=f".{self.path.name}.", suffix=".tmp")
        os.close(fd)
        try:
            with zipfile.ZipFile(tmp, "w", zipfile.ZIP_STORED, allowZip64=True) as zf:
                for key, value in small.items():
                    with zf.open(f"{key}.npy", "w", force_zip64=True) as f:
                        np.lib.format.write_array(f, np.asanyarray(value), allow_pickle=False)
                with zf.open(f"{self.name}.npy", "w", force_zip64=True) as f:
                    header = {"descr": np.lib.format.dtype_to_descr(self.dtype), "fortran_order": False,
                              "shape": (self.n, self.width)}
                    np.lib.format.write_array_header_2_0(f, header)
                    with open(self._tmp, "rb") as src:
                        shutil.copyfileobj(src, f, 1 << 22)
            if isinstance(self.path, ObjectPath):
                with open(tmp, "rb") as src, self.path.open("wb") as dst:
                    shutil.copyfileobj(src, dst, 1 << 22)
            else:
                with open(tmp, "rb+") as f:
                    os.fsync(f.fileno())
                os.replace(tmp, self.path)
        finally:
            with contextlib.suppress(FileNotFoundError):
                os.unlink(tmp)
            self.abort()
        return self.path

    def abort(self) -> None:
        self._fh.close()
        with contextlib.suppress(FileNotFoundError):
            os.unlink(self._tmp)

    def __enter__(self) -> "RowWriter":
        return self

    def __exit__(self, *exc) -> None:
        self.abort()


class Store:
    def __init__(self, root: "str | Path | ObjectPath", storage: Storage | None = None):
        self.root = resolved(root, storage)
        self.remote = isinstance(self.root, ObjectPath)
        self.storage = self.root.storage if self.remote else (storage or Storage())
        self.delta_options = delta_options(self.root.protocol, self.storage) if self.remote else None

    def _table(self, name: str, version: int | None = None):
        from deltalake import DeltaTable

        return DeltaTable(str(self.table_path(name)), version=version, storage_options=self.delta_options)

    def has_table(self, name: str) -> bool:
        return (self.table_path(name) / "_delta_log").exists()

    # --- folders --------------------------------------------------------------------------------------------------
    def init(self) -> "Store":
        # Every stage's cache folder exists up front: a stage that writes a temporary file next to its output
        # must not depend on an earlier atomic write having created the folder.
        for sub in ("cache/tables", "cache/embed", "cache/score", "baselines", "prefect", "reports"):
            (self.root / sub).mkdir(parents=True, exist_ok=True)
        return self

    def table_path(self, name: str) -> Path:
        return self.root / name

    def cache_path(self, stage: str, key: str) -> "Path | ObjectPath":
        return self.root / "cache" / stage / f"{key}.npz"

    # --- lock -----------------------------------------------------------------------------------------------------
    @contextlib.contextmanager
    def lock(self, wait_s: float = 0.0) -> Iterator[None]:
        """One writer at a time. Waits up to wait_s, then refuses with a message naming the holder."""
        if self.remote:
            from fleetsift.objectlock import ObjectLock

            with ObjectLock(self.root / ".lock", ttl_s=self.storage.lock_ttl_s).held(wait_s):
                yield
            return
        self.root.mkdir(parents=True, exist_ok=True)
        path = self.root / ".lock"
        fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
        deadline = time.monotonic() + wait_s
        try:
            while True:
                try:
                    fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
                    break
                except OSError as e:
                    if e.errno not in (errno.EAGAIN, errno.EACCES):
                        raise
                    if time.monotonic() >= deadline:
                        holder = os.pread(fd, 200, 0).decode(errors="replace").strip() or "another process"
                        raise StoreLockedError(
                            f"{self.root}: the store is being written by {holder}; wait for it to finish "
                            f"(or pass --wait SECONDS) and run again") from None
                    time.sleep(0.2)
            os.ftruncate(fd, 0)
            os.pwrite(fd, f"pid {os.getpid()} since {time.strftime('%Y-%m-%d %H:%M:%S')}".encode(), 0)
            yield
        finally:
            with contextlib.suppress(OSError):
                fcntl.flock(fd, fcntl.LOCK_UN)
            os.close(fd)

    # --- arrays ---------------------------------------------------------------------------------------------------
    def row_writer(self, path: "Path | ObjectPath", name: str, width: int, dtype: Any = np.float32) -> RowWriter:
        """A writer of one large 2-D array that never holds it in memory (see RowWriter)."""
        return RowWriter(path, name, width, dtype)

    def save_arrays(self, path: "Path | ObjectPath", **arrays: Any) -> "Path | ObjectPath":
        buf = io.BytesIO()
        np.savez(buf, **arrays)
        _atomic_write_bytes(path, buf.getvalue())
        return path

    @staticmethod
    def load_arrays(path: "str | Path | ObjectPath") -> dict[str, np.ndarray]:
        path = location(path)
        src = io.BytesIO(path.read_bytes()) if isinstance(path, ObjectPath) else path
        with np.load(src, allow_pickle=False) as z:
            return {k: z[k] for k in z.files}

    # --- content hashes -------------------------------------------------------------------------------------------
    def file_hash(self, path: "str | Path | ObjectPath") -> str:
        """sha256 of a file, remembered by (path, size, mtime_ns) so an unchanged file is hashed once.

        An object is remembered by (URL, size, ETag) instead, and hashed by streaming it once: its content hash is
        then the same as a local copy's (reviews and history follow a recording moved to a bucket), and a warm
        night reads no recording, only its listing. The ETag alone is not taken as the content hash: a multipart
        upload's ETag is not a digest of the content, so the same bytes uploaded twice could differ.
        """
        path = resolved(path)
        catalog_path = self.root / "catalog.json"
        try:
            catalog = json.loads(catalog_path.read_text())
        except (FileNotFoundError, json.JSONDecodeError):
            catalog = {}
        if isinstance(path, ObjectPath):
            sig = path.signature()
        else:
            st = path.stat()
            sig = f"{st.st_size}:{st.st_mtime_ns}"
        entry = catalog.get(str(path))
        if entry and entry.get("sig") == sig:
            return entry["sha256"]
        h = hashlib.sha256()
        with path.open("rb") as f:
            for chunk in iter(lambda: f.read(1 << 20), b""):
                h.update(chunk)
        digest = h.hexdigest()
        catalog[str(path)] = {"sig": sig, "sha256": digest}
        _atomic_write_bytes(catalog_path, json.dumps(catalog, indent=0).encode())
        return digest

    # --- Delta tables ---------------------------------------------------------------------------------------------
    def has_run(self, table: str, run_id: str, column: str = "run_id") -> bool:
        import pyarrow.dataset as ds

        if not self.has_table(table):
            return False
        dataset = self._table(table).to_pyarrow_dataset()
        return dataset.count_rows(filter=ds.field(column) == run_id) > 0

    def append(self, table: str, df: pd.DataFrame) -> int | None:
        """Append one run's rows (one review's, for `reviews`); a retried write of the same run_id (review_id) is a
        no-op (idempotent). Columns added to a table's schema in a later release are merged into older tables."""
        from deltalake import write_deltalake

        schema = TABLE_SCHEMAS[table]
        if df.empty:
            return None
        key = TABLE_KEYS[table]
        ids = df[key].unique()
        assert len(ids) == 1, f"one {key} per append"
        if self.has_run(table, str(ids[0]), key):
            return None
        for f in schema:
            if f.name not in df.columns:
                df = df.assign(**{f.name: None})
        df = df[[f.name for f in schema]].copy()
        for f in schema:
            if pa.types.is_timestamp(f.type):
                # The tables hold microseconds; a pandas timestamp built from time.time() carries nanoseconds,
                # which pyarrow's safe cast refuses ("would lose data"). Truncate explicitly, nothing else.
                df[f.name] = pd.to_datetime(df[f.name], utc=True).dt.floor("us")
        arrow = pa.Table.from_pandas(df, schema=schema, preserve_index=False)
        _check_lock(self.root)
        write_deltalake(str(self.table_path(table)), arrow, mode="append", schema_mode="merge",
                        storage_options=self.delta_options)
        return self.version(table)

    def version(self, table: str = "runs") -> int | None:

        if not self.has_table(table):
            return None
        return self._table(table).version()

    def read(self, table: str, version: int | None = None, run_id: str | None = None) -> pd.DataFrame:
        import pyarrow.dataset as ds

        if not self.has_table(table):
            return TABLE_SCHEMAS[table].empty_table().to_pandas()
        dataset = self._table(table, version).to_pyarrow_dataset()
        flt = ds.field("run_id") == run_id if run_id else None
        df = dataset.to_table(filter=flt).to_pandas()
        for f in TABLE_SCHEMAS[table]:  # a version written before a column was added
            if f.name not in df.columns:
                df[f.name] = None
        # Stores written before 0.3 said "quarantined" for an unscored recording.
        if "n_quarantined" in df.columns:
            df["n_unscored"] = df["n_unscored"].fillna(df.pop("n_quarantined"))
        if table == "runs":
            df["fleetsift_version"] = df["fleetsift_version"].fillna(df["code_version"])
        if "status" in df.columns:
            df["status"] = df["status"].replace(LEGACY_STATUSES)
        return df

    def run_ids(self, table: str) -> set[str]:
        """The distinct run_ids in one table (current version)."""

        if not self.has_table(table):
            return set()
        col = self._table(table).to_pyarrow_dataset().to_table(columns=["run_id"]).column("run_id")
        return set(col.unique().to_pylist())

    def orphan_runs(self) -> dict[str, set[str]]:
        """Per table, the run_ids whose `runs` row (the run's commit marker, appended last) is missing.

        A run killed between its appends leaves such rows; they belong to no completed run. Readers select rows
        by a run_id taken from `runs`, so they never see them; `remove_orphans` deletes them.
        """
        done = self.run_ids("runs")
        return {t: ids - done for t in ("recordings", "windows") if (ids := self.run_ids(t)) - done}

    def remove_orphans(self) -> dict[str, int]:
        """Delete the rows of runs that never committed (call under the write lock). Returns rows removed per table.

        The deletion is one more Delta version: the rows stay readable by time travel until a vacuum.
        """

        removed = {}
        for table, ids in self.orphan_runs().items():
            quoted = ", ".join("'" + i.replace("'", "''") + "'" for i in sorted(ids))
            _check_lock(self.root)
            res = self._table(table).delete(f"run_id IN ({quoted})")
            removed[table] = int(res.get("num_deleted_rows", 0))
        return removed

    def runs_history(self) -> pd.DataFrame:
        """One row per run with the `runs` table version that committed it (for --as-of)."""

        cols = ["version", "run_id", "finished_at", "n_recordings", "n_windows", "n_flagged", "n_unscored",
                "status", "baseline_id"]
        if not self.has_table("runs"):
            return pd.DataFrame(columns=cols)
        seen: set[str] = set()
        rows = []
        for v in range(self._table("runs").version() + 1):
            try:
                df = self.read("runs", version=v)
            except Exception:  # a version removed by vacuum outside the retention
                continue
            for r in df.to_dict("records"):
                if r["run_id"] not in seen:
                    seen.add(r["run_id"])
                    rows.append({"version": v, **r})
        return pd.DataFrame(rows, columns=cols)

    def sweep_temporary(self, older_than_hours: float, now: float | None = None) -> dict[str, int]:
        """Remove the temporary files of killed writers older than ``older_than_hours``; returns counts.

        Atomic writes leave ``.NAME.XXXX.tmp`` (stage cache, baselines, catalog) or ``NAME.tmp`` (score staging
        Parquet, reports) only when the writer dies between writing and renaming. Files younger than the age limit
        are kept: they may belong to a writer that is still running (`maintain` holds the store's lock, but a
        report written outside the store's runs does not take it).
        """
        if self.remote:  # objects are written in one PUT: no temporary files to sweep
            return {"removed": 0, "kept_recent": 0}
        limit = (time.time() if now is None else now) - float(older_than_hours) * 3600.0
        found = [p for p in self.root.glob("*.tmp")]
        for sub in ("cache", "baselines", "reports"):
            found += (self.root / sub).rglob("*.tmp")
        removed = kept = 0
        for p in found:
            try:
                if not p.is_file() or p.is_symlink():
                    continue
                if p.stat().st_mtime < limit:
                    p.unlink()
                    removed += 1
                else:
                    kept += 1
            except FileNotFoundError:  # renamed or removed meanwhile by its writer
                continue
        return {"removed": removed, "kept_recent": kept}

    def maintain(self, retention_hours: float = 168.0) -> dict[str, dict]:
        """Compact small files and vacuum files older than the retention; time travel inside it keeps working.

        Vacuum only removes files that no version younger than the retention needs (Delta's own rule), so a
        `--as-of` read of any version committed within `retention_hours` still succeeds. Temporary files that
        killed writers left in the cache, baselines, reports and catalog are swept by the same age rule.
        """

        out = {}
        for name in TABLES:
            if not self.has_table(name):
                continue
            dt = self._table(name)
            metrics = dt.optimize.compact()
            removed = dt.vacuum(retention_hours=int(retention_hours), dry_run=False,
                                enforce_retention_duration=retention_hours >= 168)
            out[name] = {"files_added": metrics.get("numFilesAdded"), "files_removed": metrics.get("numFilesRemoved"),
                         "vacuumed": len(removed), "version": self._table(name).version()}
        out["temporary_files"] = self.sweep_temporary(retention_hours)
        return out


def _check_lock(root: "Path | ObjectPath") -> None:
    """Refuse a table write when this process held the store's lock object and lost it (it expired and another
    night took it over): two nights must never interleave their appends."""
    if isinstance(root, ObjectPath):
        from fleetsift.objectlock import check_held

        check_held(root / ".lock")
