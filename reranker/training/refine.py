"""Word vectors refined with the labelled clues, and the cross-fitted sets training uses.

The index's own vectors know only the articles. Refining trains them again, seeded, on the
articles plus one sentence per labelled clue: the clue's analyzed tokens followed by its
answer article's (title and text), written `REPEAT` times so a few hundred clues count
beside thousands of articles. Words of a clue then land near the words of the articles such
clues describe. The result is stored as a vector generation inside the index folder
(retriever/vecgen.py) and named in the model file, so serving uses the same vectors.

Honest training rows: a row's dense evidence must not come from vectors that saw that
row's own label. The clues are split into two folds by answer article (no answer in both);
each fold's rows are made with vectors refined on the other fold, and the served vectors
are refined on all clues. Fusion tuning sees the same cross-fitted pools.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace
from typing import Any

from retriever import Index, vecgen
from retriever import vectors as vecs

from ..candidates import CandidatePolicy
from .logs import LabelledClue

REPEAT = 5  # copies of each clue sentence (measured on the FOLDOC + Jargon set; see README)
FOLDS = 2


def clue_sentences(index: Index, clues: Sequence[LabelledClue]) -> list[str]:
    """One training line per clue with a known answer: clue tokens then the answer's."""
    out = []
    for c in clues:
        row = None if c.answer is None else index.resolver.row(c.answer)
        if row is None:
            continue
        doc = index.document(index.ids[row])
        tokens = index.analyzer.tokens(c.clue) + index.analyzer.tokens(f"{doc.title}\n{doc.text}")
        out.extend([" ".join(tokens)] * REPEAT)
    return out


def refine_vectors(index: Index, clues: Sequence[LabelledClue], *, progress: bool = False) -> str:
    """Train the index's vectors again with the clues' sentences; the stored generation's name."""
    dense = index.dense
    if dense is None:
        raise ValueError(f"{index.path}: the index has no word vectors to refine")
    # The index's own settings, epochs included (chosen from the corpus's size at build,
    # retriever.vectors.epochs_for_tokens): the clue lines can outweigh a small corpus, and
    # counting them would train the demo's refined vectors twice as long for nothing measured.
    lines = clue_sentences(index, clues)
    words, wordvec, settings = vecs.train(
        index.path, index.n_docs, index.analyzer, dense.vectors.settings, progress, lines
    )
    weight = vecs.folder_idf_weights(index.path, index.manifest, words)
    extra = {"refined_on_clues": len(lines) // REPEAT}
    return vecgen.write_generation(index.path, words, wordvec, weight, settings, extra=extra)


def fold_of(index: Index, clue: LabelledClue) -> int:
    """The clue's fold: a hash of its answer's article id (clues of no known answer: 0)."""
    row = None if clue.answer is None else index.resolver.row(clue.answer)
    if row is None:
        return 0
    return hashlib.sha256(index.ids[row].encode("utf-8")).digest()[0] % FOLDS


@dataclass(frozen=True)
class Refined:
    """The served generation, the folds' generations, and which clue is in which fold."""

    served: str
    by_fold: tuple[str, ...]
    fold: dict[int, int]  # id(clue) -> fold

    def policy_for(self, base: CandidatePolicy) -> Callable[[LabelledClue], CandidatePolicy]:
        """A clue's policy for its training rows: the vectors refined without its fold."""

        def pick(clue: LabelledClue) -> CandidatePolicy:
            other = (self.fold.get(id(clue), 0) + 1) % FOLDS
            return replace(base, vectors=self.by_fold[other])

        return pick

    def summary(self) -> dict[str, Any]:
        """What the model file records about the refinement."""
        counts = [0] * FOLDS
        for f in self.fold.values():
            counts[f] += 1
        return {"served": self.served, "folds": list(self.by_fold), "clues_per_fold": counts}


def refine_all(index: Index, clues: Sequence[LabelledClue], *, progress: bool = False) -> Refined:
    """Vectors refined on each fold's clues (for the other fold's rows) and on all of them."""
    fold = {id(c): fold_of(index, c) for c in clues}
    by_fold = tuple(
        refine_vectors(index, [c for c in clues if fold[id(c)] == f], progress=progress)
        for f in range(FOLDS)
    )
    return Refined(refine_vectors(index, clues, progress=progress), by_fold, fold)
