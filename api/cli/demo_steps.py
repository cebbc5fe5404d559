"""The main job end to end on the demo corpus: index, train, evaluate, serve, ask once."""

from __future__ import annotations

import json
import os
import shlex
import signal
import socket
import subprocess
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import httpx

from corpus_demo import DEFAULT_DATA_DIR, generate_corpus
from reranker import Payoff, load_model
from reranker.training import evaluate, train
from retriever import build_index


@dataclass
class DemoRun:
    """Where the demo put things and what it measured."""

    out: Path
    index: Path
    model: Path
    report: Path
    summary: str
    metrics: dict[str, Any]
    sample_request: dict[str, Any] = field(default_factory=dict)
    sample_response: dict[str, Any] = field(default_factory=dict)
    server_exit: int | None = None  # the service's exit status, once it has stopped


# An invented payoff that values speed: a right answer is worth 1 at the first word and half
# of that after the whole clue; a wrong one costs 1; abstaining 0.
DEMO_PAYOFF = Payoff(reward=1.0, penalty=1.0, reward_fall=0.5)


def _say(message: str) -> None:
    print(message, flush=True)


def sample_clue(data_dir: Path) -> tuple[str, float]:
    """The first words of the first test clue, what an application sees mid-clue, and the
    share of the clue they are."""
    with open(data_dir / "questions_test.jsonl", encoding="utf-8") as fh:
        clue = str(json.loads(fh.readline())["clue"])
    words = clue.split()
    kept = min(len(words), max(8, int(len(words) * 0.6)))
    return " ".join(words[:kept]), round(kept / len(words), 3)


