"""Word vectors trained at build time, article vectors, and keeping them through updates."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from collections import Counter
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from retriever import build_index, load_index, update_index
from retriever.vectors import VectorSettings

from .foldoc import foldoc_words, synthetic_articles

# One training thread: only then does the same seed give the very same vectors.
SMALL = {"dim": 16, "epochs": 2, "min_count": 2, "seed": 5, "threads": 1}


@pytest.fixture(scope="module")
def words() -> list[str]:
    return foldoc_words()[:60_000]


@pytest.fixture(scope="module")
def records(words: list[str]) -> list[dict[str, Any]]:
    return list(synthetic_articles(250, seed=21, words=words))


@pytest.fixture(scope="module")
def vec_index(tmp_path_factory: pytest.TempPathFactory, records: list[dict[str, Any]]) -> Path:
    out = tmp_path_factory.mktemp("vec") / "idx"
    build_index(records, out, vectors=SMALL)
    return out


def _arrays(folder: Path) -> dict[str, np.ndarray]:
    return {
        name: np.load(folder / f"{name}.npy", allow_pickle=False)
        for name in ("wordvec", "wordvec_weight", "docvec", "termvec_row")
    }


def test_settings_and_files_are_recorded(vec_index: Path) -> None:
    idx = load_index(vec_index)
    entry = idx.manifest["vectors"]
    assert entry["settings"] == VectorSettings(**SMALL).to_dict()
    assert entry["trained"] is True and entry["words"] > 100 and entry["ann"] is None
    arrays = _arrays(vec_index)
    assert arrays["wordvec"].shape == (entry["words"], 16)
    assert arrays["docvec"].shape == (idx.n_docs, 16) and arrays["docvec"].dtype == np.float32
    norms = np.linalg.norm(arrays["docvec"], axis=1)
    assert np.allclose(norms[norms > 0], 1.0, atol=1e-5)
    # No gensim model file and nothing but npy, json and the string blobs.
    suffixes = {p.suffix for p in vec_index.iterdir()}
    assert suffixes <= {".npy", ".json", ".bin", ".jsonl"}, suffixes
    # Opened memory-mapped.
    assert isinstance(idx.dense.vectors.docvec.base, np.memmap)  # type: ignore[union-attr]


def test_article_vector_is_the_idf_weighted_mean_of_its_words(vec_index: Path) -> None:
    idx = load_index(vec_index)
    v = idx.dense.vectors  # type: ignore[union-attr]
    words = v.words()
    row_of = {w: i for i, w in enumerate(words)}
    n = idx.n_docs
    # IDF over the article texts, log(1 + (N - df + 0.5) / (df + 0.5)), recomputed here from
    # the stored texts rather than the postings.
    texts = [idx._store.article(r).text for r in range(n)]
    token_lists = idx.analyzer.tokens_many(texts)
    df = Counter(t for toks in token_lists for t in set(toks))
    for row in (0, 7, n - 1):
        acc = np.zeros(16)
        for tok in token_lists[row]:
            if tok in row_of:
                idf = np.log1p((n - df[tok] + 0.5) / (df[tok] + 0.5))
                acc += idf * v.wordvec[row_of[tok]]
        expected = acc / np.linalg.norm(acc)
        assert np.allclose(v.docvec[row], expected, atol=1e-5)
        assert np.allclose(
            v.weight[[row_of[t] for t in token_lists[row] if t in row_of]],
            [np.log1p((n - df[t] + 0.5) / (df[t] + 0.5)) for t in token_lists[row] if t in row_of],
            rtol=1e-5,
        )


def test_same_seed_gives_identical_vectors(
    tmp_path: Path, records: list[dict[str, Any]], vec_index: Path
) -> None:
    build_index(records, tmp_path / "again", vectors=SMALL)
    a, b = _arrays(vec_index), _arrays(tmp_path / "again")
    for name in a:
        assert np.array_equal(a[name], b[name]), name
    build_index(records, tmp_path / "other", vectors={**SMALL, "seed": 6})
    assert not np.array_equal(a["wordvec"], _arrays(tmp_path / "other")["wordvec"])


@pytest.mark.slow
def test_same_seed_gives_identical_vectors_across_processes(
    tmp_path: Path, records: list[dict[str, Any]]
) -> None:
    # Python salts str hashes per process; two builds under different PYTHONHASHSEED values
    # must still agree.
    corpus = tmp_path / "c.jsonl"
    corpus.write_text("".join(json.dumps(r) + "\n" for r in records[:120]))
    script = (
        "import sys; from retriever import build_index; "
        f"build_index(sys.argv[1], sys.argv[2], vectors={SMALL!r})"
    )
    for seed in ("1", "2"):
        env = {**os.environ, "PYTHONHASHSEED": seed}
        subprocess.run(
            [sys.executable, "-c", script, str(corpus), str(tmp_path / seed)],
            check=True,
            env=env,
            timeout=300,
        )
    a, b = _arrays(tmp_path / "1"), _arrays(tmp_path / "2")
    for name in a:
        assert np.array_equal(a[name], b[name]), name


def test_float16_article_vectors(tmp_path: Path, records: list[dict[str, Any]]) -> None:
    idx = build_index(records[:80], tmp_path / "h", vectors={**SMALL, "dtype": "float16"})
    assert idx.dense is not None and idx.dense.vectors.docvec.dtype == np.float16
    r = idx.search_hybrid(records[3]["text"][:200], 5)
    assert r.mode == "hybrid" and r.hits


def test_no_vectors_build_and_old_indexes(tmp_path: Path, records: list[dict[str, Any]]) -> None:
    idx = build_index(records[:50], tmp_path / "plain", vectors=False)
    assert "vectors" not in idx.manifest and idx.dense is None
    assert not (tmp_path / "plain" / "docvec.npy").exists()
    clue = records[4]["text"][:150]
    r = idx.search_hybrid(clue, 10)
    assert r.mode == "bm25" and "no word vectors" in (r.note or "")
    assert [h.doc_id for h in r.hits] == [h.doc_id for h in idx.search(clue, 10)]
    assert all(h.dense_rank is None and h.cosine == 0.0 for h in r.hits)


def test_bad_settings_are_refused(tmp_path: Path, records: list[dict[str, Any]]) -> None:
    with pytest.raises(ValueError, match="dtype"):
        build_index(records[:5], tmp_path / "x", vectors={"dtype": "int8"})
    with pytest.raises(ValueError, match="unknown vector settings"):
        build_index(records[:5], tmp_path / "x", vectors={"dims": 3})
    with pytest.raises(ValueError, match="threads"):
        build_index(records[:5], tmp_path / "x", vectors={"threads": -1})
    assert not (tmp_path / "x").exists()


def test_progress_shows_training_epochs(
    tmp_path: Path, records: list[dict[str, Any]], capsys: pytest.CaptureFixture[str]
) -> None:
    build_index(records[:40], tmp_path / "p", vectors=SMALL, progress=True)
    assert "word vectors" in capsys.readouterr().err


def test_damaged_vectors_are_reported(tmp_path: Path, records: list[dict[str, Any]]) -> None:
    build_index(records[:40], tmp_path / "d", vectors=SMALL)
    np.save(tmp_path / "d" / "docvec.npy", np.zeros((3, 16), dtype=np.float32))
    idx = load_index(tmp_path / "d")
    with pytest.raises(Exception, match=r"docvec\.npy .*rebuild"):
        idx.search_hybrid("anything at all", 3)


def test_update_keeps_vectors_consistent(
    tmp_path: Path, records: list[dict[str, Any]], words: list[str]
) -> None:
    base = build_index(records[:150], tmp_path / "u", vectors=SMALL)
    before = {base.ids[r]: np.array(base.dense.vectors.docvec[r]) for r in range(base.n_docs)}  # type: ignore[union-attr]
    wordvec = np.array(base.dense.vectors.wordvec)  # type: ignore[union-attr]
    del base
    extra = records[150:170]
    extra_file = tmp_path / "extra.jsonl"
    extra_file.write_text("".join(json.dumps(r) + "\n" for r in extra))
    removed = [records[0]["id"], records[10]["id"]]
    update_index(tmp_path / "u", add=extra_file)
    idx = update_index(tmp_path / "u", remove=removed)
    v = idx.dense.vectors  # type: ignore[union-attr]
    assert idx.manifest["vectors"]["trained"] is False
    assert np.array_equal(v.wordvec, wordvec)  # no retraining
    assert v.docvec.shape == (150 + 20 - 2, 16)
    assert all(d not in idx.ids for d in removed)
    for r in range(idx.n_docs):
        doc_id = idx.ids[r]
        if doc_id in before:  # kept articles keep their vector
            assert np.allclose(v.docvec[r], before[doc_id], atol=1e-6), doc_id
    # A fresh build reusing the same word vectors would give the new articles these vectors:
    # the same weighted mean, computed here from the stored words and weights.
    row_of = {w: i for i, w in enumerate(v.words())}
    for rec in extra[:5]:
        r = idx.row_of(rec["id"])
        toks = [t for t in idx.analyzer.tokens(rec["text"]) if t in row_of]
        acc = sum(v.weight[row_of[t]] * v.wordvec[row_of[t]].astype(np.float64) for t in toks)
        assert np.allclose(v.docvec[r], acc / np.linalg.norm(acc), atol=1e-5)
    # Dense search finds a new article from its own text.
    hit = idx.search_hybrid(extra[2]["text"], 5)
    assert extra[2]["id"] in [h.doc_id for h in hit.hits]


def test_two_training_threads_give_vectors_of_the_same_words(
    tmp_path: Path, records: list[dict[str, Any]], vec_index: Path
) -> None:
    two = build_index(records, tmp_path / "two", vectors={**SMALL, "threads": 2})
    assert two.manifest["vectors"]["settings"]["threads"] == 2
    one, other = _arrays(vec_index), _arrays(tmp_path / "two")
    # The same vocabulary and weights; the vectors themselves may differ a little.
    assert np.array_equal(one["termvec_row"], other["termvec_row"])
    assert np.array_equal(one["wordvec_weight"], other["wordvec_weight"])
    assert other["docvec"].shape == one["docvec"].shape
    norms = np.linalg.norm(other["docvec"], axis=1)
    assert np.allclose(norms[norms > 0], 1.0, atol=1e-5)


def test_epochs_follow_the_corpus_size() -> None:
    from retriever.vectors import MAX_EPOCHS, MIN_EPOCHS, TOKEN_PASSES, epochs_for_tokens

    # About TOKEN_PASSES tokens trained on in all, within the floor and the cap.
    assert epochs_for_tokens(TOKEN_PASSES // 10) == 10
    assert epochs_for_tokens(1) == MAX_EPOCHS and epochs_for_tokens(0) == MAX_EPOCHS
    assert epochs_for_tokens(100 * TOKEN_PASSES) == MIN_EPOCHS
    sizes = [10**k for k in range(2, 10)]
    got = [epochs_for_tokens(n) for n in sizes]
    assert got == sorted(got, reverse=True) and got[0] == MAX_EPOCHS and got[-1] == MIN_EPOCHS


def test_the_manifest_holds_the_epochs_the_vectors_were_trained_with(
    tmp_path: Path, records: list[dict[str, Any]]
) -> None:
    from retriever.vectors import epochs_for_tokens

    auto = {**SMALL, "epochs": 0}
    idx = build_index(records[:60], tmp_path / "e", vectors=auto)
    tokens = sum(len(idx.analyzer.tokens(f"{r['title']}\n{r['text']}")) for r in records[:60])
    stored = idx.manifest["vectors"]["settings"]["epochs"]
    assert stored == epochs_for_tokens(tokens) and stored > 2
    # Set by hand, the epochs are kept as given.
    idx = build_index(records[:60], tmp_path / "f", vectors=SMALL)
    assert idx.manifest["vectors"]["settings"]["epochs"] == 2
    with pytest.raises(ValueError, match="epochs"):
        build_index(records[:5], tmp_path / "x", vectors={"epochs": -1})
