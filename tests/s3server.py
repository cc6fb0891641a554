"""A real S3-compatible server for the object-storage tests: moto's standalone server (`moto_server`, from the
registry package moto[server]) in a child process on a free port. Nothing is mocked in-process: every client
(s3fs, botocore, deltalake's object_store, PyAV's reads) talks HTTP to it, as it would to a bucket.
"""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import sys
import time
import urllib.request
from dataclasses import dataclass
from pathlib import Path

# Dummy credentials of the local test server (moto accepts any); the AWS_* variables are how every client
# (s3fs, botocore, delta-rs) finds them, as in production.
CREDENTIALS = {"AWS_ACCESS_KEY_ID": "fleetsift-test-key", "AWS_SECRET_ACCESS_KEY": "fleetsift-test-secret"}


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@dataclass
class S3Server:
    endpoint: str
    proc: subprocess.Popen

    def env(self, **extra: str) -> dict[str, str]:
        """The AWS environment of a process that uses this server (endpoint, region, credentials)."""
        return {**CREDENTIALS, "AWS_ENDPOINT_URL": self.endpoint, "AWS_REGION": "us-east-1",
                "AWS_DEFAULT_REGION": "us-east-1", "AWS_EC2_METADATA_DISABLED": "true", **extra}

    def client(self):
        import boto3

        return boto3.client("s3", endpoint_url=self.endpoint, region_name="us-east-1",
                            aws_access_key_id=CREDENTIALS["AWS_ACCESS_KEY_ID"],
                            aws_secret_access_key=CREDENTIALS["AWS_SECRET_ACCESS_KEY"])

    def bucket(self, name: str) -> str:
        self.client().create_bucket(Bucket=name)
        return name

    def upload(self, folder: Path, bucket: str, prefix: str) -> str:
        """Upload a local folder tree to s3://bucket/prefix; returns that URL."""
        c = self.client()
        for f in sorted(p for p in Path(folder).rglob("*") if p.is_file()):
            c.upload_file(str(f), bucket, f"{prefix}/{f.relative_to(folder).as_posix()}")
        return f"s3://{bucket}/{prefix}"

    def keys(self, bucket: str, prefix: str = "") -> list[str]:
        c = self.client()
        out, token = [], None
        while True:
            kw = {"Bucket": bucket, "Prefix": prefix, **({"ContinuationToken": token} if token else {})}
            r = c.list_objects_v2(**kw)
            out += [o["Key"] for o in r.get("Contents", [])]
            if not r.get("IsTruncated"):
                return out
            token = r["NextContinuationToken"]

    def stop(self) -> None:
        self.proc.terminate()
        try:
            self.proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()


def start_s3_server(log: Path) -> S3Server:
    exe = shutil.which("moto_server", path=str(Path(sys.executable).parent)) or shutil.which("moto_server")
    if exe is None:
        raise RuntimeError("moto_server not found: install the test extra (moto[server])")
    port = free_port()
    with open(log, "wb") as out:
        proc = subprocess.Popen([exe, "-H", "127.0.0.1", "-p", str(port)], stdout=out, stderr=subprocess.STDOUT,
                                env={k: v for k, v in os.environ.items() if not k.startswith("AWS_")})
    endpoint = f"http://127.0.0.1:{port}"
    deadline = time.monotonic() + 60
    while True:
        try:
            urllib.request.urlopen(endpoint + "/moto-api/", timeout=1).read()
            return S3Server(endpoint, proc)
        except OSError:
            if proc.poll() is not None or time.monotonic() > deadline:
                proc.kill()
                raise RuntimeError(f"moto_server did not start: {log.read_text()[-2000:]}") from None
            time.sleep(0.2)
