"""Word vectors learned from the index's own analyzed text, and one vector per article.

At build time gensim's word2vec (skip-gram) is trained on every article's analyzed tokens
(title then text), seeded, with more passes over small corpora (`epochs_for_tokens`); on
one thread (`threads=1`) the same corpus and settings give the same vectors, on more (the
default uses up to 4 cores) they differ a little from build to build. Each word also gets
a fixed weight, its IDF over the article texts at training time. An article's vector is
the weighted sum of its words' vectors (each token counts once per occurrence), scaled to
unit length; a clue's vector is made the same way, so a cosine is one dot product.
Articles added later get vectors from the stored words and weights without training
again, and an article's vector depends only on its own text.

Files in the index folder (all npy or plain text, never pickle): wordvec.npy (words x dim,
float32), wordvec_weight.npy (float32), wordvec_terms.bin/_offsets.npy (the words),
termvec_row.npy (index term id -> word row or -1), docvec.npy (articles x dim, float32 or
float16). gensim's own model file is not kept.
"""

from __future__ import annotations

import itertools
import time
from collections.abc import Iterable, Iterator
from dataclasses import asdict, dataclass, replace
from pathlib import Path
from typing import Any, NamedTuple

import numpy as np
import scipy.sparse as sp
from tqdm.auto import tqdm

from . import columns, store
from .analyzer import Analyzer
from .counting import cores
from .errors import IndexFormatError

WORDVEC, WORDVEC_WEIGHT, WORDVEC_TERMS = "wordvec", "wordvec_weight", "wordvec_terms"
TERMVEC_ROW, DOCVEC = "termvec_row", "docvec"
# gensim cuts longer sentences at 10,000 tokens (its MAX_WORDS_IN_BATCH); longer articles
# are fed as several lines so no text is lost.
_MAX_LINE_TOKENS = 10_000
_DOC_BLOCK = 32_768  # article rows per block when computing article vectors
# Epochs from the corpus's size: about TOKEN_PASSES tokens trained on in all, within
# [MIN_EPOCHS, MAX_EPOCHS]. Measured on FOLDOC (495,000 tokens), the vectors alone on the
# 196 Jargon training clues (tests/opendata/vector_curve.py; the test clues never read),
# after 1 / 5 / 10 / 20 / 40 epochs: recall@100 0.08 / 0.37 / 0.43 / 0.49 / 0.53, top-1
# 0.01 / 0.08 / 0.15 / 0.19 / 0.21, still rising at 40. So about 40 passes over a corpus
# that small (20M tokens in all), 6 over the 100,000-article demo corpus (3.6M tokens),
# word2vec's usual 5 from 4M tokens on, and never more than 40 (build time).
TOKEN_PASSES, MIN_EPOCHS, MAX_EPOCHS = 20_000_000, 5, 40


@dataclass(frozen=True)
class VectorSettings:
    """How word vectors are trained and article vectors stored; kept in the manifest."""

    dim: int = 200
    window: int = 5
    # 0: from the corpus's token count (`epochs_for_tokens`); the manifest stores the number
    # of epochs the vectors were trained with.
    epochs: int = 0
    min_count: int = 2
    negative: int = 5
    sample: float = 1e-3
    seed: int = 1
    dtype: str = "float32"
    # Approximate search from this many articles on. Measured on the invented corpus at 100k
    # (tests/benchmarks/bench_dense.py): exact search costs about 30x the BM25 query there,
    # and about one BM25 query already at 5k-10k articles.
    ann_min_articles: int = 10_000
    ann_m: int = 16  # HNSW graph degree
    ann_ef_construction: int = 100
    # 256: recall@10 0.985 against exact at 1M articles in 0.39 ms (p50), a fifth of a BM25
    # query there (128 gave 0.976; at 100k, 128 gave recall@20 0.988 and 256 0.997 in 0.58 ms).
    ann_ef_search: int = 256
    # Training threads; 0: up to 4 of this machine's cores. Only 1 gives the very same
    # vectors on every build (gensim's threads update shared weights in no fixed order).
    threads: int = 0

    def __post_init__(self) -> None:
        for name in ("dim", "window", "min_count", "negative", "ann_m"):
            if int(getattr(self, name)) < 1:
                raise ValueError(f"vector setting {name} must be at least 1")
        if int(self.epochs) < 0:
            raise ValueError("vector setting epochs must be 0 (from the corpus's size) or more")
        if int(self.threads) < 0:
            raise ValueError("vector setting threads must be 0 (up to 4 cores) or more")
        if self.dtype not in ("float32", "float16"):
            raise ValueError(f"vector dtype must be float32 or float16, got {self.dtype!r}")
        if self.ann_min_articles < 1 or self.ann_ef_search < 1 or self.ann_ef_construction < 1:
            raise ValueError("ANN settings must be at least 1")

    def to_dict(self) -> dict[str, Any]:
        """Plain-JSON form."""
        return asdict(self)

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> VectorSettings:
        """Settings written by `to_dict`, rejecting unknown keys."""
        unknown = set(data) - set(cls.__dataclass_fields__)
        if unknown:
            raise ValueError(f"unknown vector settings: {sorted(unknown)}")
        return cls(**data)