def prepare(out: Path, *, articles: int | None = None, seed: int = 7) -> Path:
    """The demo data folder: the committed one, or a freshly generated corpus of `articles`."""
    if articles is None:
        return Path(DEFAULT_DATA_DIR)
    data = out / "data"
    _say(f"generating an invented corpus of {articles} articles into {data} ...")
    generate_corpus(data, n_articles=articles, n_questions=max(1200, articles // 20), seed=seed)
    return data


def run_demo(
    out: str | Path, *, articles: int | None = None, ablation: bool = True, progress: bool = True
) -> DemoRun:
    """Build the demo index, train the reranker, evaluate it on held-out clues, write a report.

    `progress` shows progress bars on stderr (the command line passes True only on a terminal).
    """
    out = Path(out).resolve()
    if out.exists() and not out.is_dir():
        raise NotADirectoryError(
            f"{out} is a file, not a folder; the demo writes its index, model and report into "
            "a folder: choose a new name or an existing folder"
        )
    out.mkdir(parents=True, exist_ok=True)
    data = prepare(out, articles=articles)
    _say(f"[1/3] indexing {data / 'articles.jsonl'} -> {out / 'index'}")
    # One training thread: the demo's vectors, and so its figures, are the same on every run.
    # 20 epochs, not the 40 the rule gives its 112,000 words: on one thread, with the three
    # refinings at the same epochs, 40 made the demo about twice as long (quality at 20
    # against 40 not measured on the demo's clues).
    vectors = {"threads": 1, "epochs": 20}
    index = build_index(data / "articles.jsonl", out / "index", progress=progress, vectors=vectors)
    c = index.manifest["counts"]
    _say(
        f"      {c['articles']} articles, {c['terms']} terms, "
        f"{index.manifest['build']['unresolved_links']} unresolved links"
    )
    _say(f"[2/3] training on {data / 'questions_train.jsonl'} -> {out / 'model.json'}")
    res = train(
        index,
        [data / "questions_train.jsonl"],
        out / "model.json",
        payoff=DEMO_PAYOFF,
        progress=progress,
    )
    a = res.artifact
    _say(
        f"      {a['training']['clues']} clues, {a['training']['rows']} candidate rows, "
        f"C={a['C']}, "
        f"calibration={a['calibration']['method']}, threshold={a['decision']['threshold']:.2f}, "
        "thresholds by share revealed "
        + " / ".join(f"{t:.2f}" for t in a["decision"]["schedule"]["thresholds"])
        + " (a right answer's reward falls by half across the clue)"
    )
    _say(f"[3/3] evaluating on held-out {data / 'questions_test.jsonl'} -> {out / 'report'}")
    model = load_model(out / "model.json", index=index)
    ev = evaluate(
        index,
        model,
        [data / "questions_test.jsonl"],
        out / "report",
        run_ablation=ablation,
        progress=progress,
    )
    return DemoRun(
        out=out,
        index=out / "index",
        model=out / "model.json",
        report=ev.paths["report"],
        summary=ev.summary,
        metrics=ev.metrics,
    )


SHOWN = 3  # candidates the sample request asks for (and the printout shows)
TRY_WORDS = 10  # words of the sample clue in the try-it-yourself command


def free_port(host: str = "127.0.0.1") -> int:
    """A TCP port nobody listens on right now."""
    with socket.socket() as s:
        s.bind((host, 0))
        return int(s.getsockname()[1])


def check_port(host: str, port: int) -> None:
    """OSError naming the port when something already listens on it (the demo would send its
    sample clue to that other service and take its answer for its own)."""
    with socket.socket() as s:
        try:
            s.bind((host, port))
        except OSError as exc:
            raise OSError(
                f"port {port} on {host} is already in use ({exc.strerror}): stop what listens "
                "there (an earlier demo?) or pick another with --port (0: any free port)"
            ) from None


def serve_and_ask(
    run: DemoRun, data: Path, *, host: str = "127.0.0.1", port: int = 0, wait: bool = True
) -> DemoRun:
    """Start `hunchwise serve` on loopback, send one sample clue, print both, then keep serving."""
    if port:
        check_port(host, port)
    port = port or free_port(host)
    cmd = [
        sys.executable,
        "-m",
        "api.cli",
        "serve",
        "--index",
        str(run.index),
        "--model",
        str(run.model),
        "--host",
        host,
        "--port",
        str(port),
        "--log-dir",
        str(run.out / "logs"),
    ]
    proc = subprocess.Popen(cmd, env={**os.environ, "PYTHONUNBUFFERED": "1"})
    base = f"http://{host}:{port}"
    try:
        deadline = time.monotonic() + 60
        with httpx.Client(base_url=base, timeout=10) as client:
            while True:
                try:
                    if client.get("/readyz").status_code == 200:
                        break
                except httpx.TransportError:
                    pass
                if proc.poll() is not None or time.monotonic() > deadline:
                    raise RuntimeError(f"the server did not start (command: {' '.join(cmd)})")
                time.sleep(0.2)
            if proc.poll() is not None:  # another service answered: ours has stopped
                raise OSError(f"the service did not start on {base} (exit status {proc.poll()})")
            clue, share = sample_clue(data)
            body: dict[str, Any] = {"clue": clue, "k": SHOWN, "revealed": share}
            reply = client.post("/v1/rank", json=body)
            reply.raise_for_status()
        run.sample_request, run.sample_response = body, reply.json()
        _say(f"\nservice running at {base} (API docs: {base}/docs)")
        _say(f"sample request:  POST {base}/v1/rank\n{json.dumps(body, indent=2)}")
        _say(
            f"sample response (numbers rounded to 3 significant digits here):\n"
            f"{json.dumps(for_people(run.sample_response), indent=2)}"
        )
        short = " ".join(clue.split()[:TRY_WORDS])  # whole words: a clue cut mid-word misleads
        _say(
            "\ntry it yourself:\n"
            f"  curl -s {base}/v1/rank -H 'content-type: application/json' "
            f"-d {shlex.quote(json.dumps({'clue': short, 'k': SHOWN}))}"
        )
        if wait:
            # A shell starting us in the background sets Ctrl-C to "ignore", and that is
            # inherited; we promise Ctrl-C stops the demo, so take it back.
            signal.signal(signal.SIGINT, signal.default_int_handler)
            _say("\nPress Ctrl-C to stop the service.")
            run.server_exit = proc.wait()
    except KeyboardInterrupt:
        pass
    finally:
        if proc.poll() is None:
            proc.terminate()
            try:
                proc.wait(timeout=15)
            except subprocess.TimeoutExpired:
                proc.kill()
    return run


def for_people(value: Any) -> Any:
    """A JSON value with every float rounded to 3 significant digits, for reading."""
    if isinstance(value, float):
        return float(f"{value:.3g}")
    if isinstance(value, dict):
        return {k: for_people(v) for k, v in value.items()}
    if isinstance(value, list):
        return [for_people(v) for v in value]
    return value
