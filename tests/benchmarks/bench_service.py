"""Load benchmark of `hunchwise serve`: POST /v1/rank on a 100k-article index, loopback only.

Not a test: it prints a table. For 1 and 2 workers it measures
  * closed-loop throughput: C connections sending back to back (Debian's `wrk` when
    installed, else an asyncio httpx client), requests/s and latency percentiles;
  * open-loop latency at a fixed rate (default 1,000 req/s): requests are sent on a
    schedule and latency counts from the scheduled time, so a stall is not hidden
    (coordinated omission);
  * the server's resident memory (parent plus workers, psutil);
  * the server's CPU time per request (parent plus workers, psutil) and the load generator's
    own CPU time per request (this process, and wrk when it is used).
Peer measured in the same run: the library call `rank_clue` in one thread, without HTTP, as
clues/s and as CPU time per clue; "CPU vs lib" is the server's CPU per request over it.
`--server-root` runs the server from another checkout (e.g. the previous commit) to compare
two versions in one run.

    python -m tests.benchmarks.bench_service [--articles 100000] [--work runs/bench-service]
"""

from __future__ import annotations

import argparse
import asyncio
import gc
import json
import os
import resource
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import psutil

from tests.api.svc_helpers import HOST, free_port, serve_command

ROOT = Path(__file__).resolve().parents[2]
LUA = """
counter = 0
request = function()
  counter = counter + 1
  return wrk.format("POST", "/v1/rank", {["Content-Type"] = "application/json"},
                    bodies[(counter %% #bodies) + 1])
end
done = function(summary, latency, requests)
  local e = summary.errors
  io.write(string.format("RESULT %%d %%d %%d %%.1f %%.1f %%.1f %%.1f\\n", summary.requests,
    summary.duration, e.status + e.connect + e.read + e.write + e.timeout,
    latency:percentile(50), latency:percentile(95), latency:percentile(99), latency.max))
end
bodies = {%s}
"""


def run(cmd: list[str]) -> None:
    """Run a command from the repo root, failing loudly."""
    print("$", " ".join(cmd), flush=True)
    subprocess.run(cmd, cwd=ROOT, check=True)


def prepare(work: Path, articles: int, candidates: str) -> tuple[Path, Path, list[str]]:
    """Corpus, index and model in `work` (reused when already there); the model proposes
    candidates as `hunchwise train --candidates` says ("auto": hybrid, what a new user gets)."""
    data, index = work / "data", work / "index"
    model = work / ("model.json" if candidates == "auto" else f"model-{candidates}.json")
    py = [sys.executable, "-m"]
    if not (data / "articles.jsonl").exists():
        run(
            [
                *py,
                "corpus_demo.generate",
                "--articles",
                str(articles),
                "--questions",
                "2000",
                "--out",
                str(data),
                "--no-progress",
            ]
        )
    if not (index / "manifest.json").exists():
        run(
            [
                *py,
                "api.cli",
                "index",
                "build",
                str(data / "articles.jsonl"),
                "--out",
                str(index),
                "--json",
            ]
        )
    if not model.exists():
        run(
            [
                *py,
                "api.cli",
                "train",
                "--index",
                str(index),
                "--log",
                str(data / "questions_train.jsonl"),
                "--out",
                str(model),
                "--candidates",
                candidates,
            ]
        )
    lines = (data / "questions_test.jsonl").read_text(encoding="utf-8").splitlines()
    return index, model, [json.loads(x)["clue"] for x in lines if x.strip()]


def library_peer(index: Path, model: Path, clues: list[str], seconds: float) -> tuple[float, float]:
    """rank_clue itself, one thread, no HTTP: (clues per second, CPU seconds per clue). It does
    what the server does for the benchmark's requests (no features asked for, none logged)."""
    from reranker import load_model, rank_clue
    from retriever import load_index

    idx = load_index(index)
    m = load_model(model, index=idx)
    for c in clues[:20]:
        rank_clue(idx, m, c, k=20)
    n, start, cpu = 0, time.perf_counter(), time.thread_time()
    while time.perf_counter() - start < seconds:
        rank_clue(idx, m, clues[n % len(clues)], k=20)
        n += 1
    return n / (time.perf_counter() - start), (time.thread_time() - cpu) / n


