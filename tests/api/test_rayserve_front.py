"""`hunchwise serve --ray ADDRESS` on a cluster where Ray Serve already runs, and with
several front replicas.

One local Ray cluster for the module, on which Ray Serve is started first at a port of its
own (as another user of the cluster, or an earlier `serve --ray`, would have left it): Serve
keeps its HTTP address for the cluster's life, so the command must say where it really
listens. The reference for the answers is a plain `hunchwise serve` of the unsharded index.
"""

from __future__ import annotations

import subprocess
import time
from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest

from reranker.training import train
from retriever import load_index
from retriever.shards import build_sharded
from tests.api.svc_helpers import (
    HOST,
    Server,
    free_port,
    read_jsonl,
    serve,
    serve_command,
    stop,
    wait_ready,
)

ray = pytest.importorskip("ray", reason="Ray is not installed (pip install '.[cluster]')")
pytest.importorskip("ray.serve", reason="Ray Serve is not installed (pip install '.[cluster]')")

pytestmark = [pytest.mark.slow, pytest.mark.server]

K = 20
N_CLUES = 30


@pytest.fixture(scope="module")
def serve_port() -> Iterator[tuple[str, int]]:
    """A local Ray cluster (six logical CPUs: three shards and up to two fronts), with Ray
    Serve already started on it at a free port; the cluster's address and that port."""
    from ray import serve as ray_serve

    ray.init(num_cpus=6, include_dashboard=False, log_to_driver=False)
    port = free_port()
    ray_serve.start(http_options={"host": HOST, "port": port})
    yield str(ray.get_runtime_context().gcs_address), port
    ray_serve.shutdown()
    ray.shutdown()


@pytest.fixture(scope="module")
def sharded_dir(demo: dict[str, Path], tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The demo corpus in three shards, BM25 only (the build is not under test)."""
    out = tmp_path_factory.mktemp("front-sharded") / "sh"
    return build_sharded(demo["articles"], out, shards=3, vectors=False)


@pytest.fixture(scope="module")
def bm25_model(
    index_dir: Path, demo: dict[str, Path], tmp_path_factory: pytest.TempPathFactory
) -> Path:
    """A model over BM25 candidates."""
    out = tmp_path_factory.mktemp("front-model") / "model.json"
    train(load_index(index_dir), [demo["train"]], out, candidates="bm25")
    return out


def printed_url(proc: subprocess.Popen[bytes], output: Path, timeout: float) -> str:
    """The http://... address the command printed once serving."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        text = output.read_text(encoding="utf-8", errors="replace")
        for line in text.splitlines():
            if line.startswith("serving sharded index"):  # the command's own line, not Ray's
                return next(w for w in line.split() if w.startswith("http://")).rstrip(".,")
        if proc.poll() is not None:
            raise AssertionError(f"serve exited with {proc.returncode}:\n{text}")
        time.sleep(0.2)
    raise AssertionError(f"no address printed after {timeout} s")


def test_the_printed_address_is_where_serve_listens_on_a_running_cluster(
    serve_port: tuple[str, int], sharded_dir: Path, tmp_path: Path
) -> None:
    address, running = serve_port
    asked = free_port()
    assert asked != running
    output = tmp_path / "serve.out"
    cmd = serve_command(["--index", str(sharded_dir), "--ray", address], asked, 1)
    with open(output, "wb") as out:
        proc = subprocess.Popen(cmd, stdout=out, stderr=subprocess.STDOUT, start_new_session=True)
    url = printed_url(proc, output, 300)
    server = Server(url, proc, output)
    try:
        assert url == f"http://{HOST}:{running}", server.log_text()
        wait_ready(server, 1, 300)  # the printed address answers
        assert str(asked) in server.log_text()  # the port asked for is named as not applied
    finally:
        assert stop(server) == 0, server.log_text()


def test_two_front_replicas_answer_as_one_index(
    serve_port: tuple[str, int],
    sharded_dir: Path,
    index_dir: Path,
    bm25_model: Path,
    demo: dict[str, Path],
    tmp_path: Path,
) -> None:
    address, running = serve_port
    rows = read_jsonl(demo["test"]) + read_jsonl(demo["train"])
    texts = [r["clue"] for r in rows[:N_CLUES]]
    bodies = [{"clue": t, "k": K} for t in texts]
    model = ["--model", str(bm25_model)]
    with (
        serve(["--index", str(index_dir), *model], tmp_path) as plain,
        httpx.Client(base_url=plain.url, timeout=60) as c,
    ):
        expected = [c.post("/v1/rank", json=b).json() for b in bodies]
    args = ["--index", str(sharded_dir), *model, "--ray", address, "--front-replicas", "2"]
    with serve(args, tmp_path, port=running, ready_timeout=300) as sharded:
        wait_ready(sharded, 2, 300)  # both front replicas have answered
        got, pids = [], set()
        for b in bodies * 2:  # a new connection each time: the proxy may pick either front
            with httpx.Client(base_url=sharded.url, timeout=60) as c:
                reply = c.post("/v1/rank", json=b)
                pids.add(c.get("/v1/info").json()["worker_pid"])
            assert reply.status_code == 200, reply.text
            got.append(reply.json())
    assert len(pids) == 2
    for want, have in zip(expected * 2, got, strict=True):
        assert [c["id"] for c in have["candidates"]] == [c["id"] for c in want["candidates"]]
        for cw, ch in zip(want["candidates"], have["candidates"], strict=True):
            assert ch["score"] == cw["score"], cw["id"]
            assert ch["probability"] == pytest.approx(cw["probability"], abs=1e-12, rel=0)
        assert have["decision"] == want["decision"]
