"""Building and updating index folders: contents, in-links, updates equal fresh builds, safety."""

from __future__ import annotations

import json
import random
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from retriever import CorpusError, ReadReport, build_index, load_index, update_index
from retriever.store import FORMAT_VERSION

from .foldoc import clue_from, foldoc_words, synthetic_articles
from .helpers import write_jsonl


def test_manifest_and_stored_fields(tmp_path: Path, small_records: list[dict[str, Any]]) -> None:
    corpus = write_jsonl(tmp_path / "c.jsonl", small_records)
    idx = build_index(corpus, tmp_path / "idx", stemmer=None, k1=1.2, b=0.6)
    m = idx.manifest
    assert m["format_version"] == FORMAT_VERSION and m["format"] == "hunchwise-index"
    assert m["analyzer"] == {**idx.analyzer.config.to_dict(), "stemmer": None}
    assert m["bm25"] == {"k1": 1.2, "b": 0.6, "epsilon": 0.25, "idf": "okapi", "title_weight": 0.0}
    assert m["counts"]["articles"] == 5 and m["counts"]["terms"] == idx.n_terms
    assert m["counts"]["qualified_titles"] == 2
    # sha256 of the corpus file, independently computed with hashlib.
    import hashlib

    assert m["corpus_checksum"] == hashlib.sha256(corpus.read_bytes()).hexdigest()
    assert m["created_at"].endswith("+00:00")
    assert idx.bases[:2] == ["Quillfen", "Quillfen"] and idx.qualifiers[:2] == ["river", "village"]
    assert (idx.path / "body_weight.npy").exists() and (idx.path / "store.jsonl").exists()
    # The stored analyzer settings are the ones a reloaded index uses.
    assert load_index(idx.path).analyzer.config == idx.analyzer.config


def test_inlinks_and_unresolved(tmp_path: Path, small_records: list[dict[str, Any]]) -> None:
    idx = build_index(small_records, tmp_path / "idx")
    # Counted by hand from the fixture: m1 <- m2 (title), m3 (alias); m2 <- m3 (id);
    # m3 <- m1, m4 (case-folded title); m4 <- m1, m5 (twice, counted once); m5 <- m2.
    assert dict(zip(idx.ids, idx.inlinks.tolist(), strict=True)) == {
        "m1": 2,
        "m2": 1,
        "m3": 2,
        "m4": 2,
        "m5": 1,
    }
    assert idx.manifest["counts"]["unresolved_links"] == 1  # "Nowhere Land"


def test_workers_do_not_change_the_index(tmp_path: Path) -> None:
    records = list(synthetic_articles(9_000, seed=3))
    one = build_index(records, tmp_path / "one", workers=1, vectors=False)
    two = build_index(records, tmp_path / "two", workers=2, vectors=False)
    for name in ("body_indptr", "body_docs", "body_weight", "title_docs", "doc_len", "inlinks"):
        assert np.array_equal(np.load(one.path / f"{name}.npy"), np.load(two.path / f"{name}.npy"))
    for name in ("terms.bin", "terms_offsets.npy", "vocab_keys.npy", "ids.bin"):
        assert (one.path / name).read_bytes() == (two.path / name).read_bytes()


def _by_id(idx: Any, clue: str) -> dict[str, float]:
    scores = idx.score_tokens(idx.analyzer.tokens(clue))
    return {doc_id: float(s) for doc_id, s in zip(idx.ids, scores, strict=True)}


@pytest.mark.parametrize("title_weight", [0.0, 1.5])
def test_update_equals_fresh_build(tmp_path: Path, title_weight: float) -> None:
    words = foldoc_words()
    base = list(synthetic_articles(600, seed=1, words=words))
    extra = list(synthetic_articles(700, seed=2, words=words))[600:]
    extra = [{**r, "id": f"new{i}", "title": f"New {r['title']}"} for i, r in enumerate(extra)]
    idx = build_index(base, tmp_path / "idx", title_weight=title_weight)
    replaced = [{**base[i], "text": base[i]["text"][::-1] + " replacement words"} for i in (3, 50)]
    update_index(idx.path, add=write_jsonl(tmp_path / "add.jsonl", extra + replaced))
    removed = ["a10", "a11", "a500", "new5"]
    updated = update_index(idx.path, remove=removed)
    # The resulting corpus, built from scratch.
    final = {r["id"]: r for r in base}
    final.update({r["id"]: r for r in extra + replaced})
    for doc_id in removed:
        del final[doc_id]
    fresh = build_index(list(final.values()), tmp_path / "fresh", title_weight=title_weight)
    assert sorted(updated.ids) == sorted(fresh.ids) and updated.n_terms == fresh.n_terms
    rng = random.Random(5)
    texts = [r["text"] for r in final.values()]
    for _ in range(40):
        clue = clue_from(rng.choice(texts), rng, words)
        a, b = _by_id(updated, clue), _by_id(fresh, clue)
        assert a.keys() == b.keys()
        assert np.allclose([a[d] for d in a], [b[d] for d in a], rtol=1e-12, atol=0)
        assert [h.doc_id for h in updated.search(clue, 10)] == [
            h.doc_id for h in fresh.search(clue, 10)
        ]
    assert updated.document("a3").text == replaced[0]["text"]
    assert dict(zip(updated.ids, updated.inlinks.tolist(), strict=True)) == dict(
        zip(fresh.ids, fresh.inlinks.tolist(), strict=True)
    )
    assert updated.manifest["build"]["removed"] == 4


