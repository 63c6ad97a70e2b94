"""Tests of the shared text helpers: counted nouns and numbers without a negative zero."""

from __future__ import annotations

import pytest

from foretell.text import number, plural


@pytest.mark.parametrize("n,noun,expected", [
    (1, "context", "1 context"), (0, "context", "0 contexts"), (2, "participant", "2 participants"),
    (1, "missed guess", "1 missed guess"), (3, "missed guess", "3 missed guesses"),
    (2, "entry", "2 entries"), (2, "day", "2 days"), (2, "box", "2 boxes"),
])
def test_plural_follows_regular_english(n, noun, expected):
    # regular English plurals (-s, -es after a sibilant, -ies after consonant + y): from memory
    assert plural(n, noun) == expected


def test_plural_takes_an_irregular_form():
    assert plural(2, "datum", "data") == "2 data" and plural(1, "datum", "data") == "1 datum"


@pytest.mark.parametrize("value,spec,expected", [
    (-0.0, ".4f", "0.0000"), (-0.00001, ".2f", "0.00"), (-0.0, "g", "0"),
    (-0.5, ".2f", "-0.50"), (1.25, "g", "1.25"),
])
def test_number_never_prints_a_negative_zero(value, spec, expected):
    assert number(value, spec) == expected
