"""Article kinds of the invented setting, with fact templates for each kind.

Template slots: ``{S}`` is the subject, ``{P}`` its possessive; a slot named
after a kind (``{town}``, ``{ruler2}``) is a link to another article of that
kind; ``{year}``, ``{num}``, ``{small}``, ``{good}``, ``{color}``, ``{topic}``,
``{instr}``, ``{trade}`` and ``{adj}`` are plain values.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class KindSpec:
    """Static description of one article kind."""

    name: str
    category: str
    share: float
    nouns: tuple[str, ...]
    subject: str
    intro: str
    adjs: tuple[str, ...]
    facts: tuple[str, ...]

    @property
    def person(self) -> bool:
        """True for people."""
        return self.category == "person"


PLACE_ADJ = ("small", "walled", "windswept", "ancient", "remote", "busy", "quiet")
PERSON_ADJ = ("celebrated", "obscure", "wandering", "learned", "stubborn", "young")
WORK_ADJ = ("melancholy", "long", "cheerful", "unfinished", "famous", "strange")
LIFE_ADJ = ("small", "shy", "long-lived", "rare", "common", "speckled")
EVENT_ADJ = ("bloody", "brief", "lavish", "decisive", "forgotten", "solemn")

# fmt: off
_K: list[KindSpec] = [
    KindSpec("town", "place", 0.12, ("settlement", "port", "place"), "{n}",
        "{adj} town on the island of {island}, where the {river} meets the sea", PLACE_ADJ, (
        "{S} was founded by {ruler} in {year}.",
        "{P} market is famous for its trade in {good} and {good2}.",
        "The poet {poet} was born in {S}.",
        "{S} was besieged during the battle of {battle}.",
        "{P} harbour was rebuilt after a fire in {year}.",
        "The {festival} festival is held in {S} every spring.",
        "{S} is the seat of the {guild} guild.",
        "A {color} tower built by {scholar} stands above the old bridge of {S}.",
    )),
    KindSpec("river", "place", 0.06, ("waterway", "stream"), "{n}",
        "{adj} river that rises on {mountain} and flows into the sea near {town}", PLACE_ADJ, (
        "{S} is crossed by a stone bridge built under {ruler} in {year}.",
        "The {fish} fish spawns in the upper reaches of {S}.",
        "The sailor {sailor} drowned in {S} in {year}.",
        "{P} banks are lined with {plant} and {good} mills.",
        "The song {song} describes a great flood on {S}.",
        "{S} runs for {num} leagues through the valley below {town}.",
        "{S} marked the border agreed in the treaty of {treaty}.",
    )),
    KindSpec("mountain", "place", 0.05, ("peak", "summit"), "{n}",
        "{adj} mountain on the island of {island}, rising above the town of {town}", PLACE_ADJ, (
        "{S} was first climbed by the scholar {scholar} in {year}.",
        "The {bird} nests on the cliffs of {S}.",
        "{P} summit holds a {color} lake visited by pilgrims.",
        "The river {river} rises on the slopes of {S}.",
        "The painting {painting} shows {S} under snow.",
        "Miners of the {guild} guild dug {good} from {P} western face.",
        "A shrine to {ruler} was raised on {S} after the battle of {battle}.",
    )),
    KindSpec("island", "place", 0.05, ("isle", "landmass"), "{n}",
        "{adj} island whose chief town is {town}", PLACE_ADJ, (
        "{S} was claimed by {ruler} in {year}.",
        "The sailor {sailor} charted the reefs around {S}.",
        "{S} exports {good} and {good2} to the mainland.",
        "The {fish} is found only in the lagoons of {S}.",
        "The treaty of {treaty} gave {S} to the house of {ruler2}.",
        "The mountain {mountain} dominates the north of {S}.",
        "The novel {novel} is set on {S}.",
    )),
    KindSpec("sailor", "person", 0.06, ("mariner", "seafarer"), "{n}",
        "{adj} sailor from {town} who captained the {ship}", PERSON_ADJ, (
        "{S} sailed from {town2} to {island} in {year}.",
        "{S} was shipwrecked off {island2} and survived on {good} for {small} weeks.",
        "{P} logbooks were later edited by the scholar {scholar}.",
        "The song {song} tells of {P} last voyage.",
        "{S} fought in the battle of {battle} under {ruler}.",
        "{S} was a member of the {guild} guild.",
        "{S} died in {year} and was buried at {town3}.",
    )),
    KindSpec("poet", "person", 0.06, ("versifier", "writer"), "{n}",
        "{adj} poet from {town} who wrote the novel {novel}", PERSON_ADJ, (
        "{S} was born in {town2} in {year}.",
        "{P} early verses praise the river {river}.",
        "{S} wrote the words of the song {song}.",
        "{S} was exiled to {island} by {ruler}.",
        "{S} won the laurel at the {festival} festival in {year}.",
        "A portrait of {S} hangs beside the painting {painting}.",
        "{S} exchanged letters with the scholar {scholar} about {topic}.",
    )),
    KindSpec("ruler", "person", 0.06, ("monarch", "sovereign"), "{n}",
        "{adj} ruler of {island} who reigned from {town}", PERSON_ADJ, (
        "{S} came to the throne in {year} after the death of {ruler2}.",
        "{S} signed the treaty of {treaty}.",
        "{S} won the battle of {battle} against {ruler3}.",
        "{S} founded the {guild} guild.",
        "{S} ordered the building of the ship {ship}.",
        "{S} was praised by the poet {poet}.",
        "{S} died at {town2} in {year}.",
    )),
    KindSpec("scholar", "person", 0.06, ("thinker", "savant"), "{n}",
        "{adj} scholar from {town} known for work on {topic}", PERSON_ADJ, (
        "{S} studied {topic2} under {scholar2}.",
        "{S} catalogued the {bird} and the {plant}.",
        "{S} taught at the {guild} guild in {town2}.",
        "{S} advised {ruler} on {topic3}.",
        "{P} treatise on {topic} was printed in {year}.",
        "{S} sailed aboard the {ship} to {island}.",
        "{S} died in {year} at {town3}.",
    )),
    KindSpec("ship", "vessel", 0.06, ("vessel", "craft"), "the {n}",
        "{adj} ship built at {town} for {ruler}", PLACE_ADJ, (
        "{S} was launched in {year}.",
        "{S} was commanded by {sailor} on a voyage to {island}.",
        "{S} carried {good} and {good2} between {town2} and {town3}.",
        "{S} was sunk at the battle of {battle}.",
        "The painting {painting} shows {S} in a storm.",
        "{S} carried {num} cannons and a figurehead shaped like the {bird}.",
        "{S} was owned by the {guild} guild.",
    )),
    KindSpec("song", "work", 0.06, ("tune", "piece"), "{n}",
        "{adj} song composed by {poet} about the river {river}", WORK_ADJ, (
        "{S} was first sung at the {festival} festival in {year}.",
        "{S} is played on the {instr} and the {instr2}.",
        "{S} tells of the sailor {sailor} and the ship {ship}.",
        "{S} was banned by {ruler} in {year}.",
        "{S} is sung by the {guild} guild at funerals.",
        "A verse of {S} mentions the {bird}.",
        "{S} has {small} verses and a refrain about {good}.",
    )),
    KindSpec("novel", "work", 0.05, ("book", "story"), "{n}",
        "{adj} novel by {poet} set on the island of {island}", WORK_ADJ, (
        "{S} was published in {year} in {town}.",
        "The hero of {S} is a sailor modelled on {sailor}.",
        "{S} describes the battle of {battle}.",
        "{S} was praised by the scholar {scholar}.",
        "{S} was adapted into the song {song}.",
        "{S} has {num} chapters and a map of {island2}.",
        "{S} was banned by the {guild} guild.",
    )),
    KindSpec("painting", "work", 0.05, ("canvas", "picture"), "{n}",
        "{adj} painting by {poet} showing the mountain {mountain}", WORK_ADJ, (
        "{S} was painted in {year} in {town}.",
        "{S} hangs in the hall of the {guild} guild.",
        "{S} uses {color} and {color2} pigments made from {good}.",
        "{S} was commissioned by {ruler}.",
        "The {bird} perches in the corner of {S}.",
        "{S} was carried aboard the ship {ship} to {island}.",
        "{S} measures {num} hands across.",
    )),
    KindSpec("bird", "species", 0.05, ("creature", "animal"), "the {n}",
        "{adj} bird that nests on the cliffs of {island}", LIFE_ADJ, (
        "{S} was first described by {scholar} in {year}.",
        "{S} has {color} wings and a {color2} beak.",
        "{S} feeds on the {fish}.",
        "{S} winters along the river {river}.",
        "{S} appears on the banner of {ruler}.",
        "The song {song} imitates the call of {S}.",
        "{S} lays {small} eggs in nests of {good}.",
    )),
    KindSpec("fish", "species", 0.04, ("creature", "animal"), "the {n}",
        "{adj} fish found in the river {river}", LIFE_ADJ, (
        "{S} was first described by {scholar} in {year}.",
        "{S} has {color} scales and grows to {small} spans.",
        "{S} is salted and sold at the market of {town}.",
        "{S} is hunted by the {bird}.",
        "Fishermen of the {guild} guild catch {S} with nets of {good}.",
        "{S} spawns among the roots of the {plant}.",
        "The {festival} festival honours {S}.",
    )),
    KindSpec("plant", "species", 0.05, ("species", "herb"), "{n}",
        "{adj} plant that grows on the slopes of {mountain}", LIFE_ADJ, (
        "{S} was first described by {scholar} in {year}.",
        "{S} has {color} flowers and bitter leaves.",
        "Healers in {town} brew {S} into a tea against fever.",
        "{S} is woven into garlands at the {festival} festival.",
        "Dye made from {S} colours the robes of the {guild} guild.",
        "{S} was carried to {island} by the sailor {sailor}.",
        "{S} appears in the painting {painting}.",
    )),
    KindSpec("battle", "event", 0.04, ("engagement", "clash"), "the battle of {n}",
        "{adj} battle fought near {town} in {year}", EVENT_ADJ, (
        "{S} was fought between {ruler} and {ruler2}.",
        "The ship {ship} was sunk during {S}.",
        "The sailor {sailor} lost an arm in {S}.",
        "{S} ended with the treaty of {treaty}.",
        "{S} is the subject of the painting {painting}.",
        "{S} cost {num} lives on the banks of the river {river}.",
    )),
    KindSpec("festival", "event", 0.03, ("celebration", "feast"), "the {n} festival",
        "{adj} festival held each spring in {town} in honour of {ruler}", EVENT_ADJ, (
        "{S} was first held in {year}.",
        "During {S} the people of {town} float lanterns down the river {river}.",
        "{S} is organised by the {guild} guild.",
        "The song {song} is sung on the last night of {S}.",
        "Garlands of {plant} are worn at {S}.",
        "{S} was suspended after the battle of {battle}.",
        "{S} lasts {small} days and ends with a feast of {fish}.",
    )),
    KindSpec("treaty", "event", 0.02, ("accord", "agreement"), "the treaty of {n}",
        "{adj} treaty signed at {town} in {year} between {ruler} and {ruler2}", EVENT_ADJ, (
        "{S} ended the war that began with the battle of {battle}.",
        "{S} gave the island of {island} to {ruler3}.",
        "{S} was drafted by the scholar {scholar}.",
        "{S} fixed the border along the river {river}.",
        "{S} granted the {guild} guild a monopoly on {good}.",
        "The original copy of {S} was lost when the ship {ship} sank.",
        "{S} contains {num} clauses written in {color} ink.",
    )),
    KindSpec("guild", "organisation", 0.03, ("society", "fellowship"), "the {n} guild",
        "{adj} guild of {trade} based in {town}", PLACE_ADJ, (
        "{S} was founded in {year} by {ruler}.",
        "{S} built the ship {ship}.",
        "{S} controls the trade in {good} on {island}.",
        "The scholar {scholar} was master of {S}.",
        "{S} sponsors the {festival} festival.",
        "{S} was dissolved by {ruler2} and restored in {year}.",
        "The members of {S} wear {color} hoods.",
    )),
]
# fmt: on

KINDS: tuple[KindSpec, ...] = tuple(_K)
KIND_NAMES: tuple[str, ...] = tuple(k.name for k in KINDS)
KIND_INDEX: dict[str, int] = {k.name: i for i, k in enumerate(KINDS)}

# Facts any popular article may carry; they create in-links to works and people.
GENERAL_FACTS: tuple[str, ...] = (
    "{S} is mentioned in the novel {novel}.",
    "The poet {poet} wrote an ode to {S}.",
    "The scholar {scholar} wrote a history of {S}.",
    "A street in {town} is named after {S}.",
    "{S} appears in the painting {painting}.",
)
NAMED_AFTER = "{S} takes its name from the {nkind} {namesake}."

# fmt: off
VALUES: dict[str, tuple[str, ...]] = {
    "good": (
        "amber", "salt", "copper", "barley", "indigo", "tin", "wool", "pearls", "cedar",
        "honey", "flax", "saffron", "slate", "resin", "kelp"
    ),
    "color": ("grey", "crimson", "ochre", "pale blue", "green", "black", "silver",
              "russet", "white", "violet"),
    "topic": ("tides", "eclipses", "grammar", "salt marshes", "star charts", "old law",
              "bird migration", "bell casting", "medicine", "number puzzles", "glass"),
    "instr": ("harp", "drum", "reed pipe", "fiddle", "bells", "horn", "lute"),
    "trade": ("salt merchants", "shipwrights", "bell founders", "mapmakers", "weavers",
              "lamp makers", "dyers", "ropemakers"),
}
# fmt: on

ERAS: tuple[tuple[str, int, int], ...] = (
    ("Early Lantern Age", 212, 499),
    ("High Lantern Age", 500, 811),
    ("Reed Kingdoms", 812, 1104),
    ("Late Reckoning", 1105, 1398),
)
