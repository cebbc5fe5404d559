"""Renders one article (text, links, aliases, metadata) from the world skeleton."""

from __future__ import annotations

import random
from dataclasses import dataclass, field

from corpus_demo import names as nm
from corpus_demo.kinds import ERAS, KINDS, VALUES, KindSpec
from corpus_demo.templates import NAMED_IDX, RESERVED, SLOT_RE, TEMPLATES
from corpus_demo.world import World

VOWEL_START = tuple("aeiou")


@dataclass
class Fact:
    """One filled-in fact: its template, plain values and linked article indices."""

    template: str
    role: str
    values: dict[str, str] = field(default_factory=dict)
    refs: dict[str, int] = field(default_factory=dict)
    sentence: str = ""


def article_id(i: int) -> str:
    """Return the public id of article number i, e.g. 'a000123'."""
    return f"a{i:06d}"


def article_rng(seed: int, i: int) -> random.Random:
    """Return the private random stream of article i (so it can be re-rendered)."""
    return random.Random(seed * 1_000_003 + i * 7919 + 17)


def ref_name(world: World, r: int) -> str:
    """Return the display name of a linked article (or of a missing one)."""
    return world.names[r] if r >= 0 else world.red_names[-r - 1]


def ref_title(world: World, r: int) -> str:
    """Return the link title of a linked article (or of a missing one)."""
    return world.titles[r] if r >= 0 else world.red_titles[-r - 1]


def subject_forms(world: World, i: int) -> tuple[str, str]:
    """Return (subject, possessive) of article i as used in its own text."""
    spec = KINDS[world.kinds[i]]
    subj = spec.subject.format(n=world.names[i])
    return subj, subj + "'s"


def fill(template: str, values: dict[str, str]) -> str:
    """Substitute slots in a template and capitalise the sentence."""
    text = SLOT_RE.sub(lambda m: values[m.group(1) + m.group(2)], template)
    return text[:1].upper() + text[1:]


def _value(rng: random.Random, spec: KindSpec, base: str, era: int) -> str:
    """Draw one plain slot value."""
    if base == "year":
        _, lo, hi = ERAS[era]
        return str(rng.randint(lo, hi))
    if base == "num":
        return str(rng.randint(12, 980))
    if base == "small":
        return str(rng.randint(2, 9))
    if base == "adj":
        return rng.choice(spec.adjs)
    return rng.choice(VALUES[base])


def article_facts(world: World, i: int) -> list[Fact]:
    """Return the ordered facts of article i, deterministically."""
    rng = article_rng(world.seed, i)
    spec = KINDS[world.kinds[i]]
    era = int(world.era[i])
    subj, poss = subject_forms(world, i)
    facts: list[Fact] = []
    rpos = int(world.ref_off[i])
    for t in world.fact_tpl[world.fact_off[i] : world.fact_off[i + 1]].tolist():
        tpl = TEMPLATES[t]
        text = tpl.text
        if tpl.role == "named" and spec.person:
            text = "{S} was named after the {nkind} {namesake}."
        if tpl.role == "intro":
            verb = "was" if spec.category in ("person", "event") else "is"
            text = "{S} " + verb + " a " + text + "."
        fact = Fact(template=text, role=tpl.role)
        if t == NAMED_IDX:
            fact.refs["namesake"] = r = int(world.ref_flat[rpos])
            fact.values["nkind"] = KINDS[world.kinds[r]].name
            rpos += 1
        else:
            for slot, _kind in tpl.refs:
                fact.refs[slot] = int(world.ref_flat[rpos])
                rpos += 1
        used: set[str] = set()
        for base, num in SLOT_RE.findall(text):
            slot = base + num
            if slot in fact.refs or slot in fact.values or base in ("S", "P"):
                continue
            v = _value(rng, spec, base, era)
            while v in used and base not in ("year", "num", "small"):
                v = _value(rng, spec, base, era)
            used.add(v)
            fact.values[slot] = v
        vals = dict(fact.values)
        vals.update({s: ref_name(world, r) for s, r in fact.refs.items()})
        vals["S"], vals["P"] = subj, poss
        if tpl.role == "intro" and vals.get("adj", "x").startswith(VOWEL_START):
            fact.template = text = text.replace(" a {adj}", " an {adj}", 1)
        fact.sentence = fill(text, vals)
        facts.append(fact)
    return facts


def article_aliases(world: World, i: int) -> list[str]:
    """Return alternative names of article i (often empty)."""
    rng = article_rng(world.seed, i + 10_000_019)
    spec = KINDS[world.kinds[i]]
    name = world.names[i]
    u = rng.random()
    if spec.person:
        if u < 0.5:
            parts = name.split(" ")
            return [nm.person_alias(rng, parts[0], parts[-1])]
        return []
    if spec.category == "place" and u < 0.3:
        return [nm.old_name(rng, world.taken, RESERVED)]
    if spec.category == "species" and u < 0.4:
        genus = nm.old_name(rng, world.taken, RESERVED)
        return [f"{genus} {nm.place_name(rng).lower()}"]
    if spec.category in ("work", "vessel", "event", "organisation") and u < 0.2:
        return [nm.old_name(rng, world.taken, RESERVED)]
    return []


def alias_sentence(world: World, i: int, alias: str) -> str:
    """Return the sentence that mentions an alias in the article text."""
    spec = KINDS[world.kinds[i]]
    subj = subject_forms(world, i)[0]
    subj = subj[:1].upper() + subj[1:]
    if spec.person:
        return f"{subj} was also known as {alias}."
    if spec.category == "species":
        return f"Its learned name is {alias}."
    if spec.category == "place":
        return f"{subj} was formerly called {alias}."
    return f"{subj} is sometimes called {alias}."


def echo_sentences(world: World, i: int) -> list[str]:
    """Return sentences restating facts of articles that link to article i."""
    rng = article_rng(world.seed, i + 20_000_033)
    out: list[str] = []
    for s in world.echo_src[world.echo_off[i] : world.echo_off[i + 1]].tolist():
        facts = article_facts(world, s)
        hit = next((f for f in facts if i in f.refs.values()), facts[0])
        namesake = int(world.namesake[s]) == i
        if hit.role != "intro" and (namesake or rng.random() < 0.4):
            out.append(facts[0].sentence)
        out.append(hit.sentence)
    return out


def render_article(world: World, i: int) -> dict[str, object]:
    """Return article i as a JSON-ready dict with the public schema."""
    facts = article_facts(world, i)
    aliases = article_aliases(world, i)
    sentences = [f.sentence for f in facts]
    if aliases:
        sentences.insert(1, alias_sentence(world, i, aliases[0]))
    links: list[str] = []
    seen: set[int] = set()
    for f in facts:
        for r in f.refs.values():
            if r not in seen:
                seen.add(r)
                links.append(ref_title(world, r))
    sentences.extend(echo_sentences(world, i))
    for s in world.echo_src[world.echo_off[i] : world.echo_off[i + 1]].tolist():
        if s not in seen:
            seen.add(s)
            links.append(world.titles[s])
    spec = KINDS[world.kinds[i]]
    return {
        "id": article_id(i),
        "title": world.titles[i],
        "text": " ".join(sentences),
        "links": links,
        "aliases": aliases,
        "popularity": int(world.popularity[i]),
        "metadata": {
            "kind": spec.name,
            "category": spec.category,
            "era": ERAS[int(world.era[i])][0],
        },
    }
