"""Writes clue questions: obscure, paraphrased details first, a plain closing sentence last."""

from __future__ import annotations

import math
import random
import re

import numpy as np

from corpus_demo.articles import Fact, article_facts, article_id, ref_name
from corpus_demo.kinds import ERAS, KINDS, KindSpec
from corpus_demo.paraphrase import (
    paraphrase,
    paraphrase_value,
    vague_number,
    vague_year,
)
from corpus_demo.templates import INTRO_IDX, SLOT_RE, TEMPLATES
from corpus_demo.world import World

# Invented publications the clues come from; each has its own writing style.
SOURCES: dict[str, tuple[int, int, float, float]] = {
    # name: (min sentences, max sentences, synonym rate, describe-link rate)
    "Brindlemoor Gazette": (3, 5, 0.6, 0.3),
    "Quellhaven Review": (4, 6, 0.8, 0.35),
    "Tarrowin Almanac": (3, 4, 0.45, 0.2),
    "Ostvale Chronicle": (4, 6, 0.55, 0.25),
}
SOURCE_NAMES = tuple(SOURCES)
CLOSING_DESCRIBE = 0.65  # chance the closing sentence hides one of its links
HUB_DEGREE = 40  # in-links from which a link counts as a well-known hub
RARE_HIDE = 0.8  # extra hiding of rarely linked names
VALUE_RATE = 0.8  # chance a plain value is reworded
VAGUE_SENTENCES = 0  # leading sentences with vague numbers and nouns
ANSWER_EXP = -0.6  # answer weight ~ fame_rank ** 0.6: obscure answers favoured
DESC_SCALE = 2.6  # scales the per-source link-hiding rates
VERBS = ("Name this", "Identify this", "Give the name of this")
OPENERS = (
    "According to one chronicle, ",
    "It is said that ",
    "Records from the {era} note that ",
    "One account claims that ",
)


def _describe(template: str, slot: str, kind: str) -> str:
    """Replace a link slot (and the words naming its kind) by 'a certain KIND'."""
    pat = rf"(?:[Tt]he |a )?(?:{kind} (?:of )?)?\{{{slot}\}}(?: {kind}\b)?"
    return re.sub(pat, f"a certain {kind}", template, count=1)


def _subject(spec: KindSpec, gender: int, rng: random.Random, vague: bool) -> tuple[str, str]:
    """Return (subject, possessive) phrases standing in for the answer."""
    noun = rng.choice(spec.nouns) if vague and rng.random() < 0.7 else spec.name
    if rng.random() < 0.35:
        if spec.person:
            return ("she", "her") if gender else ("he", "his")
        return "it", "its"
    return f"this {noun}", f"this {noun}'s"


def _describe_rate(world: World, r: int, desc: float) -> float:
    """Return the chance of hiding a link's name: rare links are hidden more often."""
    deg = int(world.inlinks[r]) if r >= 0 else 0
    hub = min(1.0, math.log1p(deg) / math.log1p(HUB_DEGREE))
    return desc + (1.0 - desc) * (1.0 - hub) * RARE_HIDE


def specificity(world: World, fact: Fact) -> float:
    """Return how strongly a fact points at its article (rare links score high)."""
    score = 0.0
    for r in fact.refs.values():
        deg = int(world.inlinks[r]) if r >= 0 else 0
        score += math.log(world.n / (1.0 + deg))
    if any(s.startswith(("year", "num")) for s in fact.values):
        score += 2.0
    return score


def clue_sentence(
    world: World, i: int, fact: Fact, rng: random.Random, syn: float, desc: float,
    vague: bool,
) -> str:  # fmt: skip
    """Turn one article fact into a clue sentence about an unnamed subject."""
    spec = KINDS[world.kinds[i]]
    tpl = fact.template
    values: dict[str, str] = {}
    for slot, r in fact.refs.items():
        if slot == "namesake":
            if rng.random() < 0.25:  # a small share of clues leak the name
                values[slot] = ref_name(world, r)
            else:
                nk = KINDS[world.kinds[r]].name
                tpl = tpl.replace("the {nkind} {namesake}", f"a {nk} of the same name")
        elif rng.random() < _describe_rate(world, r, desc):
            tpl = _describe(tpl, slot, re.sub(r"\d", "", slot))
        else:
            values[slot] = ref_name(world, r)
    tpl = paraphrase(tpl, rng, syn)
    for slot, v in fact.values.items():
        if slot.startswith("year"):
            v = vague_year(v) if vague or rng.random() < 0.4 else v
        elif slot.startswith(("num", "small")):
            v = vague_number(rng) if vague or rng.random() < 0.7 else v
        else:
            v = paraphrase_value(v, rng, VALUE_RATE if vague else VALUE_RATE * 0.8)
        values[slot] = v
    values["S"], values["P"] = _subject(spec, int(world.gender[i]), rng, vague)
    text = SLOT_RE.sub(lambda m: values.get(m.group(1) + m.group(2), ""), tpl)
    return text[:1].upper() + text[1:]


