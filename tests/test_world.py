"""The invented world's names are not words or names in common use.

Outside reference: the word lists of the ``wordfreq`` package (Speer et al., "wordfreq",
https://github.com/rspeer/wordfreq, v3.1.1), 'large' lists, which merge Wikipedia, subtitles,
news, books, web text and social media per language. Threshold: a Zipf frequency of 1.0 (once in
about 100 million words, the floor of those lists), so any listed word counts as in use.
"""

import pytest
from wordfreq import word_frequency

from toy_corpus.world import build_world

LANGUAGES = ["en", "de", "fr", "es", "it", "nl", "sv", "fi", "pl"]
FLOOR = 1e-8  # Zipf 1.0 = 10 ** (1.0 - 9) as a share of all words


def world_names(world) -> dict[str, list[str]]:
    return {
        "isle": world.isles,
        "light": list(world.lighthouses.values()),
        "keeper": world.keepers,
        "ship": world.ships,
        "label": world.labels,
    }


@pytest.mark.parametrize("seed", [1234, 0, 1, 7, 99])
def test_no_name_is_a_word_in_use_in_nine_languages(seed):
    world = build_world(seed, 20, 30, 120, 64)  # the default data config's world (conf/data/toy.yaml)
    found = [
        (kind, name, lang)
        for kind, names in world_names(world).items()
        for name in names
        for lang in LANGUAGES
        if word_frequency(name, lang, wordlist="large") >= FLOOR
    ]
    assert found == []


def test_names_known_to_be_in_use_are_caught():
    # Names the syllable generator did draw for seed 1234 before the filter (a Spanish word, a
    # Swedish/English name, a German word); the check above must be able to see them.
    for name, lang in (("Sido", "es"), ("Piper", "en"), ("Limes", "de")):
        assert word_frequency(name, lang, wordlist="large") >= FLOOR