def epochs_for_tokens(tokens: int) -> int:
    """Training epochs for a corpus of `tokens` analyzed tokens: about `TOKEN_PASSES` token
    passes in all, at least `MIN_EPOCHS` and at most `MAX_EPOCHS`. Small corpora need more
    passes than word2vec's usual 5 (measured on FOLDOC, see `TOKEN_PASSES`)."""
    return max(MIN_EPOCHS, min(MAX_EPOCHS, round(TOKEN_PASSES / max(tokens, 1))))


class Trained(NamedTuple):
    """Word vectors as trained: the words, their float32 vectors, and the settings used
    (with the number of epochs filled in)."""

    words: list[str]
    wordvec: np.ndarray
    settings: VectorSettings


def resolve_settings(value: Any) -> VectorSettings | None:
    """The `vectors` build option: True/None (defaults), False/'off' (none), a dict or settings."""
    if value is None or value is True or value == "on":
        return VectorSettings()
    if value is False or value == "off":
        return None
    if isinstance(value, VectorSettings):
        return value
    if isinstance(value, dict):
        return VectorSettings.from_dict(value)
    raise TypeError(
        f"vectors must be True, False, 'on', 'off', a dict or VectorSettings: {value!r}"
    )


def article_lines(folder: Path, n_docs: int, analyzer: Analyzer) -> Iterator[str]:
    """Each stored article's analyzed title and text as space-separated lines."""
    reader = store.StoreReader(folder, n_docs)
    batch: list[str] = []
    for row in range(n_docs):
        art = reader.article(row)
        batch.append(f"{art.title}\n{art.text}")
        if len(batch) == 512 or row == n_docs - 1:
            for tokens in analyzer.tokens_many(batch):
                for s in range(0, max(len(tokens), 1), _MAX_LINE_TOKENS):
                    yield " ".join(tokens[s : s + _MAX_LINE_TOKENS])
            batch = []


def train(
    folder: Path,
    n_docs: int,
    analyzer: Analyzer,
    settings: VectorSettings,
    progress: bool,
    extra: Iterable[str] = (),
) -> Trained:
    """Train word vectors on the articles stored in `folder`, and on the `extra` lines of
    analyzed tokens (space-separated) after them."""
    lines = itertools.chain(article_lines(folder, n_docs, analyzer), extra)
    return train_lines(lines, folder / ".vector-training.txt", settings, progress)


def train_lines(
    lines: Iterable[str],
    line_file: Path,
    settings: VectorSettings,
    progress: bool,
) -> Trained:
    """Train word vectors on analyzed lines (streamed to `line_file`, removed after). With
    `settings.epochs` 0 the epochs follow the lines' token count (`epochs_for_tokens`)."""
    from gensim.models import Word2Vec  # imported here: gensim takes a second to import
    from gensim.models.callbacks import CallbackAny2Vec

    tokens = 0
    with open(line_file, "w", encoding="utf-8") as fh:
        for line in lines:
            fh.write(line + "\n")
            tokens += line.count(" ") + 1 if line else 0
    if settings.epochs == 0:
        settings = replace(settings, epochs=epochs_for_tokens(tokens))
    bar = tqdm(total=settings.epochs, desc="word vectors", unit=" epochs", disable=not progress)

    class _Epochs(CallbackAny2Vec):
        def on_epoch_end(self, model: Any) -> None:
            bar.update(1)

    try:
        model = Word2Vec(
            corpus_file=str(line_file),
            vector_size=settings.dim,
            window=settings.window,
            min_count=settings.min_count,
            negative=settings.negative,
            sample=settings.sample,
            sg=1,
            epochs=settings.epochs,
            seed=settings.seed,
            workers=settings.threads or min(cores(), 4),
            callbacks=[_Epochs()],
        )
    except RuntimeError as exc:  # gensim: "you must first build vocabulary before training"
        if "vocabulary" not in str(exc):
            raise
        return Trained([], np.zeros((0, settings.dim), dtype=np.float32), settings)
    finally:
        bar.close()
        line_file.unlink(missing_ok=True)
    words = [str(w) for w in model.wv.index_to_key]
    return Trained(words, np.ascontiguousarray(model.wv.vectors, dtype=np.float32), settings)


