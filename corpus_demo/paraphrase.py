"""Synonym substitution so clue sentences do not repeat the article's wording."""

from __future__ import annotations

import random
import re

# fmt: off
_PAIRS = """
founded=established|set_up built=constructed|raised building=construction
famous=renowned|celebrated trade=commerce|traffic market=bazaar|marketplace
born=raised besieged=encircled|blockaded harbour=port|quay rebuilt=reconstructed|restored
held=staged|observed seat=home|headquarters tower=spire|turret stands=rises|looms
old=ancient|former bridge=crossing|span crossed=spanned|traversed stone=masonry
spawns=breeds drowned=perished banks=shores lined=flanked|bordered mills=workshops
describes=depicts|recounts great=terrible flood=deluge|inundation runs=stretches|winds
valley=vale|dale marked=formed|defined border=frontier|boundary agreed=settled
climbed=ascended|scaled nests=breeds|roosts cliffs=crags|bluffs summit=top|crest
lake=tarn|pool visited=frequented pilgrims=devotees|worshippers rises=begins|springs
slopes=flanks|sides shows=depicts|portrays snow=frost miners=diggers|delvers
dug=extracted|quarried western=westward face=side shrine=sanctuary|altar raised=erected
claimed=seized|annexed charted=mapped|surveyed reefs=shoals exports=ships|sends
mainland=continent found=encountered lagoons=shallows gave=ceded|handed
house=dynasty|line dominates=overlooks north=northern set=placed|located
sailed=voyaged|travelled shipwrecked=wrecked survived=lived logbooks=journals|diaries
edited=compiled|collated tells=recounts|relates last=final voyage=journey|expedition
fought=served|battled member=affiliate died=perished buried=interred early=youthful
verses=poems|lines praise=celebrate|extol words=lyrics exiled=banished
laurel=prize|crown portrait=likeness hangs=is_displayed exchanged=traded letters=notes
throne=crown death=demise|passing signed=concluded|sealed
ordered=commissioned praised=lauded|admired studied=learned catalogued=recorded
taught=lectured advised=counselled treatise=tract|study printed=published
aboard=on launched=floated commanded=led carried=transported|conveyed sunk=lost
storm=tempest|gale cannons=guns figurehead=carving owned=operated composed=written
first=initially sung=performed|chanted played=performed banned=forbidden|outlawed
funerals=burials|wakes mentions=names refrain=chorus published=issued|released
hero=protagonist modelled=based adapted=reworked chapters=sections map=chart
painted=made hall=chamber pigments=paints commissioned=ordered perches=sits
measures=spans described=classified wings=plumage beak=bill feeds=preys winters=overwinters
banner=standard|flag imitates=mimics|echoes call=cry eggs=young scales=skin
grows=reaches salted=cured|preserved sold=traded hunted=pursued fishermen=anglers|netters
catch=trap nets=mesh roots=tangles honours=celebrates flowers=blossoms|blooms
bitter=acrid leaves=foliage healers=herbalists|physicians brew=steep tea=tisane
fever=ague woven=plaited|twined garlands=wreaths dye=colouring robes=gowns cost=claimed
ended=concluded|closed subject=theme people=folk|inhabitants float=launch lanterns=lamps
organised=run|arranged night=evening worn=donned suspended=halted|interrupted
lasts=continues feast=banquet war=conflict drafted=written|penned fixed=set
granted=awarded monopoly=privilege original=first copy=text sank=foundered
clauses=provisions controls=governs master=head|leader sponsors=funds|supports
dissolved=abolished|disbanded restored=revived|reinstated members=fellows wear=don
hoods=cowls mentioned=cited wrote=penned|composed ode=poem history=chronicle
street=lane|road named=called takes=draws|borrows lives=souls days=nights weeks=moons
poet=versifier|bard scholar=savant|thinker sailor=mariner|seafarer ruler=monarch|sovereign
song=tune|air novel=book|tale painting=canvas|picture ship=vessel river=waterway|stream
mountain=peak island=isle town=settlement battle=clash|fight treaty=accord|pact
festival=celebration|fair guild=society|company plant=herb
"""
# fmt: on

SYNONYMS: dict[str, tuple[str, ...]] = {}
for _pair in _PAIRS.split():
    _word, _alts = _pair.split("=")
    SYNONYMS[_word] = tuple(a.replace("_", " ") for a in _alts.split("|"))

# fmt: off
VALUE_SYNONYMS: dict[str, tuple[str, ...]] = {
    "amber": ("fossil gum",), "salt": ("sea crystals", "brine"), "copper": ("red metal",),
    "barley": ("grain",), "indigo": ("blue dye",), "tin": ("white metal",),
    "wool": ("fleece",), "pearls": ("oyster gems",), "cedar": ("fragrant timber",),
    "honey": ("sweet comb",), "flax": ("linen fibre",), "saffron": ("crocus threads",),
    "slate": ("roofing stone",), "resin": ("pine gum",), "kelp": ("seaweed",),
    "grey": ("ashen",), "crimson": ("scarlet",), "ochre": ("earthy yellow",),
    "pale blue": ("sky-coloured",), "green": ("verdant",), "black": ("sable",),
    "silver": ("argent",), "russet": ("reddish-brown",), "white": ("snowy",),
    "violet": ("purple",), "tides": ("the moving sea",), "eclipses": ("darkened suns",),
    "grammar": ("the rules of speech",), "salt marshes": ("brackish fens",),
    "star charts": ("maps of the heavens",), "old law": ("ancient statutes",),
    "bird migration": ("the travels of birds",), "bell casting": ("founding chimes",),
    "medicine": ("healing",), "number puzzles": ("arithmetic riddles",),
    "glass": ("vitreous craft",), "harp": ("plucked strings",), "drum": ("skins",),
    "reed pipe": ("woodwind",), "fiddle": ("bowed strings",), "bells": ("chimes",),
    "horn": ("brass",), "lute": ("plucked strings",),
}
# fmt: on

_WORD_RE = re.compile(r"[A-Za-z]+")
_SLOT_SPLIT = re.compile(r"(\{[^}]+\})")


def paraphrase(template: str, rng: random.Random, rate: float) -> str:
    """Replace template words (never slots) by synonyms with probability rate."""

    def swap(m: re.Match[str]) -> str:
        word = m.group(0)
        alts = SYNONYMS.get(word.lower())
        if not alts or rng.random() >= rate:
            return word
        alt = rng.choice(alts)
        return alt.capitalize() if word[0].isupper() else alt

    parts = _SLOT_SPLIT.split(template)
    return "".join(p if p.startswith("{") else _WORD_RE.sub(swap, p) for p in parts)


def paraphrase_value(value: str, rng: random.Random, rate: float) -> str:
    """Return a looser wording of a plain value (a good, colour, topic, instrument)."""
    alts = VALUE_SYNONYMS.get(value)
    if alts and rng.random() < rate:
        return rng.choice(alts)
    return value


def vague_year(year: str) -> str:
    """Return a decade such as '1430s' in place of an exact year."""
    return f"the {int(year) // 10 * 10}s"


def vague_number(rng: random.Random) -> str:
    """Return a vague quantity used instead of an exact number."""
    return rng.choice(("several", "many", "a handful of", "some"))
