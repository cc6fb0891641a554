"""Where the inbox and the store live: a local folder (a `pathlib.Path`, as always) or an object-storage URL.

`location("s3://bucket/prefix")` gives an `ObjectPath`: the part of `pathlib.Path`'s interface the pipeline uses
(``/``, name, suffix, exists, is_dir, iterdir, glob, open, read/write bytes), over fsspec (s3fs for ``s3://``;
``gs://``, ``az://`` when gcsfs / adlfs are installed). A local path stays a plain `Path`, so everything local
behaves exactly as before. Objects are written by one PUT each, which object stores make visible whole or not at
all: that is the atomic write the local store gets from write-to-temporary-then-rename.

Settings (endpoint, region, anonymous) come from the usual AWS environment variables and the profile's optional
``[storage]`` section. Credentials are never read here: fsspec/botocore and deltalake take them from the
environment themselves, so they are never part of an option dict that could be printed or stored.
"""

from __future__ import annotations

import fnmatch
import posixpath
from pathlib import Path, PurePosixPath
from typing import Any, Iterator

from fleetsift.profile import Storage

# The settings of each bucket (protocol://bucket) a process has opened: a path derived later from a plain URL
# string (a stage output's path travelling in a task result) finds them again, on a Dask worker too.
_SETTINGS: dict[str, Storage] = {}
_FILESYSTEMS: dict[tuple, Any] = {}
# Read-ahead for streaming reads (video through PyAV): large enough for few round trips, never a whole file.
BLOCK_SIZE = 8 << 20


def location(x: "str | Path | ObjectPath", storage: Storage | None = None) -> "Path | ObjectPath":
    """A local `Path` (``file://`` URLs included) or an `ObjectPath` for any other fsspec URL."""
    if isinstance(x, ObjectPath):
        return x
    if isinstance(x, Path):
        return x
    s = str(x)
    if s.startswith("file://"):
        return Path(s[len("file://"):])
    if "://" not in s:
        return Path(s)
    protocol, rest = s.split("://", 1)
    bucket = rest.split("/", 1)[0]
    if not bucket:
        raise ValueError(f"{s}: expected protocol://bucket/prefix")
    root = f"{protocol}://{bucket}"
    if storage is not None:
        _SETTINGS[root] = storage
    return ObjectPath(protocol, rest.rstrip("/"), _SETTINGS.get(root, Storage()))


def resolved(x: "str | Path | ObjectPath", storage: Storage | None = None) -> "Path | ObjectPath":
    loc = location(x, storage)
    return loc.resolve() if isinstance(loc, Path) else loc


def fsspec_options(protocol: str, storage: Storage) -> dict[str, Any]:
    """fsspec keyword arguments from the [storage] settings (credentials stay in the environment)."""
    if protocol in ("s3", "s3a"):
        opts: dict[str, Any] = {"anon": storage.anonymous}
        if storage.endpoint_url:
            opts["endpoint_url"] = storage.endpoint_url
        if storage.region:
            opts["client_kwargs"] = {"region_name": storage.region}
        return opts
    return {"anon": True} if storage.anonymous else {}


def delta_options(protocol: str, storage: Storage) -> dict[str, str]:
    """deltalake (delta-rs object_store) options for tables at this protocol.

    S3 commits use conditional put (``aws_conditional_put = etag``: the commit file is created with If-None-Match,
    so of two writers racing for one version exactly one wins), the safe concurrent-write mode delta-rs documents
    for S3-compatible stores (delta-io.github.io/delta-rs, "CloudFlare R2 & Minio"); AWS_S3_ALLOW_UNSAFE_RENAME is
    never set. Endpoint and region default to the AWS environment variables, which delta-rs reads itself.
    """
    if protocol not in ("s3", "s3a"):
        return {}
    import os

    opts = {"aws_conditional_put": "etag"}
    endpoint = storage.endpoint_url or os.environ.get("AWS_ENDPOINT_URL_S3") or os.environ.get("AWS_ENDPOINT_URL", "")
    if storage.endpoint_url:
        opts["aws_endpoint"] = storage.endpoint_url
    if endpoint.startswith("http://"):
        opts["aws_allow_http"] = "true"
    if storage.region:
        opts["aws_region"] = storage.region
    if storage.anonymous:
        opts["aws_skip_signature"] = "true"
    return opts


# The environment variables a client reads when it is made: a process whose environment points elsewhere later
# (another endpoint, other credentials) gets a new client, not one bound to the old server.
_CLIENT_ENV = ("AWS_ENDPOINT_URL", "AWS_ENDPOINT_URL_S3", "AWS_REGION", "AWS_DEFAULT_REGION", "AWS_PROFILE",
               "AWS_ACCESS_KEY_ID")


def _filesystem(protocol: str, storage: Storage):
    import os

    key = (protocol, storage, tuple(os.environ.get(k) for k in _CLIENT_ENV))
    if key not in _FILESYSTEMS:
        import fsspec

        # fsspec's own instance cache keys on the arguments only: it would hand back a client of the old environment.
        _FILESYSTEMS[key] = fsspec.filesystem(protocol, skip_instance_cache=True, **fsspec_options(protocol, storage))
    return _FILESYSTEMS[key]


