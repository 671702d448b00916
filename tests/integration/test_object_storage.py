"""Stores in S3-compatible object storage, against a real S3 server on loopback (moto's).

``chainyard publish`` copies a finished store to a bucket and verifies it there; every
read-side command takes ``s3://BUCKET/PATH``; a tampered object fails verification; missing
credentials, a missing bucket and ``sample --out s3://...`` are one line each. The reference
for equality is the same command on the local store (the property is the project's own:
reading through the bucket must not change a number).
"""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import pytest

from tests.conftest import cli, run_dir  # noqa: F401 - run_dir is a fixture
from tests.patience import PATIENCE

pytest.importorskip("s3fs")
pytest.importorskip("moto")

SECRET = "not-a-real-secret-9f3c"


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@pytest.fixture(scope="module")
def s3_env() -> Iterator[dict[str, str]]:
    """A moto S3 server on loopback and the environment that points chainyard at it."""
    server = shutil.which("moto_server") or str(Path(sys.executable).with_name("moto_server"))
    port = _free_port()
    proc = subprocess.Popen(
        [server, "-H", "127.0.0.1", "-p", str(port)],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    env = {
        "AWS_ENDPOINT_URL": f"http://127.0.0.1:{port}",
        "AWS_ACCESS_KEY_ID": "testing",
        "AWS_SECRET_ACCESS_KEY": SECRET,
        "AWS_DEFAULT_REGION": "us-east-1",
    }
    deadline = time.monotonic() + PATIENCE  # a condition, not a speed limit
    while True:
        try:
            socket.create_connection(("127.0.0.1", port), timeout=1).close()
            break
        except OSError:
            assert proc.poll() is None and time.monotonic() < deadline, "moto_server did not start"
            time.sleep(0.1)
    old = {k: os.environ.get(k) for k in env}
    os.environ.update(env)
    import s3fs

    s3fs.S3FileSystem.clear_instance_cache()
    s3fs.S3FileSystem(client_kwargs={"endpoint_url": env["AWS_ENDPOINT_URL"]}).mkdir("results")
    try:
        yield env
    finally:
        for k, v in old.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v
        proc.kill()
        proc.wait()


@pytest.fixture(scope="module")
def published(s3_env: dict[str, str], tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A sampled local store, published to s3://results/kiln/replica-0.zarr."""
    from tests.conftest import write_run

    folder = tmp_path_factory.mktemp("s3run")
    cfg = write_run(folder)
    store = folder / "replica-0.zarr"
    assert cli("sample", str(cfg), "--out", str(store), "--steps", "300").returncode == 0
    res = cli("publish", str(store), "s3://results/kiln/replica-0.zarr")
    assert res.returncode == 0, res.stderr
    assert "read back and verified there" in res.stdout
    assert SECRET not in res.stdout + res.stderr
    return store


def test_read_side_commands_take_a_bucket_path(published: Path, tmp_path: Path) -> None:
    url = "s3://results/kiln/replica-0.zarr"
    for args in (["verify", url], ["inspect", url]):
        res = cli(*args)
        assert res.returncode == 0, (args, res.stderr)
        assert SECRET not in res.stdout + res.stderr
    here = cli("export", str(published), "--raw", "-o", str(tmp_path / "local.csv"))
    there = cli("export", url, "--raw", "-o", str(tmp_path / "bucket.csv"))
    assert here.returncode == 0 and there.returncode == 0, there.stderr
    assert (tmp_path / "local.csv").read_bytes() == (tmp_path / "bucket.csv").read_bytes()


def test_a_tampered_object_fails_verification(published: Path, s3_env: dict[str, str]) -> None:
    import s3fs

    fs = s3fs.S3FileSystem(client_kwargs={"endpoint_url": s3_env["AWS_ENDPOINT_URL"]})
    res = cli("publish", str(published), "s3://results/tampered.zarr")
    assert res.returncode == 0, res.stderr
    chunk = next(k for k in fs.find("results/tampered.zarr") if "/draws/position/c" in k)
    data = bytearray(fs.cat_file(chunk))
    data[len(data) // 2] ^= 0x01
    fs.pipe_file(chunk, bytes(data))
    res = cli("verify", "s3://results/tampered.zarr")
    assert res.returncode == 7, res.stdout + res.stderr


def test_a_taken_destination_is_refused(published: Path) -> None:
    res = cli("publish", str(published), "s3://results/kiln/replica-0.zarr")
    assert res.returncode == 5 and res.stderr.count("\n") == 1, res.stderr
    assert "already holds" in res.stderr


def test_missing_bucket_and_credentials_are_one_line(published: Path, tmp_path: Path) -> None:
    res = cli("inspect", "s3://no-such-bucket/x.zarr")
    assert res.returncode == 4 and res.stderr.count("\n") == 1, res.stderr
    nocred = {
        "AWS_ACCESS_KEY_ID": "",
        "AWS_SECRET_ACCESS_KEY": "",
        "AWS_SHARED_CREDENTIALS_FILE": str(tmp_path / "none"),
        "AWS_CONFIG_FILE": str(tmp_path / "none"),
    }
    env = {k: v for k, v in os.environ.items() if k not in nocred} | {
        k: v for k, v in nocred.items() if v
    }
    proc = subprocess.run(
        [sys.executable, "-m", "chainyard.cli", "inspect", "s3://results/kiln/replica-0.zarr"],
        capture_output=True, text=True, env=env, timeout=PATIENCE,
    )  # fmt: skip
    assert proc.returncode == 4 and proc.stderr.count("\n") == 1, proc.stderr
    assert "credentials" in proc.stderr


def test_sample_does_not_write_a_bucket(s3_env: dict[str, str], run_dir: Path) -> None:  # noqa: F811
    res = cli("sample", str(run_dir / "run.yaml"), "--out", "s3://results/new.zarr")
    assert res.returncode == 2 and res.stderr.count("\n") == 1, res.stderr
    assert "chainyard publish" in res.stderr
