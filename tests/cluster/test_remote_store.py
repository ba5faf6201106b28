"""The driver-side run store on stores without atomic rename: fsspec's memory:// and an S3 server.

Bulk Parquet goes through Spark, which needs the Hadoop S3 connector jars this
machine does not have; the small JSON files (manifests, run.json) go through
fsspec, and that is what is proven here, with the commit-last protocol:

- the S3 server is moto's server mode (package ``moto[server]``), a separate
  process on 127.0.0.1 started by the fixture; the client is s3fs (the
  ``spark_align[s3]`` backend), reached with the URL spelling Spark uses (``s3a://``);
- a second client (boto3) writes table files and manifests the way the Spark
  job (another process) would, so the store must not trust listings it cached.
"""
from __future__ import annotations

import json
import os
import sys
import uuid

import fsspec
import pytest

from spark_align.errors import RunDirError
from spark_align.store import SPARK_TO_FSSPEC, RunStore, fsspec_url
from tests.cluster.procs import free_port, start_group, stop_group, wait_http

BUCKET = "spark-align-runs"


@pytest.fixture(scope="module")
def s3_server(tmp_path_factory):
    pytest.importorskip("s3fs", reason="the s3 extra (s3fs) is needed; bash scripts/setup.sh --test installs it")
    pytest.importorskip("moto.server", reason="moto[server] is needed; bash scripts/setup.sh --test installs it")
    port = free_port()
    log = tmp_path_factory.mktemp("moto") / "moto.log"
    proc = start_group([sys.executable, "-m", "moto.server", "-H", "127.0.0.1", "-p", str(port)],
                       log_path=str(log))
    try:
        endpoint = f"http://127.0.0.1:{port}"
        wait_http(f"{endpoint}/moto-api/", 60, proc=proc, what="moto S3 server")
        with pytest.MonkeyPatch.context() as mp:
            # The usual AWS variables: what s3fs (botocore) reads on a user's machine too.
            for key, value in {"AWS_ACCESS_KEY_ID": "test-key", "AWS_SECRET_ACCESS_KEY": "test-secret",
                               "AWS_DEFAULT_REGION": "us-east-1", "AWS_ENDPOINT_URL": endpoint}.items():
                mp.setenv(key, value)
            import boto3

            client = boto3.client("s3")
            client.create_bucket(Bucket=BUCKET)
            fsspec.filesystem("s3").invalidate_cache()
            yield client
    finally:
        stop_group(proc)


@pytest.fixture(params=["memory", "s3"])
def remote(request):
    """(run directory URL, writer(key, bytes)) where the writer is another client, as Spark would be."""
    prefix = f"runs/{uuid.uuid4().hex[:12]}"
    if request.param == "memory":
        other = fsspec.filesystem("memory")

        def put(rel: str, data: bytes) -> None:
            other.pipe(f"/{prefix}/{rel}", data)

        yield f"memory://{prefix}", put
        if other.exists(f"/{prefix}"):
            other.rm(f"/{prefix}", recursive=True)
        return
    client = request.getfixturevalue("s3_server")

    def put(rel: str, data: bytes) -> None:
        client.put_object(Bucket=BUCKET, Key=f"{prefix}/{rel}", Body=data)

    yield f"s3a://{BUCKET}/{prefix}", put


def test_scheme_mapping_spark_to_fsspec():
    # Hadoop connector schemes on the left, fsspec protocols (and their backends) on the right.
    assert fsspec_url("s3a://b/k/run") == "s3://b/k/run"
    assert fsspec_url("s3n://b/k") == "s3://b/k"
    assert fsspec_url("gs://b/k") == "gcs://b/k"
    assert fsspec_url("abfss://c@acct.dfs.core.windows.net/k") == "abfs://c@acct.dfs.core.windows.net/k"
    assert fsspec_url("hdfs://nn:8020/k") == "hdfs://nn:8020/k"
    assert fsspec_url("file:///tmp/k") == "file:///tmp/k" and fsspec_url("runs/x") == "runs/x"
    assert set(SPARK_TO_FSSPEC.values()) <= set(fsspec.available_protocols())