class ObjectPath:
    """An object-storage path (``protocol://bucket/key``) with the `pathlib.Path` methods the pipeline uses."""

    __slots__ = ("protocol", "key", "storage", "_info")

    def __init__(self, protocol: str, key: str, storage: Storage, info: dict | None = None):
        self.protocol, self.key, self.storage, self._info = protocol, key.strip("/"), storage, info

    # --- names ----------------------------------------------------------------------------------------------------
    def __str__(self) -> str:
        return f"{self.protocol}://{self.key}"

    def __repr__(self) -> str:
        return f"ObjectPath({str(self)!r})"

    def __eq__(self, other) -> bool:
        return isinstance(other, ObjectPath) and str(self) == str(other)

    def __hash__(self) -> int:
        return hash(str(self))

    def __lt__(self, other: "ObjectPath") -> bool:
        return str(self) < str(other)

    def __truediv__(self, part: str) -> "ObjectPath":
        return ObjectPath(self.protocol, posixpath.join(self.key, str(part)), self.storage)

    @property
    def fs(self):
        return _filesystem(self.protocol, self.storage)

    @property
    def name(self) -> str:
        return PurePosixPath(self.key).name

    @property
    def suffix(self) -> str:
        return PurePosixPath(self.key).suffix

    @property
    def stem(self) -> str:
        return PurePosixPath(self.key).stem

    @property
    def parent(self) -> "ObjectPath":
        return ObjectPath(self.protocol, posixpath.dirname(self.key), self.storage)

    def with_suffix(self, suffix: str) -> "ObjectPath":
        return ObjectPath(self.protocol, str(PurePosixPath(self.key).with_suffix(suffix)), self.storage)

    def relative_to(self, other: "ObjectPath") -> PurePosixPath:
        return PurePosixPath(self.key).relative_to(other.key)

    def is_relative_to(self, other: "ObjectPath") -> bool:
        return isinstance(other, ObjectPath) and PurePosixPath(self.key).is_relative_to(other.key)

    def match(self, pattern: str) -> bool:
        return fnmatch.fnmatchcase(self.name, pattern)

    def resolve(self) -> "ObjectPath":
        return self

    # --- queries --------------------------------------------------------------------------------------------------
    def info(self) -> dict:
        """The object's listing entry (size, ETag, type); cached on this path object."""
        if self._info is None:
            self._info = self.fs.info(self.key)
        return self._info

    def exists(self) -> bool:
        try:
            self.info()
            return True
        except FileNotFoundError:
            return False

    def is_dir(self) -> bool:
        try:
            return self.info().get("type") == "directory"
        except FileNotFoundError:
            return False

    def is_file(self) -> bool:
        try:
            return self.info().get("type") == "file"
        except FileNotFoundError:
            return False

    def is_symlink(self) -> bool:
        return False

    def signature(self) -> str:
        """What changes when the object's content changes: size and ETag (a new upload gets a new ETag)."""
        info = self.info()
        etag = info.get("ETag") or info.get("etag") or info.get("md5Hash") or info.get("generation") or ""
        if not etag:
            raise ValueError(f"{self}: the object store gives no ETag to tell a changed object from an unchanged one")
        return f"{info.get('size')}:{str(etag).strip(chr(34))}"

    def iterdir(self) -> Iterator["ObjectPath"]:
        for entry in self.fs.ls(self.key, detail=True, refresh=True):
            name = entry["name"].strip("/")
            if name != self.key:
                yield ObjectPath(self.protocol, name, self.storage, entry)

    def glob(self, pattern: str) -> Iterator["ObjectPath"]:
        if pattern.startswith("/") or not pattern:
            raise ValueError(f"non-relative pattern {pattern!r}")
        for name, entry in self.fs.glob(posixpath.join(self.key, pattern), detail=True).items():
            yield ObjectPath(self.protocol, name, self.storage, entry)

    def rglob(self, pattern: str) -> Iterator["ObjectPath"]:
        return self.glob("**/" + pattern)

    # --- reading and writing --------------------------------------------------------------------------------------
    def open(self, mode: str = "rb", **kwargs):
        if "r" in mode:
            kwargs.setdefault("block_size", BLOCK_SIZE)
        return self.fs.open(self.key, mode, **kwargs)

    def read_bytes(self) -> bytes:
        return self.fs.cat_file(self.key)

    def read_text(self, encoding: str = "utf-8") -> str:
        return self.read_bytes().decode(encoding)

    def write_bytes(self, data: bytes) -> None:
        self.fs.pipe_file(self.key, data)
        self._info = None

    def write_text(self, text: str, encoding: str = "utf-8") -> None:
        self.write_bytes(text.encode(encoding))

    def unlink(self, missing_ok: bool = False) -> None:
        try:
            self.fs.rm_file(self.key)
        except FileNotFoundError:
            if not missing_ok:
                raise

    def mkdir(self, parents: bool = False, exist_ok: bool = False) -> None:
        """Object stores have no folders: a prefix exists once an object lies under it."""


def write_atomic(path: "Path | ObjectPath", data: bytes) -> None:
    """Write a whole file: locally to a temporary then renamed (a killed writer leaves no half file); an object in
    one PUT (visible whole or not at all)."""
    if isinstance(path, ObjectPath):
        path.write_bytes(data)
        return
    import contextlib
    import os
    import tempfile

    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise


def read_parquet(x: "str | Path | ObjectPath"):
    """A Parquet file (a stage's staging output) as a DataFrame, local or an object."""
    import io

    import pandas as pd

    loc = location(x)
    return pd.read_parquet(io.BytesIO(loc.read_bytes()) if isinstance(loc, ObjectPath) else loc)
