"""The invented archipelago: names built from syllables, and the word lists of the logbooks.

Everything here is a pure function of the data seed. Names are made by joining syllables drawn
by a seeded generator; isles come in pairs of look-alike names (same first syllable, different
ending) so that near-miss distractors exist. A drawn name that is a word or name in use in any of
:data:`NAME_LANGUAGES` (listed by the wordfreq library's large word lists at a frequency of at
least :data:`COMMON_ZIPF` on the Zipf scale) is thrown away and drawn again, so the world's names
are its own.
"""

from __future__ import annotations

import functools
import random
from dataclasses import dataclass, field

from wordfreq import zipf_frequency

# Languages whose words and names the invented names must avoid, and the frequency (Zipf scale:
# log10 of occurrences per billion words) from which a word counts as in use. 1.0 is the floor of
# wordfreq's large lists (about once in 100 million words): any word they list is rejected.
NAME_LANGUAGES = ("en", "de", "fr", "es", "it", "nl", "sv", "fi", "pl")
COMMON_ZIPF = 1.0

ONSETS = [
    "b",
    "d",
    "f",
    "g",
    "h",
    "k",
    "l",
    "m",
    "n",
    "p",
    "r",
    "s",
    "t",
    "v",
    "z",
    "br",
    "dr",
    "gr",
    "kr",
    "st",
    "th",
    "sk",
]
VOWELS = ["a", "e", "i", "o", "u", "ae", "ou"]
CODAS = ["", "", "", "n", "r", "l", "s", "th", "m"]

# Domain words of the logbooks, most common first inside each list (order sets the Zipf rank).
WEATHER_WIND = ["north", "west", "south", "east", "northwest", "southwest", "northeast", "southeast"]
WEATHER_STRENGTH = ["light", "fresh", "strong", "calm", "gusting", "steady", "rising", "falling", "gale"]
WEATHER_SKY = [
    "grey",
    "clear",
    "overcast",
    "fog",
    "rain",
    "drizzle",
    "haze",
    "squalls",
    "sleet",
    "snow",
    "starlit",
]
SEA_STATE = ["moderate", "slight", "rough", "smooth", "heavy", "choppy", "swelling", "glassy"]
SHIP_KIND = ["schooner", "sloop", "cutter", "brig", "ketch", "steamer", "trawler", "barque", "lugger", "yawl"]
SHIP_ACTION = [
    "passed",
    "anchored",
    "signalled",
    "tacked",
    "sheltered",
    "ran",
    "hove",
    "drifted",
    "called",
    "waited",
]
BEARING = [
    "inshore",
    "offshore",
    "to windward",
    "to leeward",
    "off the point",
    "in the sound",
    "by the reef",
    "near the bar",
]
REPAIR_PART = [
    "lamp",
    "wick",
    "lens",
    "shutter",
    "stair",
    "door",
    "roof",
    "bell",
    "horn",
    "chimney",
    "railing",
    "cistern",
    "window",
    "clock",
    "flag mast",
]
REPAIR_ACT = [
    "mended",
    "cleaned",
    "oiled",
    "painted",
    "checked",
    "replaced",
    "scraped",
    "tightened",
    "polished",
    "tarred",
]
MATERIAL = ["rope", "tar", "brass", "pitch", "canvas", "nails", "lead", "putty", "wire", "oak"]
GOODS = [
    "oil",
    "bread",
    "coal",
    "water",
    "salt",
    "flour",
    "candles",
    "wicks",
    "tea",
    "potatoes",
    "fish",
    "letters",
    "tobacco",
    "rope",
    "glass",
]
UNITS = ["casks", "sacks", "crates", "barrels", "bundles", "tins", "boxes"]
COUNT_WORDS = ["two", "three", "four", "five", "six", "seven", "eight", "nine", "ten", "twelve"]
TIMES = ["dawn", "noon", "dusk", "midnight", "first light", "the morning watch", "the evening watch"]
MOOD = [
    "all well",
    "nothing to report",
    "quiet night",
    "lamp burning clear",
    "glass steady",
    "keeper weary",
    "gulls loud",
    "ice on the gallery",
]

FUNCTION_WORDS = ["the", "of", "and", "at", "to", "from", "with", "on", "in", "by"]
# Attributes that the fact-recall entries give a numeric code to.
FACT_ATTRIBUTES = ["lamp", "bell", "horn", "flag"]
# Sightings: the class-deciding feature of classification reports (at least 16 needed).
SIGHTINGS = [
    "gull",
    "seal",
    "whale",
    "tern",
    "otter",
    "heron",
    "puffin",
    "dolphin",
    "crab",
    "eel",
    "cormorant",
    "shark",
    "plover",
    "walrus",
    "kittiwake",
    "porpoise",
    "skua",
    "gannet",
    "petrel",
    "turtle",
]
# Noise features of a classification report: (feature word, its values).
REPORT_FEATURES = [
    ("sea", SEA_STATE),
    ("sky", WEATHER_SKY),
    ("wind", WEATHER_WIND),
    ("tide", ["high", "low", "ebbing", "flooding", "slack"]),
]


@functools.lru_cache(maxsize=None)
def is_common_word(name: str) -> bool:
    """True when ``name`` is a word or name in use in one of :data:`NAME_LANGUAGES`."""

    return any(zipf_frequency(name, lang, wordlist="large") >= COMMON_ZIPF for lang in NAME_LANGUAGES)