def body_counts(folder: Path, manifest: dict[str, Any]) -> sp.csr_matrix:
    """Article-major body term counts (articles x index terms) from a folder's postings."""
    counts = manifest["counts"]
    n_docs, n_terms, nnz = (
        int(counts["articles"]),
        int(counts["terms"]),
        int(counts["body_postings"]),
    )
    indptr = store.open_array(folder, "body_indptr", "int64", n_terms + 1)
    docs = store.open_array(folder, "body_docs", "int32", nnz)
    tf = store.open_array(folder, "body_tf", "int32", nnz)
    return sp.csc_matrix((tf, docs, indptr), shape=(n_docs, n_terms)).tocsr()


def term_rows(folder: Path, n_terms: int, words: list[str]) -> np.ndarray:
    """For each index term id, the row of its word vector or -1. int32."""
    row_of = {w: i for i, w in enumerate(words)}
    terms = columns.StringColumn(folder, "terms", n_terms)
    return np.fromiter((row_of.get(t, -1) for t in terms), dtype=np.int32, count=n_terms)


def article_vectors(
    counts: sp.csr_matrix,
    termvec_row: np.ndarray,
    wordvec: np.ndarray,
    weight: np.ndarray,
    out: np.ndarray,
) -> None:
    """Fill `out` (articles x dim) with unit-length weighted sums of word vectors; rows with
    no known word stay zero. Block by block, so memory stays bounded."""
    has = np.flatnonzero(termvec_row >= 0)
    # Index terms with a vector -> their weighted word vector (float32).
    term_vec = wordvec[termvec_row[has]] * weight[termvec_row[has], None]
    for s in range(0, counts.shape[0], _DOC_BLOCK):
        block = counts[s : s + _DOC_BLOCK][:, has].astype(np.float32)
        vec = np.asarray(block @ term_vec, dtype=np.float32)
        norm = np.linalg.norm(vec, axis=1, keepdims=True)
        np.divide(vec, norm, out=vec, where=norm > 0)
        out[s : s + vec.shape[0]] = vec


def write_article_vectors(
    folder: Path,
    manifest: dict[str, Any],
    words: list[str],
    wordvec: np.ndarray,
    weight: np.ndarray,
    settings: VectorSettings,
) -> dict[str, Any]:
    """Write termvec_row and docvec (and the ANN index when big enough) for the articles of
    `folder`, whose other arrays are already written. Returns the manifest's vectors entry."""
    n_docs, n_terms = int(manifest["counts"]["articles"]), int(manifest["counts"]["terms"])
    rows = term_rows(folder, n_terms, words)
    store.save_array(folder, TERMVEC_ROW, rows)
    path = folder / f"{DOCVEC}.npy"
    out = np.lib.format.open_memmap(
        path, mode="w+", dtype=settings.dtype, shape=(n_docs, settings.dim)
    )
    article_vectors(body_counts(folder, manifest), rows, wordvec, weight, out)
    out.flush()
    empty = int(np.count_nonzero(~np.any(out != 0, axis=1)))
    del out
    entry: dict[str, Any] = {
        "settings": settings.to_dict(),
        "words": len(words),
        "articles_without_vector": empty,
        "ann": None,
    }
    if n_docs >= settings.ann_min_articles and words:
        from . import ann

        entry["ann"] = ann.build(
            folder, open_matrix(folder, DOCVEC, settings.dtype, n_docs, settings.dim), settings
        )
    return entry


def add_to_folder(
    folder: Path,
    analyzer: Analyzer,
    settings: VectorSettings,
    *,
    progress: bool = False,
    from_folder: Path | None = None,
) -> None:
    """Add vectors to the finished index in `folder` (its manifest is rewritten).

    Trains new word vectors, or with `from_folder` reuses that index's words and weights.
    """
    started = time.perf_counter()
    manifest = store.read_manifest(folder)
    n_docs = int(manifest["counts"]["articles"])
    if from_folder is None:
        words, wordvec, settings = train(folder, n_docs, analyzer, settings, progress)
        weight = folder_idf_weights(folder, manifest, words)
        trained = True
    else:
        old = DenseVectors.open(from_folder, store.read_manifest(from_folder))
        if old is None:
            raise IndexFormatError(f"{from_folder}: the index has no word vectors to reuse")
        words, wordvec, weight = old.words(), np.asarray(old.wordvec), np.asarray(old.weight)
        if settings.epochs == 0:  # the vectors are those trained with the old epochs
            settings = replace(settings, epochs=old.settings.epochs)
        trained = False
    store.save_array(folder, WORDVEC, wordvec)
    store.save_array(folder, WORDVEC_WEIGHT, weight.astype(np.float32))
    columns.write_strings(folder, WORDVEC_TERMS, words)
    entry = write_article_vectors(folder, manifest, words, wordvec, weight, settings)
    entry["trained"] = trained
    entry["seconds"] = round(time.perf_counter() - started, 3)
    manifest["vectors"] = entry
    manifest["build"]["seconds"] = round(manifest["build"]["seconds"] + entry["seconds"], 3)
    manifest["build"]["bytes_on_disk"] = store.folder_size(folder)
    store.write_json(folder / store.MANIFEST, manifest)