def test_update_errors_leave_index_alone(
    tmp_path: Path, small_records: list[dict[str, Any]]
) -> None:
    idx = build_index(small_records, tmp_path / "idx")
    before = idx.manifest["index_version"]
    with pytest.raises(CorpusError, match="unknown article ids"):
        update_index(idx.path, remove=["nope"])
    clash = [{"id": "z", "title": "Tallmere", "text": "another"}]
    with pytest.raises(CorpusError, match="already belongs"):
        update_index(idx.path, add=clash)
    with pytest.raises(CorpusError, match="empty"):
        update_index(idx.path, remove=[r["id"] for r in small_records])
    assert load_index(idx.path).manifest["index_version"] == before


def test_bad_corpus_does_not_touch_existing_index(
    tmp_path: Path, small_records: list[dict[str, Any]]
) -> None:
    out = tmp_path / "idx"
    good = build_index(small_records, out)
    hits = good.search("reed marsh")
    bad = tmp_path / "bad.jsonl"
    bad.write_text(
        '{"id": "a", "title": "A", "text": "x"}\n{"id": "a", "title": "B", "text": "y"}\n'
    )
    with pytest.raises(CorpusError, match=r"line 2.*duplicate id"):
        build_index(bad, out)
    again = load_index(out)
    assert again.search("reed marsh") == hits
    assert not list(tmp_path.glob(".idx.building-*"))
    report = ReadReport()
    skipped = build_index(bad, tmp_path / "skip", skip_bad=True, report=report)
    assert skipped.n_docs == 1 and report.skipped == 1
    assert skipped.manifest["build"]["skipped_lines"] == 1
    assert "duplicate id" in skipped.manifest["build"]["problems"][0]


def test_refuses_to_replace_a_foreign_folder(
    tmp_path: Path, small_records: list[dict[str, Any]]
) -> None:
    target = tmp_path / "photos"
    target.mkdir()
    (target / "keep.txt").write_text("mine")
    from retriever import IndexFormatError

    with pytest.raises(IndexFormatError, match="not a hunchwise index"):
        build_index(small_records, target)
    assert (target / "keep.txt").read_text() == "mine"


KILL_SCRIPT = """
import sys
from retriever import build_index
build_index(sys.argv[1], sys.argv[2], workers=1)
"""


@pytest.mark.slow
@pytest.mark.parametrize("phase", ["counting", "writing"])
def test_sigkill_mid_build_keeps_previous_index(tmp_path: Path, phase: str) -> None:
    words = foldoc_words()
    small = write_jsonl(tmp_path / "small.jsonl", synthetic_articles(300, seed=9, words=words))
    out = tmp_path / "idx"
    old = build_index(small, out)
    rng = random.Random(2)
    clues = [clue_from(old.document_at(rng.randrange(300)).text, rng, words) for _ in range(20)]
    before = [old.search(c, 10) for c in clues]
    manifest_before = (out / "manifest.json").read_bytes()
    big = write_jsonl(tmp_path / "big.jsonl", synthetic_articles(30_000, seed=4, words=words))
    proc = subprocess.Popen([sys.executable, "-c", KILL_SCRIPT, str(big), str(out)])
    deadline = time.monotonic() + 60
    # Kill after ~1 s (still counting terms) or once the temporary folder exists (writing).
    started = time.monotonic()
    while time.monotonic() < deadline and proc.poll() is None:
        if phase == "writing" and list(tmp_path.glob(".idx.building-*")):
            break
        if phase == "counting" and time.monotonic() - started > 1.0:
            break
        time.sleep(0.005)
    assert proc.poll() is None, "the build finished before it could be killed; use a bigger corpus"
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    assert proc.returncode == -signal.SIGKILL
    if phase == "writing":
        assert list(tmp_path.glob(".idx.building-*")), "killed before writing started"
    assert (out / "manifest.json").read_bytes() == manifest_before
    reloaded = load_index(out)
    assert [reloaded.search(c, 10) for c in clues] == before
    # The next build cleans up what the killed one left behind.
    build_index(small, out)
    assert not list(tmp_path.glob(".idx.building-*"))
    assert json.loads((out / "manifest.json").read_text())["counts"]["articles"] == 300
