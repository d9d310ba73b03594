"""The local cluster of `--engine dask` serves only its own run; a remote scheduler needs TLS.

The cluster is started exactly as a release starts it (``engine_dask._open_client`` with no
scheduler): every endpoint (scheduler, workers, nannies) speaks TLS with mutual
authentication under credentials made for the run.  Other processes on the machine try what
an attacker would: plaintext, TLS without a certificate, TLS with credentials of another run,
and a dask Client without security.  Each must fail within a short timeout, while the run's
own client, checked first at every endpoint, gets an answer.  A release through that cluster
still writes the local engine's parts byte for byte.  Input: the invented staff survey of the
demo scenario; fixed key and nonce.
"""

from __future__ import annotations

import asyncio
import gc
import json
import ssl
import time
from pathlib import Path
from typing import Any

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from conftest import assert_close_nested, DEMO_CSV, FIXED_KEY_BYTES, survey_policy
from ldptransform import estimate, privatize
from ldptransform.errors import UsageError
from ldptransform.keys import SecretKey
from ldptransform.policy import parse_policy

distributed = pytest.importorskip("distributed")

from distributed.security import Security  # noqa: E402

from ldptransform import engine_dask  # noqa: E402

KEY = SecretKey(FIXED_KEY_BYTES)
NONCE = "00112233445566778899aabbccddeeff"
REFUSED_WITHIN = 10.0  # seconds: a refusal is an error at the handshake, not a hang


async def _identity(address: str, **connection_args: Any) -> dict:
    """Open a comm to a dask endpoint and ask its identity (any endpoint answers that)."""
    from distributed.comm import connect

    comm = await connect(address, timeout=5, **connection_args)
    try:
        await comm.write({"op": "identity", "reply": True})
        return await comm.read()
    finally:
        await comm.close()


def _refused(fn: Any) -> BaseException:
    """Run ``fn``; it must raise a connection error (or a missing-TLS error) within REFUSED_WITHIN."""
    gc.collect()  # a refused Client left for the garbage collector can close itself (and stop its event loop)
    t0 = time.perf_counter()  # inside the next Client's start-up, under its loop lock: a deadlock (seen once)
    with pytest.raises((OSError, TimeoutError, TypeError)) as info:
        fn()
    assert time.perf_counter() - t0 < REFUSED_WITHIN
    err = info.value
    del info
    gc.collect()
    return err


@pytest.fixture(scope="module")
def run_cluster():
    """The cluster a release starts for itself (no --scheduler), with its authenticated client."""
    client, cluster = engine_dask._open_client(None)
    try:
        yield client, cluster
    finally:
        engine_dask._close(client, cluster)


def test_every_endpoint_of_the_local_cluster_speaks_tls_on_loopback(run_cluster) -> None:
    client, cluster = run_cluster
    info = client.scheduler_info()
    workers = info["workers"]
    assert len(workers) == engine_dask.DEFAULT_WORKERS
    endpoints = [cluster.scheduler_address, *workers, *(w["nanny"] for w in workers.values())]
    assert all(a.startswith("tls://127.0.0.1:") for a in endpoints), endpoints
    sec = client.security
    assert sec.require_encryption
    # the credentials are held in memory (PEM text), not as paths to files, and never printed
    for field in ("tls_ca_file", "tls_client_key", "tls_client_cert", "tls_scheduler_key", "tls_worker_key"):
        assert "-----BEGIN" in getattr(sec, field), field
    assert "PRIVATE KEY" not in repr(sec) and "BEGIN" not in repr(sec)