def test_json_round_trip_leaves_no_temporary_objects(remote):
    url, _ = remote
    store = RunStore(url)
    assert store.url == url                        # Spark's spelling is kept for Spark paths
    assert store.spark_path("corpus") == f"{url}/corpus"
    store.check_writable()
    assert store.read_json("run.json") is None
    store.write_json("run.json", {"format_version": 1, "config": {"stages": ["ibm1"]}})
    store.write_json("run.json", {"format_version": 1, "config": {"stages": ["ibm1", "hmm"]}})
    assert store.read_json("run.json") == {"format_version": 1, "config": {"stages": ["ibm1", "hmm"]}}
    names = [os.path.basename(p) for p in store.fs.ls(store.root, detail=False)]
    assert names == ["run.json"], names            # the temporary name is gone, the probe too


def test_commit_last_on_a_store_without_atomic_rename(remote):
    url, put = remote
    store = RunStore(url)
    store.write_json("run.json", {"format_version": 1})
    lex1 = "checkpoints/00-ibm1/iter-0001/lex"
    assert store.checkpoints() == []
    # The table is written first (by Spark, another client); without a manifest it is not a checkpoint.
    put(f"{lex1}/part-00000.parquet", b"a" * 100)
    put(f"{lex1}/part-00001.parquet", b"b" * 50)
    put(f"{lex1}/_SUCCESS", b"")
    assert store.checkpoints() == []
    assert store.files(lex1) == {"part-00000.parquet": 100, "part-00001.parquet": 50}
    # The commit: the manifest, written last, names the files it vouches for.
    store.write_json("checkpoints/00-ibm1/iter-0001/manifest.json",
                     {"iteration": 1, "table": {"files": store.files(lex1)}})
    [ckpt] = store.checkpoints()
    assert (ckpt.stage_index, ckpt.model, ckpt.iteration) == (0, "ibm1", 1)
    assert ckpt.manifest["table"]["files"] == {"part-00000.parquet": 100, "part-00001.parquet": 50}
    # A crash while writing the next manifest leaves a half-written temporary object: ignored.
    put("checkpoints/00-ibm1/iter-0002/lex/part-00000.parquet", b"c" * 10)
    put("checkpoints/00-ibm1/iter-0002/manifest.json.tmp-0123abcd", b'{"iteration": 2, "tab')
    assert [c.iteration for c in store.checkpoints()] == [1]
    # A damaged manifest (truncated by something else) is not taken for a commit either.
    put("checkpoints/00-ibm1/iter-0003/manifest.json", b'{"iteration": 3, "ta')
    assert [c.iteration for c in store.checkpoints()] == [1]
    store.remove("checkpoints/00-ibm1/iter-0003")
    assert not store.exists("checkpoints/00-ibm1/iter-0003")


def test_store_sees_what_another_process_committed_after_it_listed(remote):
    """Listings cached by the backend must not hide a later commit (s3fs caches directory listings)."""
    url, put = remote
    store = RunStore(url)
    store.write_json("run.json", {"format_version": 1})
    put("checkpoints/00-ibm1/iter-0001/lex/part-00000.parquet", b"x" * 8)
    store.write_json("checkpoints/00-ibm1/iter-0001/manifest.json", {"iteration": 1})
    assert [c.iteration for c in store.checkpoints()] == [1]
    assert not store.exists("output.json") and store.read_json("output.json") is None
    # Another process (a later iteration of the Spark job, or a second driver) commits more.
    put("checkpoints/00-ibm1/iter-0002/lex/part-00000.parquet", b"y" * 9)
    put("checkpoints/00-ibm1/iter-0002/manifest.json", json.dumps({"iteration": 2}).encode())
    put("output.json", b'{"rows": 3}')
    put("checkpoints/00-ibm1/iter-0001/lex/part-00001.parquet", b"z" * 7)
    assert [c.iteration for c in store.checkpoints()] == [1, 2]
    assert store.exists("output.json") and store.read_json("output.json") == {"rows": 3}
    assert store.files("checkpoints/00-ibm1/iter-0001/lex") == {"part-00000.parquet": 8, "part-00001.parquet": 7}


def test_unwritable_bucket_is_a_one_line_run_dir_error(s3_server):
    store = RunStore(f"s3a://no-such-bucket-{uuid.uuid4().hex[:8]}/run")
    with pytest.raises(RunDirError) as err:
        store.check_writable()
    assert "is not writable" in str(err.value) and "\n" not in str(err.value)