def folder_idf_weights(folder: Path, manifest: dict[str, Any], words: list[str]) -> np.ndarray:
    """Each word's weight: its always-positive IDF log(1 + (N - df + 0.5) / (df + 0.5)) over
    the article texts (Lucene's form, so no word counts against an article). float32."""
    counts = manifest["counts"]
    n_docs, n_terms = int(counts["articles"]), int(counts["terms"])
    indptr = store.open_array(folder, "body_indptr", "int64", n_terms + 1)
    return idf_weights(np.diff(indptr), term_rows(folder, n_terms, words), len(words), n_docs)


def idf_weights(df_term: np.ndarray, rows: np.ndarray, n_words: int, n_docs: int) -> np.ndarray:
    """Each word's weight from its index term's document frequency `df_term` (rows: index
    term id -> word row or -1); see `folder_idf_weights`. float32."""
    df = np.zeros(n_words)
    has = rows >= 0
    df[rows[has]] = np.asarray(df_term, dtype=np.float64)[has]
    return np.log1p((n_docs - df + 0.5) / (df + 0.5)).astype(np.float32)


def open_matrix(folder: Path, name: str, dtype: str, rows: int, dim: int) -> np.ndarray:
    """Memory-map a 2-d `name.npy` read-only, checking its type and shape."""
    path = folder / f"{name}.npy"
    try:
        arr = np.load(path, mmap_mode="r", allow_pickle=False)
    except FileNotFoundError as exc:
        raise IndexFormatError(f"{folder}: {path.name} is missing; rebuild the index") from exc
    except (ValueError, OSError, EOFError) as exc:
        raise IndexFormatError(f"{folder}: {path.name} is corrupt ({exc}); rebuild") from exc
    if arr.dtype != np.dtype(dtype) or arr.shape != (rows, dim):
        raise IndexFormatError(
            f"{folder}: {path.name} holds {arr.dtype} of shape {arr.shape}, expected {dtype} "
            f"of shape ({rows}, {dim}); the index is damaged, rebuild it"
        )
    return np.asarray(arr)


class DenseVectors:
    """The stored word and article vectors of an index, memory-mapped."""

    def __init__(self, folder: Path, entry: dict[str, Any], n_docs: int, n_terms: int) -> None:
        self.folder = folder
        self.settings = VectorSettings.from_dict(entry["settings"])
        dim, n_words = self.settings.dim, int(entry["words"])
        self.n_words = n_words
        self.wordvec = open_matrix(folder, WORDVEC, "float32", n_words, dim)
        self.weight = store.open_array(folder, WORDVEC_WEIGHT, "float32", n_words)
        self.termvec_row = store.open_array(folder, TERMVEC_ROW, "int32", n_terms)
        self.docvec = open_matrix(folder, DOCVEC, self.settings.dtype, n_docs, dim)
        self.ann_info: dict[str, Any] | None = entry.get("ann")

    @classmethod
    def open(cls, folder: Path, manifest: dict[str, Any]) -> DenseVectors | None:
        """The vectors of an index folder, or None for an index built without them."""
        entry = manifest.get("vectors")
        if not entry:
            return None
        counts = manifest["counts"]
        return cls(folder, entry, int(counts["articles"]), int(counts["terms"]))

    def words(self) -> list[str]:
        """The words that have vectors, in row order."""
        return list(columns.StringColumn(self.folder, WORDVEC_TERMS, self.n_words))

    def query_vector(self, term_ids: np.ndarray, qtf: np.ndarray) -> np.ndarray | None:
        """Unit-length vector of a clue given as known index term ids and their counts;
        None when none of its words has a vector."""
        rows = self.termvec_row[term_ids]
        has = rows >= 0
        if not has.any():
            return None
        r = rows[has]
        w = (qtf[has] * self.weight[r]).astype(np.float32)
        vec = w @ self.wordvec[r]
        norm = float(np.linalg.norm(vec))
        return (vec / norm).astype(np.float32) if norm > 0 else None
