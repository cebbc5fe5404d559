"""Fixtures of the service tests: an invented demo corpus, its index, a trained model, apps."""

from __future__ import annotations

import contextlib
import json
import shutil
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest

from api.app import create_app
from api.settings import ServiceSettings
from corpus_demo.pipeline import generate_corpus
from reranker.training import train
from retriever import build_index, load_index
from tests.api.svc_helpers import ADMIN_TOKEN, TestClient

N_ARTICLES = 400
N_QUESTIONS = 300


@pytest.fixture(scope="session")
def demo(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """A small invented corpus with train/test questions (corpus_demo's generator, fixed seed)."""
    out = tmp_path_factory.mktemp("demo")
    generate_corpus(out, n_articles=N_ARTICLES, n_questions=N_QUESTIONS, seed=7, progress=False)
    return {
        "articles": out / "articles.jsonl",
        "train": out / "questions_train.jsonl",
        "test": out / "questions_test.jsonl",
    }


@pytest.fixture(scope="session")
def index_dir(demo: dict[str, Path], tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The demo corpus indexed once per session (tests that change an index copy it first)."""
    out = tmp_path_factory.mktemp("index") / "idx"
    build_index(demo["articles"], out)
    return out


@pytest.fixture(scope="session")
def model_path(
    index_dir: Path, demo: dict[str, Path], tmp_path_factory: pytest.TempPathFactory
) -> Path:
    """A reranker trained on the demo's training questions."""
    out = tmp_path_factory.mktemp("model") / "model.json"
    train(load_index(index_dir), [demo["train"]], out)
    return out


@pytest.fixture(scope="session")
def other_model_path(
    index_dir: Path, demo: dict[str, Path], tmp_path_factory: pytest.TempPathFactory
) -> Path:
    """A second model (half the questions, fewer candidates): another version to reload."""
    folder = tmp_path_factory.mktemp("model2")
    half = folder / "half.jsonl"
    lines = demo["train"].read_text(encoding="utf-8").splitlines()
    half.write_text("\n".join(lines[: len(lines) // 2]) + "\n", encoding="utf-8")
    out = folder / "model.json"
    train(load_index(index_dir), [half], out, k=10)
    return out


@pytest.fixture(scope="session")
def test_questions(demo: dict[str, Path], index_dir: Path) -> list[dict[str, Any]]:
    """Held-out demo questions: clue, gold answer as written, and its article id ('gold')."""
    idx = load_index(index_dir)
    lines = demo["test"].read_text(encoding="utf-8").splitlines()
    out = [json.loads(line) for line in lines if line.strip()]
    for q in out:
        q["gold"] = idx.resolve(q["answer"])
        if q["gold"] is None:
            raise ValueError(f"demo answer {q['answer']!r} names no article")
    return out


@pytest.fixture
def own_index(index_dir: Path, tmp_path: Path) -> Path:
    """A private copy of the index, for tests that add or remove articles."""
    dst = tmp_path / "idx"
    shutil.copytree(index_dir, dst)
    return dst


@pytest.fixture
def make_client(
    index_dir: Path, model_path: Path, tmp_path: Path
) -> Callable[..., contextlib.AbstractContextManager[TestClient]]:
    """Factory: a TestClient whose app runs its lifespan; keyword arguments override settings."""

    @contextlib.contextmanager
    def factory(**overrides: Any) -> Iterator[TestClient]:
        values: dict[str, Any] = {
            "index_dir": index_dir,
            "model_path": model_path,
            "log_dir": tmp_path / "log",
            "state_dir": tmp_path / "state",
            "admin_token": ADMIN_TOKEN,
        }
        values.update(overrides)
        app = create_app(ServiceSettings(**values))
        with TestClient(app) as client:
            yield client

    return factory


@pytest.fixture
def client(
    make_client: Callable[..., contextlib.AbstractContextManager[TestClient]],
) -> Iterator[TestClient]:
    """A client of an app serving the session index and model, with a served log."""
    with make_client() as c:
        yield c


@pytest.fixture(scope="module")
def ray_address() -> Iterator[str]:
    """A local Ray cluster for the module asking for it; its address, as `ray start --head`
    prints it (the Ray Serve tests, which skip where Ray is not installed).

    Four logical CPUs on any machine: each deployment replica asks for one (three shards
    and the front), whatever the cores underneath.
    """
    import ray

    ray.init(num_cpus=4, include_dashboard=False, log_to_driver=False)
    yield str(ray.get_runtime_context().gcs_address)
    ray.shutdown()