def start_server(
    index: Path, model: Path, workers: int, logs: Path, root: Path = ROOT
) -> tuple[subprocess.Popen[bytes], str]:
    """`hunchwise serve` with `workers` workers; returns once every worker has answered."""
    port = free_port()
    env = {k: v for k, v in os.environ.items() if not k.startswith("HUNCHWISE_")}
    proc = subprocess.Popen(
        serve_command(
            ["--index", str(index), "--model", str(model), "--log-dir", str(logs)], port, workers
        ),
        cwd=root,  # `python -m api.cli` imports the checkout it runs in
        env=env,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
        start_new_session=True,
    )
    url = f"http://{HOST}:{port}"
    pids: set[int] = set()
    deadline = time.monotonic() + 180
    while len(pids) < workers:
        if proc.poll() is not None or time.monotonic() > deadline:
            raise RuntimeError(f"server with {workers} workers did not start")
        try:
            with httpx.Client(base_url=url, timeout=5) as c:
                if c.get("/readyz").status_code == 200:
                    pids.add(c.get("/v1/info").json()["worker_pid"])
        except httpx.TransportError:
            time.sleep(0.2)
    return proc, url


def stop_server(proc: subprocess.Popen[bytes]) -> None:
    """SIGINT, as an operator would; kill only if it hangs."""
    proc.send_signal(signal.SIGINT)
    try:
        proc.wait(timeout=30)
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, signal.SIGKILL)
        proc.wait()


def memory_mib(proc: subprocess.Popen[bytes]) -> tuple[float, float, float]:
    """Server memory, MiB: RSS of parent + workers, PSS of the same (shared pages split), and
    the largest worker's RSS (0 with one worker: then the parent serves)."""
    parent = psutil.Process(proc.pid)
    procs = [parent] + [
        p
        for p in parent.children(recursive=True)
        if "resource_tracker" not in " ".join(p.cmdline())
    ]
    info = [p.memory_full_info() for p in procs]
    rss = sum(i.rss for i in info)
    pss = sum(getattr(i, "pss", i.rss) for i in info)
    worker = max((i.rss for i in info[1:]), default=0)
    return rss / 2**20, pss / 2**20, worker / 2**20


def cpu_seconds(proc: subprocess.Popen[bytes]) -> float:
    """User + system CPU time used so far by the server (parent and workers)."""
    parent = psutil.Process(proc.pid)
    total = 0.0
    for p in [parent, *parent.children(recursive=True)]:
        t = p.cpu_times()
        total += t.user + t.system
    return total


def own_cpu_seconds() -> float:
    """CPU time of the load generator: this process and the children it waited for (wrk)."""
    me = resource.getrusage(resource.RUSAGE_SELF)
    kids = resource.getrusage(resource.RUSAGE_CHILDREN)
    return me.ru_utime + me.ru_stime + kids.ru_utime + kids.ru_stime


def bodies(clues: list[str]) -> list[str]:
    """Request bodies: the held-out clues, k=20."""
    return [json.dumps({"clue": c, "k": 20}) for c in clues]


def wrk_load(
    url: str, clues: list[str], conns: int, seconds: float, work: Path
) -> dict[str, float]:
    """Closed loop with wrk (C, cheap on the shared CPU)."""
    script = work / "rank.lua"
    script.write_text(LUA % ",\n".join(json.dumps(b) for b in bodies(clues)), encoding="utf-8")
    out = subprocess.run(
        ["wrk", "-t1", f"-c{conns}", f"-d{max(1, round(seconds))}s", "-s", str(script), url],
        capture_output=True,
        text=True,
        check=True,
    ).stdout
    line = next(x for x in out.splitlines() if x.startswith("RESULT"))
    n, dur_us, errors, p50, p95, p99, mx = (float(v) for v in line.split()[1:])
    return {
        "rps": n / (dur_us / 1e6),
        "p50": p50 / 1e3,
        "p95": p95 / 1e3,
        "p99": p99 / 1e3,
        "max": mx / 1e3,
        "errors": errors,
        "n": n,
    }