def test_the_local_cluster_refuses_whoever_lacks_the_runs_credentials(run_cluster) -> None:
    client, cluster = run_cluster
    workers = client.scheduler_info()["workers"]
    endpoints = [cluster.scheduler_address, *workers, *(w["nanny"] for w in workers.values())]
    own = client.security.get_connection_args("client")
    no_cert = ssl.create_default_context()
    no_cert.check_hostname = False
    no_cert.verify_mode = ssl.CERT_NONE  # TLS that trusts anyone and presents no certificate
    other_run = Security.temporary()
    for address in endpoints:
        # the run's own credentials get an answer (so the refusals below are about credentials)
        assert asyncio.run(_identity(address, **own))["type"] in ("Scheduler", "Worker", "Nanny")
        _refused(lambda a=address: asyncio.run(_identity(a.replace("tls://", "tcp://"))))
        _refused(lambda a=address: asyncio.run(_identity(a, ssl_context=no_cert)))
        _refused(lambda a=address: asyncio.run(_identity(a, **other_run.get_connection_args("client"))))
    # a dask Client as another process would open it: no security at all, plaintext, another run's
    from distributed import Client

    address = cluster.scheduler_address
    _refused(lambda: Client(address, timeout=5))
    _refused(lambda: Client(address.replace("tls://", "tcp://"), timeout=5))
    err = _refused(lambda: Client(address, security=other_run, timeout=5))
    assert "certificate" in str(err).lower()
    # none of them got through: the scheduler knows only the run's own client
    clients = client.run_on_scheduler(lambda dask_scheduler: sorted(dask_scheduler.clients))
    assert [c for c in clients if c != "fire-and-forget"] == [client.id]
    # and the run's client still works
    assert client.submit(sum, [1, 2, 3], pure=False).result(timeout=30) == 6


def test_the_clusters_http_servers_serve_no_page(run_cluster) -> None:
    """The scheduler and every worker start a plaintext HTTP server whatever they are told; on
    the run's cluster it answers 404 to the pages it would serve (dashboard, cluster state,
    metrics, health), and the scheduler's is not on the well-known port."""
    import urllib.error
    import urllib.request

    client, cluster = run_cluster
    ports = [cluster.scheduler.http_server.port]
    ports += list(client.run(lambda dask_worker: dask_worker.http_server.port).values())
    assert len(ports) == 1 + engine_dask.DEFAULT_WORKERS and 8787 not in ports[:1]
    pages = ["/", "/status", "/health", "/metrics", "/json/identity.json", "/info/main/workers.html",
             "/info/main/logs.html", "/statics/css/base.css", "/proxy/8787/127.0.0.1/status"]
    for port in ports:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/sitemap.json", timeout=5) as r:
            assert json.loads(r.read()) == {"paths": ["/sitemap.json"]}  # the server answers: it lists nothing
        for page in pages:
            with pytest.raises(urllib.error.HTTPError) as info:
                urllib.request.urlopen(f"http://127.0.0.1:{port}{page}", timeout=5)
            assert info.value.code == 404, (port, page)


def test_each_run_makes_credentials_of_its_own() -> None:
    """Two clusters, two sets of credentials: neither's client is accepted by the other."""
    from distributed import Client

    c1, s1 = engine_dask.start_local_cluster(n_workers=1)
    try:
        c2, s2 = engine_dask.start_local_cluster(n_workers=1)
        try:
            assert s1.tls_ca_file != s2.tls_ca_file and s1.tls_client_key != s2.tls_client_key
            _refused(lambda: Client(c1.scheduler_address, security=s2, timeout=5))
            _refused(lambda: Client(c2.scheduler_address, security=s1, timeout=5))
            with Client(c1.scheduler_address, security=s1, timeout=10) as ok:
                assert ok.submit(len, "abc", pure=False).result(timeout=30) == 3
        finally:
            c2.close()
    finally:
        c1.close()


@pytest.fixture(scope="module")
def dataset(tmp_path_factory: pytest.TempPathFactory) -> Path:
    survey = pd.read_csv(DEMO_CSV, dtype={"staff_id": str, "site": str, "role": str, "would_recommend": str,
                                          "survey_wave": str})
    d = tmp_path_factory.mktemp("data") / "survey"
    d.mkdir()
    t = pa.Table.from_pandas(survey, preserve_index=False)
    pq.write_table(t.slice(0, 5000), d / "a.parquet", row_group_size=1000)
    pq.write_table(t.slice(5000), d / "b.parquet", row_group_size=2500)
    return d