def _syllable(rng: random.Random, coda: bool) -> str:
    return rng.choice(ONSETS) + rng.choice(VOWELS) + (rng.choice(CODAS) if coda else "")


def _make_name(rng: random.Random, n_syllables: int) -> str:
    return "".join(_syllable(rng, coda=(i == n_syllables - 1)) for i in range(n_syllables))


@dataclass
class World:
    """Names of one archipelago. ``isle_sibling[name]`` is its look-alike isle."""

    isles: list[str]
    isle_sibling: dict[str, str]
    lighthouses: dict[str, str]
    keepers: list[str]
    ships: list[str]
    labels: list[str]
    filler_words: list[str] = field(default_factory=list)


@functools.lru_cache(maxsize=8)
def build_world(seed: int, n_isle_pairs: int, n_keepers: int, n_ships: int, n_labels: int) -> World:
    """Draw all names of the world from ``seed``. Every name is unique across categories.

    Isles come in ``n_isle_pairs`` pairs sharing their first syllable (e.g. ``Brelo``/``Bresk``).
    """
    rng = random.Random(f"world-{seed}")
    reserved = set(
        w
        for lst in (
            WEATHER_WIND,
            WEATHER_STRENGTH,
            WEATHER_SKY,
            SEA_STATE,
            SHIP_KIND,
            REPAIR_PART,
            MATERIAL,
            GOODS,
            UNITS,
            COUNT_WORDS,
            FACT_ATTRIBUTES,
            SIGHTINGS,
        )
        for w in lst
    )
    used: set[str] = set()

    def fresh(make) -> str:
        for _ in range(10_000):
            name = make()
            if name.lower() not in used and name.lower() not in reserved and not is_common_word(name):
                used.add(name.lower())
                return name
        raise RuntimeError("could not draw a fresh name; too many names requested for the syllable set")

    isles: list[str] = []
    sibling: dict[str, str] = {}
    first_syllables: set[str] = set()
    for _ in range(n_isle_pairs):
        for _ in range(10_000):
            head = _syllable(rng, coda=False)
            if head not in first_syllables:
                first_syllables.add(head)
                break
        a = fresh(lambda: (head + _syllable(rng, coda=True)).capitalize())  # noqa: B023 (called at once)
        b = fresh(lambda: (head + _syllable(rng, coda=True)).capitalize())  # noqa: B023 (called at once)
        isles += [a, b]
        sibling[a], sibling[b] = b, a
    lighthouses = {isle: fresh(lambda: _make_name(rng, 2).capitalize()) for isle in isles}
    keepers = [fresh(lambda: _make_name(rng, 2).capitalize()) for _ in range(n_keepers)]
    ships = [fresh(lambda: _make_name(rng, rng.choice([2, 3])).capitalize()) for _ in range(n_ships)]
    labels = [fresh(lambda: _make_name(rng, 2)) for _ in range(n_labels)]
    world = World(isles, sibling, lighthouses, keepers, ships, labels)
    world.filler_words = filler_lexicon(world)
    return world


def filler_lexicon(world: World) -> list[str]:
    """The words filler is drawn from, most common first (rank order for the Zipf weights)."""
    words: list[str] = []
    for lst in (
        WEATHER_WIND,
        WEATHER_STRENGTH,
        WEATHER_SKY,
        SEA_STATE,
        SHIP_KIND,
        SHIP_ACTION,
        REPAIR_PART,
        REPAIR_ACT,
        MATERIAL,
        GOODS,
        UNITS,
        COUNT_WORDS,
        FUNCTION_WORDS,
    ):
        words += [w for w in lst if " " not in w and w not in FACT_ATTRIBUTES]
    # interleave so that rank is not grouped by topic
    rng = random.Random("lexicon-order")
    rng.shuffle(words)
    seen: set[str] = set()
    out = [w for w in words if not (w in seen or seen.add(w))]
    # rarer tail: keeper and ship names
    return out + list(world.keepers) + list(world.ships[:40])


# Words the document templates write besides the lists above (kept here so the vocabulary check sees them).
TEMPLATE_WORDS = [
    "log",
    "of",
    "light",
    "on",
    "keeper",
    "codes",
    "check",
    "report",
    "sorting",
    "at",
    "bound",
    "for",
    "high",
    "low",
    "water",
    "the",
    "with",
    "landed",
    "from",
    "sea",
    "sky",
    "wind",
    "tide",
    ",",
    ".",
    "rough",
    "note",
    "fair",
    "copy",
    ":",
    "code",
]


def all_words(world: World) -> list[str]:
    """Every word the generated text can contain, except the digit strings."""
    lists = (
        WEATHER_WIND,
        WEATHER_STRENGTH,
        WEATHER_SKY,
        SEA_STATE,
        SHIP_KIND,
        SHIP_ACTION,
        BEARING,
        REPAIR_PART,
        REPAIR_ACT,
        MATERIAL,
        GOODS,
        UNITS,
        COUNT_WORDS,
        TIMES,
        MOOD,
        FACT_ATTRIBUTES,
        SIGHTINGS,
        TEMPLATE_WORDS,
        FUNCTION_WORDS,
    )
    words = [w for lst in lists for phrase in lst for w in phrase.split()]
    words += [v for _, values in REPORT_FEATURES for v in values]
    words += world.isles + list(world.lighthouses.values()) + world.keepers + world.ships + world.labels
    return sorted(set(words))
