"""Word vectors trained with gensim's word2vec (skip-gram) on analyzed lines: the stored
articles' titles and texts, and any extra lines after them."""

from __future__ import annotations

import itertools
from collections.abc import Iterable, Iterator
from dataclasses import replace
from pathlib import Path
from typing import Any, NamedTuple

import numpy as np
from tqdm.auto import tqdm

from . import store
from .analyzer import Analyzer
from .counting import cores
from .vecsettings import VectorSettings, epochs_for_tokens

# gensim cuts longer sentences at 10,000 tokens (its MAX_WORDS_IN_BATCH); longer articles
# are fed as several lines so no text is lost.
_MAX_LINE_TOKENS = 10_000


class Trained(NamedTuple):
    """Word vectors as trained: the words, their float32 vectors, and the settings used
    (with the number of epochs filled in)."""

    words: list[str]
    wordvec: np.ndarray
    settings: VectorSettings


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
