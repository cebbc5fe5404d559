"""Plans each article's facts and link targets, including near-duplicate "twin" articles."""

from __future__ import annotations

import random

import numpy as np

from corpus_demo import names as nm
from corpus_demo.kinds import KINDS
from corpus_demo.links import RefSampler
from corpus_demo.templates import (
    FACT_IDX,
    GENERAL_IDX,
    INTRO_IDX,
    NAMED_IDX,
    RESERVED,
    TEMPLATES,
)

RED_LINK_RATE = 0.02  # share of links pointing at titles that do not exist
LOCAL_LINK_RATE = 0.85  # links from own cluster
TWIN_RATE = 0.85  # articles modelled on a neighbour
TWIN_COPY = 0.95  # share of a model's links a twin keeps
MAX_MODELS = 8
MODEL_FAMOUS = 0.9  # twins copy the cluster's star


class LinkPlanner:
    """Chooses, article by article, the templates and link targets of its facts."""

    def __init__(
        self, prng: random.Random, sampler: RefSampler, kinds: np.ndarray,
        cluster: np.ndarray, fame_rank: np.ndarray, namesake: np.ndarray,
        taken: set[str],
    ) -> None:  # fmt: skip
        n = len(kinds)
        self.prng, self.sampler, self.kinds, self.cluster = prng, sampler, kinds, cluster
        self.fame_rank, self.namesake, self.taken = fame_rank, namesake, taken
        self.log_n = float(np.log(max(n, 2)))
        self.fact_off = np.zeros(n + 1, dtype=np.int64)
        self.ref_off = np.zeros(n + 1, dtype=np.int64)
        self.fact_tpl: list[int] = []
        self.ref_flat: list[int] = []
        self.red_names: list[str] = []
        self.red_titles: list[str] = []
        self.models: dict[int, list[int]] = {}

    def _red(self, kind: int) -> int:
        """Create a link to a title that has no article; return its negative code."""
        prng = self.prng
        if KINDS[kind].person:
            name = nm.person_name(prng, self.taken, RESERVED)[0]
        else:
            name = nm.unique_names(prng, 1, self.taken, RESERVED)[0]
        self.red_names.append(name)
        qualified = prng.random() < 0.5
        self.red_titles.append(f"{name} ({KINDS[kind].name})" if qualified else name)
        return -len(self.red_names)

    def _draw(self, i: int, kind: int, used: set[int]) -> int:
        """Draw one link target of a kind for article i."""
        prng = self.prng
        r, tries = -1, 0
        while (r < 0 or r in used) and tries < 6:
            if tries < 3 and prng.random() < LOCAL_LINK_RATE:
                r = self.sampler.draw_local(kind, int(self.cluster[i]), prng)
            else:
                r = self.sampler.draw(kind)
            tries += 1
        if r < 0 or r in used or prng.random() < RED_LINK_RATE:
            r = self._red(kind)
        return r

    def facts_of(self, m: int) -> list[tuple[int, list[int]]]:
        """Return (template, link targets) of each fact already planned for article m."""
        out: list[tuple[int, list[int]]] = []
        pos = int(self.ref_off[m])
        for t in self.fact_tpl[self.fact_off[m] : self.fact_off[m + 1]]:
            k = 1 if t == NAMED_IDX else len(TEMPLATES[t].refs)
            out.append((t, self.ref_flat[pos : pos + k]))
            pos += k
        return out

    def _fresh(self, i: int) -> list[tuple[int, list[int] | None]]:
        """Pick templates for an ordinary article (links drawn later)."""
        prng, k = self.prng, int(self.kinds[i])
        frac = 1.0 - np.log(self.fame_rank[i]) / self.log_n
        n_facts = min(len(FACT_IDX[k]), 3 + int(frac * 4 + prng.random()))
        chosen = [INTRO_IDX[k], *sorted(prng.sample(FACT_IDX[k], n_facts))]
        if frac > 0.55:
            chosen += prng.sample(GENERAL_IDX, prng.randint(0, int(frac * 4)))
        return [(t, None) for t in chosen]

    def _twin(self, i: int, m: int) -> list[tuple[int, list[int] | None]]:
        """Model article i on neighbour m of the same kind: same facts, mostly same links."""
        prng, k = self.prng, int(self.kinds[i])
        base: list[tuple[int, list[int] | None]] = [
            (t, refs) for t, refs in self.facts_of(m) if TEMPLATES[t].role != "named"
        ]
        intro, body = base[0], [b for b in base[1:] if TEMPLATES[b[0]].role == "fact"]
        if len(body) > 3 and prng.random() < 0.6:
            body.pop(prng.randrange(len(body)))
        spare = [t for t in FACT_IDX[k] if t not in {b[0] for b in body}]
        if spare and prng.random() < 0.6:
            body.append((prng.choice(spare), None))
        out: list[tuple[int, list[int] | None]] = [intro]
        out.extend(sorted(body, key=lambda b: b[0]))
        return out

    def plan(self, i: int) -> None:
        """Plan article i (articles must be planned in index order)."""
        prng, k = self.prng, int(self.kinds[i])
        key = int(self.cluster[i]) * len(KINDS) + k
        models = self.models.setdefault(key, [])
        if models and prng.random() < TWIN_RATE:
            if prng.random() < MODEL_FAMOUS:
                m = min(models, key=lambda j: int(self.fame_rank[j]))
            else:
                m = prng.choice(models)
            chosen = self._twin(i, m)
        else:
            chosen = self._fresh(i)
        if len(models) < MAX_MODELS:
            models.append(i)
        if self.namesake[i] >= 0 and prng.random() < 0.75:
            chosen.append((NAMED_IDX, [int(self.namesake[i])]))
        used = {i}
        for t, model_refs in chosen:
            self.fact_tpl.append(t)
            if t == NAMED_IDX:
                assert model_refs is not None
                self.ref_flat.extend(model_refs)
                continue
            for pos, (_slot, rk) in enumerate(TEMPLATES[t].refs):
                r = -1
                if model_refs is not None and prng.random() < TWIN_COPY:
                    r = model_refs[pos]
                    if prng.random() < RED_LINK_RATE:
                        r = self._red(rk)
                if r in used or r == -1:
                    r = self._draw(i, rk, used)
                used.add(r)
                self.ref_flat.append(r)
        self.fact_off[i + 1] = len(self.fact_tpl)
        self.ref_off[i + 1] = len(self.ref_flat)
