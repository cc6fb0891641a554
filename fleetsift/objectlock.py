"""The store's write lock on object storage: one lock object, created by a conditional put.

Object stores have no flock. The lock is the object STORE/.lock, holding its holder (host, pid, a random id) and
an expiry. It is created with ``If-None-Match: *`` (the PUT fails with 412 when the object exists), so of two nights
starting together exactly one gets it. The holder renews it every third of its time to live with ``If-Match`` on
the ETag it last wrote; a night killed with the lock held stops renewing, and once the expiry has passed another
night takes the lock over with ``If-Match`` on the stale ETag (two nights taking over together: one wins). Releasing
deletes the object after checking it is still ours. Conditional writes on S3: AWS S3 user guide, "Add preconditions
to S3 operations with conditional requests" (If-None-Match on PutObject since 2024-08, If-Match since 2024-11).

A holder that lost its lock (suspended past its expiry, then taken over) finds out at its next table write, which
`check_held` refuses.
"""

from __future__ import annotations

import contextlib
import json
import os
import socket
import sys
import threading
import time
import uuid
from typing import Iterator

from fleetsift.errors import StoreLockedError
from fleetsift.location import ObjectPath

# Locks this process holds, by lock URL -> the holder; a lost one is marked so that writes refuse.
_HELD: dict[str, "ObjectLock"] = {}


def check_held(path: ObjectPath) -> None:
    lock = _HELD.get(str(path))
    if lock is not None and lock.lost:
        raise StoreLockedError(f"{path}: this night's lock expired and was taken over by {lock.lost}; "
                               f"nothing more is written (raise [storage] lock_ttl_s if nights pause that long)")


def _s3_client(path: ObjectPath):
    import botocore.session
    from botocore import UNSIGNED
    from botocore.config import Config

    st = path.storage
    kwargs = {}
    if st.endpoint_url:
        kwargs["endpoint_url"] = st.endpoint_url
    if st.region:
        kwargs["region_name"] = st.region
    cfg = Config(signature_version=UNSIGNED) if st.anonymous else Config()
    return botocore.session.get_session().create_client("s3", config=cfg, **kwargs)


class ObjectLock:
    def __init__(self, path: ObjectPath, ttl_s: float):
        if path.protocol not in ("s3", "s3a"):
            raise StoreLockedError(f"{path}: a store on {path.protocol}:// has no lock object yet (conditional put "
                                   f"is implemented for s3:// only); use an s3:// or local store")
        self.path, self.ttl_s = path, float(ttl_s)
        self.bucket, _, self.key = path.key.partition("/")
        self.holder = f"{socket.gethostname()} pid {os.getpid()} id {uuid.uuid4().hex[:8]}"
        self.etag: str | None = None
        self.lost: str = ""
        self._client = _s3_client(path)
        self._stop = threading.Event()

    def _body(self) -> bytes:
        now = time.time()
        return json.dumps({"holder": self.holder, "acquired_at": now, "expires_at": now + self.ttl_s}).encode()

    def _put(self, **condition) -> bool:
        from botocore.exceptions import ClientError

        try:
            r = self._client.put_object(Bucket=self.bucket, Key=self.key, Body=self._body(), **condition)
        except ClientError as e:
            code = e.response.get("Error", {}).get("Code", "")
            status = e.response.get("ResponseMetadata", {}).get("HTTPStatusCode")
            if status in (409, 412) or code in ("PreconditionFailed", "ConditionalRequestConflict"):
                return False
            raise
        self.etag = r["ETag"]
        return True

    def _current(self) -> tuple[dict, str] | None:
        from botocore.exceptions import ClientError

        try:
            r = self._client.get_object(Bucket=self.bucket, Key=self.key)
        except ClientError as e:
            if e.response.get("Error", {}).get("Code") in ("NoSuchKey", "404"):
                return None
            raise
        try:
            info = json.loads(r["Body"].read())
        except ValueError:
            info = {"holder": "an unreadable lock object", "expires_at": 0.0}
        return info, r["ETag"]

    def acquire(self, wait_s: float) -> None:
        deadline = time.monotonic() + wait_s
        while True:
            if self._put(IfNoneMatch="*"):
                return
            cur = self._current()
            if cur is not None:
                info, etag = cur
                if float(info.get("expires_at", 0)) < time.time():
                    # A stale lock of a killed night: take it over, unless another night just did.
                    if self._put(IfMatch=etag):
                        print(f"took over the expired lock of {info.get('holder')} on {self.path}", file=sys.stderr)
                        return
                    continue
            if time.monotonic() >= deadline:
                who = (cur[0].get("holder") if cur else None) or "another night"
                until = time.strftime("%H:%M:%S", time.gmtime(float(cur[0].get("expires_at", 0)))) if cur else "?"
                raise StoreLockedError(
                    f"{self.path.parent}: the store is being written by {who} (lock held until at least {until} UTC "
                    f"unless renewed); wait for it to finish (or pass --wait SECONDS) and run again")
            time.sleep(min(1.0, max(0.05, deadline - time.monotonic())))

    def _renew(self) -> None:
        while not self._stop.wait(self.ttl_s / 3.0):
            try:
                if not self._put(IfMatch=self.etag):
                    cur = self._current()
                    self.lost = (cur[0].get("holder") if cur else None) or "nobody (the lock object is gone)"
                    return
            except Exception as e:  # a network hiccup: try again at the next beat, the expiry leaves room
                print(f"warning: could not renew the lock {self.path}: {e}", file=sys.stderr)

    def release(self) -> None:
        self._stop.set()
        cur = self._current()
        if cur is not None and cur[0].get("holder") == self.holder:
            self._client.delete_object(Bucket=self.bucket, Key=self.key)

    @contextlib.contextmanager
    def held(self, wait_s: float) -> Iterator["ObjectLock"]:
        self.acquire(wait_s)
        _HELD[str(self.path)] = self
        beat = threading.Thread(target=self._renew, name="fleetsift-lock-renewal", daemon=True)
        beat.start()
        try:
            yield self
        finally:
            _HELD.pop(str(self.path), None)
            self.release()
            beat.join(timeout=5)
