"""A local S3-compatible server for the object-storage tests (moto's server mode on 127.0.0.1).

:class:`LocalS3` starts ``python -m moto.server`` as a subprocess on a free port. With ``auth=True`` it
checks signatures against its own IAM: the first three requests (no credentials needed) create a
user allowed everything and its access key, and every later request must be signed with that
key, so wrong credentials are refused as by a real service. With ``auth=False`` every request is
served, signed or not, and objects are uploaded readable by everyone (``public-read``), as in a
public bucket (anonymous access, plain HTTPS-style GETs).
"""

from __future__ import annotations

import json
import os
import socket
import subprocess
import sys
import time
from pathlib import Path

REGION = "us-east-1"


def free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class LocalS3:
    def __init__(self, auth=True):
        import boto3

        self.public = not auth
        self.port = free_port()
        self.endpoint = f"http://127.0.0.1:{self.port}"
        env = {k: v for k, v in os.environ.items() if not k.startswith("AWS_")}
        if auth:
            env["INITIAL_NO_AUTH_ACTION_COUNT"] = "3"
        self.proc = subprocess.Popen([sys.executable, "-m", "moto.server", "-H", "127.0.0.1", "-p", str(self.port)],
                                     env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        deadline = time.monotonic() + 30
        while True:
            try:
                socket.create_connection(("127.0.0.1", self.port), 0.2).close()
                break
            except OSError:
                if self.proc.poll() is not None or time.monotonic() > deadline:
                    self.stop()
                    raise RuntimeError("moto_server did not start")
                time.sleep(0.05)
        self.key, self.secret = "anything", "anything"
        if auth:
            iam = boto3.client("iam", endpoint_url=self.endpoint, region_name=REGION,
                               aws_access_key_id="setup", aws_secret_access_key="setup")
            iam.create_user(UserName="reader")
            iam.put_user_policy(UserName="reader", PolicyName="everything", PolicyDocument=json.dumps(
                {"Version": "2012-10-17", "Statement": [{"Effect": "Allow", "Action": "*", "Resource": "*"}]}))
            k = iam.create_access_key(UserName="reader")["AccessKey"]
            self.key, self.secret = k["AccessKeyId"], k["SecretAccessKey"]
        self.client = boto3.client("s3", endpoint_url=self.endpoint, region_name=REGION,
                                   aws_access_key_id=self.key, aws_secret_access_key=self.secret)

    def env(self, **changes):
        """The AWS environment variables a reader of this server needs (plus ``changes``)."""
        out = {"AWS_ACCESS_KEY_ID": self.key, "AWS_SECRET_ACCESS_KEY": self.secret,
               "AWS_ENDPOINT_URL": self.endpoint, "AWS_DEFAULT_REGION": REGION}
        out.update(changes)
        return out

    def make_bucket(self, name):
        self.client.create_bucket(Bucket=name)
        return name

    def put(self, bucket, key, local):
        extra = {"ACL": "public-read"} if self.public else None
        self.client.upload_file(str(local), bucket, key, ExtraArgs=extra)

    def put_tree(self, bucket, prefix, local_dir):
        """Every file below ``local_dir`` (e.g. a Zarr store) under ``prefix/``."""
        root = Path(local_dir)
        for f in sorted(root.rglob("*")):
            if f.is_file():
                self.put(bucket, f"{prefix.rstrip('/')}/{f.relative_to(root).as_posix()}", f)

    def listing(self, bucket):
        """{key: (size, ETag)} of every object in the bucket."""
        out = {}
        for page in self.client.get_paginator("list_objects_v2").paginate(Bucket=bucket):
            for o in page.get("Contents", []):
                out[o["Key"]] = (o["Size"], o["ETag"])
        return out

    def stop(self):
        if self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
