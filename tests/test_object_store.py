"""Sources on an S3-compatible object store: a real server (moto's) started by the test on the loopback address.

The server holds a hive-partitioned Parquet dataset under one folder per export date; sources
reach it through an as-of template and either ``storage_options`` or a Prefect Block of
credentials.  IAM policies are enforced by moto once ``moto.settings.INITIAL_NO_AUTH_ACTION_COUNT``
is 0 (its documented switch, docs/docs/iam.rst of moto), so a user without a policy is refused.
A small proxy in front of the server fails the first requests (a reset connection, then 503
SlowDown) to show that transient failures are retried.  Nothing outside 127.0.0.1 is contacted.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import http.client
import http.server
import io
import json
import logging
import pathlib
import socket
import sys
import threading
import time

import numpy as np
import pyarrow.parquet as pq
import pytest

sys.path.insert(0, __import__("os").path.dirname(__file__))
from fleet_fixtures import AS_OF, AUDITED, N_DAYS, Fleet, ar1, days, long_table, results_of  # noqa: E402

from fitaudit.tasks import batches, batchfiles  # noqa: E402
from fitaudit.tasks.extracts import ExtractError, fingerprint_source, read_series  # noqa: E402
from fitaudit.tasks.registry import load_registry  # noqa: E402

moto_server = pytest.importorskip("moto.server")  # the test extra: moto[server]
boto3 = pytest.importorskip("boto3")

BUCKET = "warehouse"
TEMPLATE = f"s3://{BUCKET}/exports/{{as_of:%Y-%m-%d}}/sales"
REGION = "us-east-1"
READ_POLICY = {
    "Version": "2012-10-17",
    "Statement": [
        {
            "Effect": "Allow",
            "Action": ["s3:GetObject", "s3:ListBucket"],
            "Resource": [f"arn:aws:s3:::{BUCKET}", f"arn:aws:s3:::{BUCKET}/*"],
        }
    ],
}


class FailingProxy:
    """An HTTP proxy on 127.0.0.1 that answers its first ``fail`` requests with a reset connection
    (the first) or 503 SlowDown (the others) and forwards every other request to ``target``."""

    def __init__(self, target: tuple[str, int]):
        self.target = target
        self.fail = 0
        self.failed = 0
        self.forwarded = 0
        proxy = self

        class Handler(http.server.BaseHTTPRequestHandler):
            protocol_version = "HTTP/1.1"

            def log_message(self, *args):  # quiet
                pass

            def _any(self):
                body = self.rfile.read(int(self.headers.get("Content-Length") or 0))
                if proxy.fail > 0:
                    proxy.fail -= 1
                    proxy.failed += 1
                    if proxy.failed == 1:  # a connection reset: no answer at all
                        self.close_connection = True
                        self.connection.setsockopt(
                            socket.SOL_SOCKET, socket.SO_LINGER, b"\x01\x00\x00\x00\x00\x00\x00\x00"
                        )
                        return
                    payload = b"<Error><Code>SlowDown</Code><Message>Please reduce your request rate.</Message></Error>"
                    self.send_response(503)
                    self.send_header("Content-Type", "application/xml")
                    self.send_header("Content-Length", str(len(payload) if self.command != "HEAD" else 0))
                    self.end_headers()
                    if self.command != "HEAD":
                        self.wfile.write(payload)
                    return
                proxy.forwarded += 1
                conn = http.client.HTTPConnection(*proxy.target, timeout=30)
                conn.request(self.command, self.path, body=body or None, headers=dict(self.headers))
                answer = conn.getresponse()
                data = answer.read()
                self.send_response(answer.status, answer.reason)
                for name, value in answer.getheaders():
                    if name.lower() not in ("transfer-encoding", "connection", "content-length"):
                        self.send_header(name, value)
                self.send_header("Content-Length", answer.getheader("Content-Length") or str(len(data)))
                self.end_headers()
                if self.command != "HEAD":
                    self.wfile.write(data)
                conn.close()

            do_GET = do_HEAD = do_PUT = do_POST = do_DELETE = _any

        self.server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.thread = threading.Thread(target=self.server.serve_forever, daemon=True)
        self.thread.start()

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.server.server_address[1]}"

    def close(self) -> None:
        self.server.shutdown()
        self.server.server_close()


def _parquet_bytes(table) -> bytes:
    buf = io.BytesIO()
    pq.write_table(table, buf)
    return buf.getvalue()


@pytest.fixture(scope="module")
def store():
    """A moto S3 server on 127.0.0.1 with two dated exports, a reader and an outsider IAM user."""
    from moto import settings

    logging.getLogger("werkzeug").setLevel(logging.ERROR)
    server = moto_server.ThreadedMotoServer(ip_address="127.0.0.1", port=0, verbose=False)
    server.start()
    host, port = server.get_host_and_port()
    url = f"http://{host}:{port}"
    admin = {"endpoint_url": url, "region_name": REGION, "aws_access_key_id": "admin", "aws_secret_access_key": "admin"}
    s3 = boto3.client("s3", **admin)
    iam = boto3.client("iam", **admin)
    s3.create_bucket(Bucket=BUCKET)
    rng = np.random.default_rng(20261203)
    full = {k: {"date": days(), "y": ar1(rng)} for k in ("a", "b")}
    region = {"a": "north", "b": "south"}
    for lag in (0, 1):  # one folder per export date, each up to its own date; hive-partitioned by region
        day = AS_OF - dt.timedelta(days=lag)
        for key, cols in full.items():
            cut = {key: {c: v[: N_DAYS - lag] for c, v in cols.items()}}
            s3.put_object(
                Bucket=BUCKET,
                Key=f"exports/{day:%Y-%m-%d}/sales/region={region[key]}/part-0.parquet",
                Body=_parquet_bytes(long_table(cut)),
            )
    keys = {}
    for user, policy in (("reader", READ_POLICY), ("outsider", None)):
        iam.create_user(UserName=user)
        if policy is not None:
            iam.put_user_policy(UserName=user, PolicyName="read-exports", PolicyDocument=json.dumps(policy))
        key = iam.create_access_key(UserName=user)["AccessKey"]
        keys[user] = (key["AccessKeyId"], key["SecretAccessKey"])
    proxy = FailingProxy((host, port))
    yield {"url": url, "keys": keys, "proxy": proxy, "settings": settings}
    proxy.close()
    server.stop()


@contextlib.contextmanager
def enforced(store):
    """IAM policies enforced on every request while inside (moto's INITIAL_NO_AUTH_ACTION_COUNT)."""
    settings = store["settings"]
    before = settings.INITIAL_NO_AUTH_ACTION_COUNT
    settings.INITIAL_NO_AUTH_ACTION_COUNT = 0
    try:
        yield
    finally:
        settings.INITIAL_NO_AUTH_ACTION_COUNT = before


def _options(store, user: str = "reader", url: str | None = None) -> dict:
    key, secret = store["keys"][user]
    return {"endpoint_url": url or store["url"], "region": REGION, "key": key, "secret": secret}


def _registry(root: pathlib.Path, sources: dict[str, dict]):
    """A registry of the given sources (each with models on series a and b)."""
    fleet = Fleet(root)
    for name, extra in sources.items():
        fleet.source(name, extra.pop("uri", TEMPLATE), partitioning="hive", **extra)
        for k in ("a", "b"):
            fleet.model(f"{name}-{k}", name, k)
    root.mkdir(parents=True, exist_ok=True)
    return load_registry(fleet.write())


def _stage_task_runs(flow_run_id) -> list:
    """The flow run's staging task runs (waits for the server to record them as final)."""
    import asyncio

    from prefect.client.orchestration import get_client
    from prefect.client.schemas.filters import FlowRunFilter, FlowRunFilterId

    async def read():
        async with get_client() as client:
            runs = await client.read_task_runs(flow_run_filter=FlowRunFilter(id=FlowRunFilterId(any_=[flow_run_id])))
            return [r for r in runs if r.name.startswith("stage-extracts")]

    for _ in range(60):
        runs = asyncio.run(read())
        if runs and all(r.state is not None and r.state.is_final() for r in runs):
            return runs
        time.sleep(0.5)
    return runs


def _items(staged) -> dict:
    return {i.model_id: i for b in staged.batches for i in batchfiles.read_batch(b.path)}


def _secrets(store) -> list[str]:
    return [secret for _, secret in store["keys"].values()]


def test_a_dated_partitioned_export_is_read_through_the_template(store, tmp_path):
    reg = _registry(tmp_path, {"x": {"storage_options": _options(store)}})
    for as_of, rows in ((AS_OF, N_DAYS), (AS_OF - dt.timedelta(days=1), N_DAYS - 1)):
        staged = batches.stage_inputs(reg, as_of, tmp_path / f"work-{as_of}")
        fp = staged.fingerprints["x"]
        assert fp["uri"] == f"s3://{BUCKET}/exports/{as_of:%Y-%m-%d}/sales"  # the resolved uri
        assert fp["uri_template"] == TEMPLATE
        assert [f["path"].split("/sales/")[1] for f in fp["files"]] == [
            "region=north/part-0.parquet",
            "region=south/part-0.parquet",
        ]
        assert fp["rows"] == 2 * rows and "region" in fp["columns"]  # the hive partition column
        items = _items(staged)
        for model in ("x-a", "x-b"):
            assert items[model].problems == ()
            assert str(items[model].time[-1])[:10] == str(as_of)
        text = json.dumps(fp) + repr(reg.sources["x"]) + json.dumps(reg.sources["x"].to_dict())
        assert not any(secret in text for secret in _secrets(store))  # never in the manifest's record
    # the row filter applies on the object store too (here on the hive partition column)
    source = reg.sources["x"].model_copy(update={"filter": (("region", "=", "north"),)}).for_as_of(AS_OF)
    out = read_series(source, ["a", "b"], ["y"])
    assert out["a"].time.size == N_DAYS and [p.kind for p in out["b"].problems] == ["missing-series"]


def test_a_missing_dated_folder_is_a_per_source_error(store, tmp_path):
    reg = _registry(tmp_path, {"x": {"storage_options": _options(store)}})
    late = AS_OF + dt.timedelta(days=1)
    items = _items(batches.stage_inputs(reg, late, tmp_path / "work"))
    for model in ("x-a", "x-b"):
        (problem,) = items[model].problems
        assert problem["severity"] == "error"
        message = problem["message"]
        assert f"model '{model}': source 'x' (uri 's3://{BUCKET}/exports/{late:%Y-%m-%d}/sales'" in message
        assert "does not exist" in message and "Fix: correct sources.x.uri" in message


def test_a_transient_failure_is_retried_by_the_reader(store):
    proxy = store["proxy"]
    reg_source = _source_at(store, proxy.url)
    proxy.fail, proxy.failed = 2, 0  # a reset connection, then 503 SlowDown
    fp = fingerprint_source(reg_source, io_errors="raise")
    assert proxy.failed == 2 and proxy.fail == 0  # both failures happened
    assert fp.rows == 2 * N_DAYS  # and the reader went on: the AWS SDK retried them
    out = read_series(reg_source, ["a"], ["y"], io_errors="raise")
    assert out["a"].time.size == N_DAYS and out["a"].problems == ()
    # a store that keeps failing: the OSError is left to the staging task's retries (not a source error)
    proxy.fail, proxy.failed = 1000, 0
    try:
        with pytest.raises(OSError) as caught:
            fingerprint_source(reg_source, io_errors="raise")
        assert not isinstance(caught.value, ExtractError)
        assert proxy.failed > 1  # retried before giving up
    finally:
        proxy.fail = 0


def _source_at(store, url: str):
    from fitaudit.tasks.registry import SourceEntry

    return SourceEntry(
        name="x",
        uri=TEMPLATE,
        key="series",
        time="date",
        value="y",
        frequency="D",
        partitioning="hive",
        storage_options={**_options(store, url=url)},
    ).for_as_of(AS_OF)


@pytest.mark.server
def test_credentials_from_a_block_and_a_refusal_named_per_source(store, tmp_path, prefect_server):
    from fitaudit.tasks.extracts import ObjectStoreCredentials

    for user in ("reader", "outsider"):
        key, secret = store["keys"][user]
        ObjectStoreCredentials(
            access_key_id=key, secret_access_key=secret, endpoint_url=store["url"], region=REGION
        ).save(f"test-{user}", overwrite=True)
    reg = _registry(
        tmp_path,
        {
            "good": {"credentials": "fitaudit-store-credentials/test-reader"},
            "denied": {"credentials": "fitaudit-store-credentials/test-outsider"},
            "unknown": {"credentials": "fitaudit-store-credentials/test-nobody"},
        },
    )
    with enforced(store):
        items = _items(batches.stage_inputs(reg, AS_OF, tmp_path / "work"))
        with pytest.raises(ExtractError, match="refused access"):  # not an OSError: no retry would help
            read_series(reg.sources["denied"].for_as_of(AS_OF), ["a"], ["y"], io_errors="raise")
    assert items["good-a"].problems == () and items["good-b"].problems == ()
    for model in ("denied-a", "denied-b"):
        (problem,) = items[model].problems
        message = problem["message"]
        assert problem["severity"] == "error"
        assert f"model '{model}': source 'denied' (uri 's3://{BUCKET}/exports/{AS_OF:%Y-%m-%d}/sales'" in message
        assert "the object store refused access" in message and "ACCESS_DENIED" in message
        assert "Fix: give the credentials of Block 'fitaudit-store-credentials/test-outsider' read access" in message
    (problem,) = items["unknown-a"].problems
    assert "the credentials Block 'fitaudit-store-credentials/test-nobody' cannot be loaded" in problem["message"]
    text = json.dumps([i.problems for i in items.values()])
    assert not any(secret in text for secret in _secrets(store))


@pytest.mark.server
def test_the_audit_flow_audits_the_good_source_and_names_the_broken_ones(store, tmp_path, prefect_server):
    from fitaudit.flows.audit import audit_flow
    from fitaudit.tasks.extracts import ObjectStoreCredentials

    for user in ("reader", "outsider"):
        key, secret = store["keys"][user]
        ObjectStoreCredentials(
            access_key_id=key, secret_access_key=secret, endpoint_url=store["url"], region=REGION
        ).save(f"flow-{user}", overwrite=True)
    root = tmp_path / "fleet"
    _registry(
        root,
        {
            "good": {"credentials": "fitaudit-store-credentials/flow-reader"},
            "denied": {"credentials": "fitaudit-store-credentials/flow-outsider"},
            "missing": {
                "credentials": "fitaudit-store-credentials/flow-reader",
                "uri": f"s3://{BUCKET}/exports/{{as_of:%Y-%m-%d}}/returns",
            },
        },
    )
    with enforced(store):
        state = audit_flow(
            registry=str(root / "registry.yaml"), as_of=AS_OF, archive=str(tmp_path / "archive"), return_state=True
        )
    run = state.result()
    (stage,) = _stage_task_runs(state.state_details.flow_run_id)
    assert stage.run_count == 1 and stage.state.is_completed()  # a refusal or a missing object is not retried
    records = {m["id"]: m for m in results_of(run)["models"]}
    assert records["good-a"]["verdict"] in AUDITED and records["good-b"]["verdict"] in AUDITED
    for model, needle in (
        ("denied-a", "the object store refused access"),
        ("denied-b", "the object store refused access"),
        ("missing-a", "does not exist"),
        ("missing-b", "does not exist"),
    ):
        assert records[model]["verdict"] == "error"
        reasons = " ".join(records[model]["reasons"])
        assert f"model '{model}'" in reasons and f"s3://{BUCKET}/exports/{AS_OF:%Y-%m-%d}/" in reasons
        assert needle in reasons and "Fix:" in reasons
    folder = pathlib.Path(run["report"]).parent
    manifest = json.loads((folder / "manifest.json").read_text())
    assert manifest["inputs"]["good"]["uri"] == f"s3://{BUCKET}/exports/{AS_OF:%Y-%m-%d}/sales"
    assert manifest["inputs"]["good"]["uri_template"] == TEMPLATE
    assert set(manifest["source_errors"]) == {"denied", "missing"}
    for path in folder.rglob("*"):  # manifest, results, report pages: no secret anywhere
        if path.is_file():
            data = path.read_bytes()
            assert not any(secret.encode() in data for secret in _secrets(store)), path


def test_the_fingerprint_cache_keys_object_store_files_by_etag(store, tmp_path, monkeypatch):
    from fitaudit.tasks import extracts

    source = _source_at(store, store["url"])
    cache = extracts.FingerprintCache(tmp_path / "cache.json")
    first = fingerprint_source(source, cache=cache)
    assert (cache.hits, cache.misses) == (0, 2)
    cache.save()
    entries = json.loads((tmp_path / "cache.json").read_text())["files"]
    assert all(e["version"].strip('"') and "mtime_ns" not in e for e in entries.values())  # keyed by the ETag
    hashed = []
    real = extracts.fingerprints._hash_file
    monkeypatch.setattr(extracts.fingerprints, "_hash_file", lambda loc, path: hashed.append(path) or real(loc, path))
    again = extracts.FingerprintCache(tmp_path / "cache.json")
    assert fingerprint_source(source, cache=again).to_dict() == first.to_dict()
    assert hashed == [] and (again.hits, again.misses) == (2, 0)  # no byte downloaded again
    # a new upload of one object (a new ETag at the same path) is hashed again
    s3 = boto3.client(
        "s3", endpoint_url=store["url"], region_name=REGION, aws_access_key_id="admin", aws_secret_access_key="admin"
    )
    key = f"exports/{AS_OF:%Y-%m-%d}/sales/region=north/part-0.parquet"
    body = s3.get_object(Bucket=BUCKET, Key=key)["Body"].read()
    table = pq.read_table(io.BytesIO(body))
    changed = table.set_column(table.schema.get_field_index("y"), "y", [np.asarray(table["y"]) + 1.0])
    try:
        s3.put_object(Bucket=BUCKET, Key=key, Body=_parquet_bytes(changed))
        third = fingerprint_source(source, cache=extracts.FingerprintCache(tmp_path / "cache.json"))
        assert len(hashed) == 1 and hashed[0].endswith("region=north/part-0.parquet")
        assert third.files[0].sha256 != first.files[0].sha256 and third.files[1] == first.files[1]
    finally:
        s3.put_object(Bucket=BUCKET, Key=key, Body=body)


def test_an_fsspec_file_system_serves_a_source(tmp_path):
    import fsspec

    memory = fsspec.filesystem("memory")
    table = long_table({"a": {"date": days(), "y": ar1(np.random.default_rng(3))}})
    with memory.open("/exports/sales.parquet", "wb") as f:
        f.write(_parquet_bytes(table))
    from fitaudit.tasks.registry import SourceEntry

    source = SourceEntry(
        name="m",
        uri="memory://exports/sales.parquet",
        key="series",
        time="date",
        value="y",
        frequency="D",
        filesystem="fsspec",
        storage_options={},
    )
    out = read_series(source, ["a"], ["y"])
    assert out["a"].time.size == N_DAYS and out["a"].problems == ()
    np.testing.assert_array_equal(out["a"].columns["y"], np.asarray(table["y"]))
    assert fingerprint_source(source).rows == N_DAYS
