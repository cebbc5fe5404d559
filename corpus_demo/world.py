"""Builds the skeleton of the invented world: kinds, names, titles, links and popularity."""

from __future__ import annotations

import random
from dataclasses import dataclass

import numpy as np

from corpus_demo import names as nm
from corpus_demo.kinds import KINDS
from corpus_demo.links import RefSampler, choose_echoes
from corpus_demo.planner import LinkPlanner
from corpus_demo.templates import RESERVED

GROUP_SHARE = 0.30  # share of articles that sit in an ambiguous-name group
CLUSTER_SIZE = 150  # articles per topical cluster
ZIPF_EXPONENT = 1.0


@dataclass
class World:
    """Everything about the corpus that must be known before any text is written."""

    seed: int
    n: int
    kinds: np.ndarray
    names: list[str]
    titles: list[str]
    era: np.ndarray
    gender: np.ndarray
    fame_rank: np.ndarray
    namesake: np.ndarray
    grouped: np.ndarray
    fact_off: np.ndarray
    fact_tpl: np.ndarray
    ref_off: np.ndarray
    ref_flat: np.ndarray
    echo_off: np.ndarray
    echo_src: np.ndarray
    red_names: list[str]
    red_titles: list[str]
    inlinks: np.ndarray
    popularity: np.ndarray
    taken: frozenset[str]


def _form_groups(rng: np.random.Generator, kinds: np.ndarray, n: int) -> list[np.ndarray]:
    """Partition a share of articles into groups of distinct kinds sharing one name."""
    order = rng.permutation(n)
    target = round(GROUP_SHARE * n)
    sizes = rng.choice([2, 3, 4], size=target // 2 + 2, p=[0.6, 0.3, 0.1])
    groups: list[np.ndarray] = []
    pos = 0
    for size in sizes:
        if pos + size > target or pos + size > n:
            break
        members = order[pos : pos + size]
        pos += size
        seen: set[int] = set()
        for m in members:
            while int(kinds[m]) in seen:
                kinds[m] = rng.integers(len(KINDS))
            seen.add(int(kinds[m]))
        groups.append(members)
    return groups


def build_world(n: int, seed: int, progress: bool = False) -> World:
    """Lay out kinds, ambiguous name groups, titles, links and popularity for n articles."""
    from tqdm import tqdm

    rng = np.random.default_rng(seed)
    prng = random.Random(seed)
    shares = np.array([k.share for k in KINDS])
    kinds = rng.choice(len(KINDS), size=n, p=shares / shares.sum()).astype(np.int8)
    fame_rank = rng.permutation(n) + 1
    w = fame_rank.astype(np.float64) ** -ZIPF_EXPONENT
    groups = _form_groups(rng, kinds, n)
    era = rng.integers(0, 4, size=n).astype(np.int8)
    cluster = rng.integers(0, max(1, n // CLUSTER_SIZE), size=n).astype(np.int64)
    for members in groups:
        cluster[members] = cluster[members[0]]
    gender = rng.integers(0, 2, size=n).astype(np.int8)

    taken: set[str] = set()
    names: list[str] = [""] * n
    titles: list[str] = [""] * n
    namesake = np.full(n, -1, dtype=np.int64)
    grouped = np.zeros(n, dtype=bool)
    group_names = nm.unique_names(prng, len(groups), taken, RESERVED)
    for gname, members in zip(group_names, groups, strict=True):
        primary = int(members[np.argmax(w[members])])
        bare = prng.random() < 0.55
        for m in members.tolist():
            grouped[m] = True
            names[m] = gname
            qualified = not (bare and m == primary)
            titles[m] = f"{gname} ({KINDS[kinds[m]].name})" if qualified else gname
            if m != primary:
                namesake[m] = primary
    for i in np.flatnonzero(~grouped).tolist():
        if KINDS[kinds[i]].person:
            names[i] = nm.person_name(prng, taken, RESERVED)[0]
        else:
            names[i] = nm.unique_names(prng, 1, taken, RESERVED)[0]
        titles[i] = names[i]

    sampler = RefSampler(rng, kinds, w, cluster)
    plan = LinkPlanner(prng, sampler, kinds, cluster, fame_rank, namesake, taken)
    it = range(n)
    if progress:
        it = tqdm(it, desc="linking", unit="art", mininterval=1.0)
    for i in it:
        plan.plan(i)
    ref_off, fact_off = plan.ref_off, plan.fact_off
    red_names, red_titles = plan.red_names, plan.red_titles
    ref_flat, fact_tpl = plan.ref_flat, plan.fact_tpl

    refs = np.asarray(ref_flat, dtype=np.int64)
    src = np.repeat(np.arange(n, dtype=np.int64), np.diff(ref_off))
    ok = refs >= 0
    pairs = np.unique(src[ok] * n + refs[ok])
    echo_off, echo_src, pairs = choose_echoes(prng, n, pairs, fame_rank, names, namesake)
    inlinks = np.bincount(pairs % n, minlength=n)
    noise = rng.lognormal(0.0, 0.8, size=n)
    floor = rng.lognormal(2.5, 1.0, size=n)
    popularity = np.round(25.0 * (1 + inlinks) ** 1.15 * noise + floor).astype(np.int64)
    return World(
        seed=seed,
        n=n,
        kinds=kinds,
        names=names,
        titles=titles,
        era=era,
        gender=gender,
        fame_rank=fame_rank,
        namesake=namesake,
        grouped=grouped,
        fact_off=fact_off,
        fact_tpl=np.asarray(fact_tpl, dtype=np.int16),
        ref_off=ref_off,
        ref_flat=refs.astype(np.int32),
        echo_off=echo_off,
        echo_src=echo_src,
        red_names=red_names,
        red_titles=red_titles,
        inlinks=inlinks,
        popularity=popularity,
        taken=frozenset(taken),
    )