def test_a_release_on_the_authenticated_cluster_equals_the_local_engines(dataset: Path, tmp_path: Path,
                                                                          monkeypatch: pytest.MonkeyPatch) -> None:
    """privatize and estimate with --engine dask and no scheduler: their own TLS clusters, the
    local engine's parts byte for byte, the same estimates (up to the order of float sums)."""
    started: list[str] = []
    real = engine_dask.start_local_cluster

    def spy(*args: Any, **kwargs: Any) -> Any:
        cluster, security = real(*args, **kwargs)
        started.append(cluster.scheduler_address)
        return cluster, security

    monkeypatch.setattr(engine_dask, "start_local_cluster", spy)
    pol = parse_policy(survey_policy(), "survey.yaml")
    loc = privatize(dataset, pol, KEY, tmp_path / "local", nonce=NONCE, fragment_rows=3000)
    dsk = privatize(dataset, pol, KEY, tmp_path / "dask", nonce=NONCE, fragment_rows=3000, engine="dask")
    assert len(started) == 1 and started[0].startswith("tls://127.0.0.1:")
    parts = sorted(p.name for p in (tmp_path / "local").iterdir())
    assert len(parts) == 4
    assert parts == sorted(p.name for p in (tmp_path / "dask").iterdir())
    for name in parts:
        assert (tmp_path / "local" / name).read_bytes() == (tmp_path / "dask" / name).read_bytes(), name
    assert loc.manifest.extract.sha256 == dsk.manifest.extract.sha256
    assert json.loads(dsk.diagnostics_path.read_text())["engine"] == "dask"

    a = estimate(tmp_path / "local").to_dict()
    b = estimate(tmp_path / "local", engine="dask").to_dict()
    assert len(started) == 2 and started[1].startswith("tls://127.0.0.1:")
    assert a["rows"] == b["rows"] == 12000
    for d in (a, b):
        d.pop("extract", None)
        d.pop("extracts", None)
    assert_close_nested(a, b, "estimate")


# -- a scheduler given with --scheduler ----------------------------------------------------------

@pytest.mark.parametrize("address", ["tls://10.1.2.3:8786", "tls://scheduler.example:8786", "TLS://10.1.2.3:8786",
                                     "tcp://127.0.0.1:8786", "127.0.0.1:8786", "tcp://localhost:8786",
                                     "tcp://[::1]:8786", "inproc://10.1.2.3/1/2"])
def test_tls_anywhere_or_plaintext_on_this_machine_is_accepted(address: str) -> None:
    engine_dask.check_scheduler_address(address)


@pytest.mark.parametrize("address", ["tcp://10.1.2.3:8786", "10.1.2.3:8786", "ws://10.1.2.3:8786",
                                     "ucx://10.1.2.3:8786", "tcp://[2001:db8::1]:8786", "TCP://192.168.0.7:8786"])
def test_plaintext_to_another_machine_is_refused(address: str) -> None:
    with pytest.raises(UsageError, match=r"not encrypted.*Use a tls:// address"):
        engine_dask.check_scheduler_address(address)


def test_an_unknown_scheme_is_refused() -> None:
    with pytest.raises(UsageError, match=r"unknown address scheme 'http'.*tls://HOST:PORT"):
        engine_dask.check_scheduler_address("http://10.1.2.3:8786")


def test_a_release_refuses_a_plaintext_remote_scheduler_before_writing(dataset: Path, tmp_path: Path) -> None:
    """The check runs before any connection: nothing is written, no key leaves the process."""
    pol = parse_policy(survey_policy(), "survey.yaml")
    with pytest.raises(UsageError, match=r"--scheduler 'tcp://10.1.2.3:8786'.*not encrypted"):
        privatize(dataset, pol, KEY, tmp_path / "out", nonce=NONCE, engine="dask", scheduler="tcp://10.1.2.3:8786")
    assert list(tmp_path.iterdir()) == []
