"""Vector generations: refined vectors stored inside an index folder, kept through updates."""

from __future__ import annotations

import shutil
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from retriever import build_index, load_index, update_index, vecgen
from retriever import vectors as vecs
from retriever.dense import DenseSearcher
from retriever.errors import IndexFormatError

from .foldoc import foldoc_words, synthetic_articles

SMALL = {"dim": 16, "epochs": 2, "min_count": 2, "seed": 5, "threads": 1}


@pytest.fixture(scope="module")
def records() -> list[dict[str, Any]]:
    return list(synthetic_articles(200, seed=4, words=foldoc_words()[:40_000]))


@pytest.fixture(scope="module")
def built(tmp_path_factory: pytest.TempPathFactory, records: list[dict[str, Any]]) -> Path:
    out = tmp_path_factory.mktemp("gen") / "idx"
    build_index(records, out, vectors=SMALL)
    return out


def _refined(folder: Path, lines: list[str]) -> tuple[list[str], np.ndarray, np.ndarray]:
    idx = load_index(folder)
    settings = vecs.VectorSettings(**SMALL)
    words, wordvec, _ = vecs.train(folder, idx.n_docs, idx.analyzer, settings, False, lines)
    return words, wordvec, vecs.folder_idf_weights(folder, idx.manifest, words)


def test_a_generation_is_stored_named_by_content_and_searched(tmp_path: Path, built: Path) -> None:
    folder = tmp_path / "idx"
    shutil.copytree(built, folder)
    words, wordvec, weight = _refined(folder, ["zzqextra zzqextra token"] * 5)
    assert "zzqextra" in words  # the extra lines were trained on
    settings = vecs.VectorSettings(**SMALL)
    name = vecgen.write_generation(folder, words, wordvec, weight, settings)
    assert vecgen.write_generation(folder, words, wordvec, weight, settings) == name
    assert vecgen.names(folder) == [name]
    gen = vecgen.open_generation(folder, name)
    idx = load_index(folder)
    # The article vectors are the same weighted sums as the index's own, of the new words.
    expect = np.zeros((idx.n_docs, 16), dtype=np.float32)
    manifest = idx.manifest
    rows = vecs.term_rows(folder, idx.n_terms, words)
    vecs.article_vectors(vecs.body_counts(folder, manifest), rows, wordvec, weight, expect)
    np.testing.assert_array_equal(np.asarray(gen.docvec), expect)
    assert not np.array_equal(np.asarray(gen.docvec), np.asarray(idx.dense.vectors.docvec))
    q = gen.query_vector(*idx.term_ids(idx.analyzer.tokens(idx.document(idx.ids[3]).text)))
    [(hits, _)] = DenseSearcher(gen).search([q], 5)
    assert 3 in hits.tolist()
    # Files: npy, json and the word blob only (never pickle).
    assert {p.suffix for p in (folder / f"vectors-{name}").iterdir()} <= {".npy", ".json", ".bin"}


def test_a_missing_or_misnamed_generation_is_reported(built: Path) -> None:
    with pytest.raises(IndexFormatError, match="no vector generation 0123456789abcdef"):
        vecgen.open_generation(built, "0123456789abcdef")
    with pytest.raises(IndexFormatError, match="not a vector generation name"):
        vecgen.open_generation(built, "../escape")


def test_updates_carry_generations_over(
    tmp_path: Path, built: Path, records: list[dict[str, Any]]
) -> None:
    folder = tmp_path / "idx"
    shutil.copytree(built, folder)
    words, wordvec, weight = _refined(folder, ["alpha beta gamma"] * 3)
    name = vecgen.write_generation(folder, words, wordvec, weight, vecs.VectorSettings(**SMALL))
    before = load_index(folder)
    old_vec = np.asarray(vecgen.open_generation(folder, name).docvec).copy()
    kept_id = before.ids[10]
    new = {**records[5], "id": "fresh-1", "title": "Fresh article one"}
    update_index(folder, add=[new], remove=[before.ids[0]])
    after = load_index(folder)
    assert vecgen.names(folder) == [name]
    gen = vecgen.open_generation(folder, name)
    assert gen.docvec.shape[0] == after.n_docs
    # A kept article's vector is unchanged; the new one has the same text's vector.
    np.testing.assert_array_equal(gen.docvec[after.row_of(kept_id)], old_vec[10])
    np.testing.assert_array_equal(gen.docvec[after.row_of("fresh-1")], old_vec[5])
    assert gen.words() == words