async def _closed(url: str, payloads: list[str], conns: int, seconds: float) -> dict[str, float]:
    lat: list[float] = []
    errors = 0
    stop_at = time.perf_counter() + seconds

    async def one(i: int) -> None:
        nonlocal errors
        async with httpx.AsyncClient(base_url=url, timeout=30) as c:
            n = i
            while time.perf_counter() < stop_at:
                t = time.perf_counter()
                r = await c.post(
                    "/v1/rank",
                    content=payloads[n % len(payloads)],
                    headers={"Content-Type": "application/json"},
                )
                lat.append(time.perf_counter() - t)
                errors += r.status_code != 200
                n += conns

    start = time.perf_counter()
    await asyncio.gather(*[one(i) for i in range(conns)])
    return _summary(lat, errors, time.perf_counter() - start)


class _Conn:
    """One keep-alive HTTP/1.1 connection, spoken by hand: httpx costs too much CPU on the
    two cores the server also needs (common practice for load generators, no source)."""

    def __init__(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        self.reader, self.writer = reader, writer

    async def post(self, raw: bytes) -> int:
        self.writer.write(raw)
        head = await self.reader.readuntil(b"\r\n\r\n")
        status = int(head.split(b" ", 2)[1])
        length = 0
        for line in head.split(b"\r\n"):
            if line[:15].lower() == b"content-length:":
                length = int(line[15:])
        await self.reader.readexactly(length)
        return status


async def _open(url: str, payloads: list[str], rate: float, seconds: float) -> dict[str, float]:
    host, port = url.rsplit("//", 1)[1].split(":")
    raws = [
        (
            f"POST /v1/rank HTTP/1.1\r\nHost: {host}\r\nContent-Type: application/json\r\n"
            f"Content-Length: {len(p.encode())}\r\n\r\n{p}"
        ).encode()
        for p in payloads
    ]
    # The generator's own full GC passes (numpy, httpx, psutil loaded) would show up as server
    # latency, since latency counts from the schedule: keep them off what is already loaded.
    gc.collect()
    gc.freeze()
    idle: asyncio.Queue[_Conn] = asyncio.Queue()
    for _ in range(64):
        idle.put_nowait(_Conn(*await asyncio.open_connection(host, int(port))))
    lat: list[float] = []
    errors = 0

    async def one(i: int, due: float) -> None:
        nonlocal errors
        conn = await idle.get()  # waiting for a free connection counts as latency too
        status = await conn.post(raws[i % len(raws)])
        lat.append(time.perf_counter() - due)  # from the schedule: stalls count
        errors += status != 200
        idle.put_nowait(conn)

    # Tasks are created on schedule, so only the requests in flight exist at any time.
    tasks = []
    start = time.perf_counter()
    for i in range(int(rate * seconds)):
        due = start + i / rate
        delay = due - time.perf_counter()
        if delay > 0:
            await asyncio.sleep(delay)
        tasks.append(asyncio.create_task(one(i, due)))
    await asyncio.gather(*tasks)
    elapsed = time.perf_counter() - start
    while not idle.empty():
        idle.get_nowait().writer.close()
    return _summary(lat, errors, elapsed)


def _row(
    workers: int,
    mode: str,
    result: dict[str, float],
    proc: subprocess.Popen[bytes],
    cpu_before: float,
    own_before: float,
) -> dict[str, Any]:
    """One table row: a load run's figures plus the server's memory and CPU per request,
    and the load generator's own CPU per request."""
    return {
        "workers": workers,
        "mode": mode,
        **result,
        "mem": memory_mib(proc),
        "cpu": (cpu_seconds(proc) - cpu_before) / result["n"],
        "gen_cpu": (own_cpu_seconds() - own_before) / result["n"],
    }


def _summary(lat: list[float], errors: int, seconds: float) -> dict[str, float]:
    a = np.asarray(lat) * 1e3
    return {
        "rps": len(a) / seconds,
        "p50": float(np.percentile(a, 50)),
        "p95": float(np.percentile(a, 95)),
        "p99": float(np.percentile(a, 99)),
        "max": float(a.max()),
        "errors": float(errors),
        "n": float(len(a)),
    }


def main() -> int:
    """Run the benchmark and print the table."""
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawTextHelpFormatter)
    p.add_argument("--articles", type=int, default=100_000)
    p.add_argument(
        "--work",
        type=Path,
        default=ROOT / "runs" / "bench-service",
        help="folder for corpus, index and model (kept and reused)",
    )
    p.add_argument("--workers", default="1,2", help="worker counts to measure (default 1,2)")
    p.add_argument("--connections", type=int, default=8, help="closed-loop connections (default 8)")
    p.add_argument("--seconds", type=float, default=15, help="length of each load run")
    p.add_argument("--rate", type=float, default=1000, help="open-loop rate, req/s (default 1000)")
    p.add_argument(
        "--server-root",
        type=Path,
        default=ROOT,
        help="checkout whose `hunchwise serve` is measured (default: this one)",
    )
    p.add_argument("--tool", choices=["auto", "wrk", "httpx"], default="auto")
    p.add_argument(
        "--candidates",
        choices=["auto", "bm25"],
        default="auto",
        help="train's --candidates for the measured model (default auto: hybrid, as train's)",
    )
    args = p.parse_args()
    work = args.work.resolve()
    work.mkdir(parents=True, exist_ok=True)
    index, model, clues = prepare(work, args.articles, args.candidates)
    tool = "wrk" if args.tool == "wrk" or (args.tool == "auto" and shutil.which("wrk")) else "httpx"
    peer, peer_cpu = library_peer(index, model, clues, 5)
    print(
        f"\npeer: rank_clue in one thread, no HTTP: {peer:.0f} clues/s ({1e3 / peer:.2f} ms "
        f"each, {peer_cpu * 1e3:.2f} ms CPU); load average before the run: "
        f"{os.getloadavg()[0]:.2f}\n",
        flush=True,
    )
    payloads = bodies(clues)
    rows: list[dict[str, Any]] = []
    for workers in [int(w) for w in args.workers.split(",")]:
        logs = Path(tempfile.mkdtemp(prefix="bench-logs-", dir=work))
        proc, url = start_server(index, model, workers, logs, args.server_root.resolve())
        try:
            with httpx.Client(base_url=url, timeout=30) as c:  # warm up every worker's caches
                for b in payloads[:100]:
                    c.post("/v1/rank", content=b, headers={"Content-Type": "application/json"})
            cpu, own = cpu_seconds(proc), own_cpu_seconds()
            if tool == "wrk":
                closed = wrk_load(url, clues, args.connections, args.seconds, work)
            else:
                closed = asyncio.run(_closed(url, payloads, args.connections, args.seconds))
            rows.append(
                _row(workers, f"closed, {args.connections} conns ({tool})", closed, proc, cpu, own)
            )
            cpu, own = cpu_seconds(proc), own_cpu_seconds()
            opened = asyncio.run(_open(url, payloads, args.rate, args.seconds))
            rows.append(
                _row(workers, f"open, {args.rate:.0f} req/s (asyncio)", opened, proc, cpu, own)
            )
        finally:
            stop_server(proc)
            shutil.rmtree(logs, ignore_errors=True)
    print(
        f"\nPOST /v1/rank, k=20, model loaded ({args.candidates} candidates), "
        f"{args.articles} articles, "
        f"{os.cpu_count()} CPUs shared by server and load generator"
    )
    head = (
        f"{'workers':>7}  {'load':<28} {'req/s':>7} {'p50 ms':>7} {'p95 ms':>7} "
        f"{'p99 ms':>7} {'max ms':>7} {'errors':>6} {'RSS MiB':>8} {'PSS MiB':>8} "
        f"{'worker RSS':>10} {'CPU ms/req':>10} {'CPU vs lib':>10} {'gen CPU ms':>10} "
        f"{'vs peer':>7}"
    )
    print(head)
    print("-" * len(head))
    for r in rows:
        rss, pss, worker = r["mem"]
        print(
            f"{r['workers']:>7}  {r['mode']:<28} {r['rps']:>7.0f} {r['p50']:>7.1f} "
            f"{r['p95']:>7.1f} {r['p99']:>7.1f} {r['max']:>7.1f} {r['errors']:>6.0f} "
            f"{rss:>8.0f} {pss:>8.0f} {worker or float('nan'):>10.0f} {r['cpu'] * 1e3:>10.2f} "
            f"{r['cpu'] / peer_cpu:>10.2f} {r['gen_cpu'] * 1e3:>10.2f} {r['rps'] / peer:>7.2f}"
        )
    print(
        "CPU ms/req: server CPU time (all its processes) per request, robust to other load; "
        "CPU vs lib: that over rank_clue's CPU per clue; gen CPU ms: the load generator's own "
        "CPU per request (it shares the cores); vs peer: req/s over the peer's clues/s."
    )
    return 0


if __name__ == "__main__":
    sys.exit(main())