def closing_sentence(world: World, i: int, intro: Fact, rng: random.Random) -> str:
    """Return the final sentence, which names the answer's kind and key links."""
    spec = KINDS[world.kinds[i]]
    tail = TEMPLATES[INTRO_IDX[world.kinds[i]]].text
    if rng.random() < 0.5:
        tail = tail.replace("{adj} ", "", 1)
    head, sep, rest = tail.partition(spec.name)
    tail = head + sep + paraphrase(rest, rng, 0.15)
    values = dict(intro.values)
    values.update({s: ref_name(world, r) for s, r in intro.refs.items()})
    if intro.refs and rng.random() < CLOSING_DESCRIBE:
        slot = rng.choice(sorted(intro.refs))
        tail = _describe(tail, slot, re.sub(r"\d", "", slot))
    text = SLOT_RE.sub(lambda m: values[m.group(1) + m.group(2)], tail)
    extra = ""
    name = world.names[i]
    if spec.person and " " in name and rng.random() < 0.08:
        extra = f", known to friends as {name.split(' ')[0]}"
    return f"{rng.choice(VERBS)} {text}{extra}."


def make_clue(world: World, i: int, rng: random.Random, source: str) -> str:
    """Compose the full multi-sentence clue for article i."""
    lo, hi, syn, desc = SOURCES[source]
    desc = min(1.0, desc * DESC_SCALE)
    facts = article_facts(world, i)
    intro, others = facts[0], facts[1:]
    n_body = min(len(others), rng.randint(lo, hi) - 1)
    body = rng.sample(others, n_body)
    body.sort(key=lambda f: specificity(world, f) + rng.gauss(0.0, 1.0))
    sentences = []
    for pos, fact in enumerate(body):
        vague = pos < VAGUE_SENTENCES
        rate = min(1.0, syn + (0.2 if vague else -0.1))
        sentences.append(clue_sentence(world, i, fact, rng, rate, desc, vague))
    sentences.append(closing_sentence(world, i, intro, rng))
    era = ERAS[int(world.era[i])][0]
    free = list(range(len(sentences) - 1))
    rng.shuffle(free)
    for j in free:
        if len(" ".join(sentences).split()) >= 40:
            break
        opener = rng.choice(OPENERS).format(era=era)
        sentences[j] = opener + sentences[j][:1].lower() + sentences[j][1:]
    return " ".join(sentences)


def choose_answers(world: World, n_questions: int, seed: int) -> np.ndarray:
    """Pick answer articles: mostly mid-popularity, with extra weight on namesakes."""
    rng = np.random.default_rng(seed + 4242)
    p = (world.fame_rank.astype(np.float64) ** -ANSWER_EXP) * np.where(
        world.namesake >= 0, 2.5, 1.0
    )
    p /= p.sum()
    replace = n_questions > world.n
    return rng.choice(world.n, size=n_questions, replace=replace, p=p)


def make_question(
    world: World, i: int, q: int, rng: random.Random, aliases: list[str],
    alias_unique: bool,
) -> dict[str, object]:  # fmt: skip
    """Return one question record with its gold answer and metadata."""
    source = SOURCE_NAMES[rng.randrange(len(SOURCE_NAMES))]
    clue = make_clue(world, i, rng, source)
    answer = article_id(i)
    u = rng.random()
    if u < 0.05 and aliases and alias_unique:
        answer = aliases[0]
    elif u < 0.10:
        answer = world.titles[i]
    syn = SOURCES[source][2]
    obscurity = math.log(int(world.fame_rank[i])) / math.log(max(world.n, 2))
    raw = 1 + 3.2 * obscurity + 1.5 * (syn - 0.55) + rng.gauss(0.0, 0.5)
    return {
        "id": f"q{q:05d}",
        "clue": clue,
        "answer": answer,
        "metadata": {
            "source": source,
            "difficulty": int(min(5, max(1, round(raw)))),
            "kind": KINDS[world.kinds[i]].name,
        },
    }
