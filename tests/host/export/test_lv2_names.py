"""Names that reach C and Turtle: slugs, port symbols, escaped strings, units.

LV2 core (lv2core.ttl, lv2:symbol): "a valid C identifier", i.e.
``[_a-zA-Z][_a-zA-Z0-9]*``, unique among a plugin's ports.  Turtle string
escapes: W3C RDF 1.1 Turtle §6.4 (ECHAR, UCHAR).
"""

from __future__ import annotations

import re

import pytest

from sheafsynth.engine.backends.lv2.names import lv2_unit, plugin_uri, port_symbols, slug, turtle_string
from sheafsynth.engine.errors import BuildError

C_IDENTIFIER = re.compile(r"^[_a-zA-Z][_a-zA-Z0-9]*$")     # LV2 core, lv2:symbol


def test_port_symbols_are_unique_c_identifiers_and_never_the_fixed_ports():
    names = ["9 lives", "out", "midi_in", "a-b", "a_b", "a b", "", "é", "x" * 200, "tone"]
    symbols = port_symbols(names)
    assert len(symbols) == len(names) == len(set(symbols))
    assert not {"out", "midi_in"} & set(symbols)
    for s in symbols:
        assert C_IDENTIFIER.match(s) and len(s) <= 64
    assert symbols[-1] == "tone"                         # a plain name is kept as it is


def test_slugs_and_uris_hold_only_safe_characters():
    assert slug('Quote "q" back\\slash') == "quote-q-back-slash"
    assert plugin_uri(slug("Porch Pluck!")) == "urn:sheafsynth:lv2:porch-pluck"
    for bad in ("", "***", "é"):
        with pytest.raises(BuildError):
            slug(bad)
    with pytest.raises(BuildError):
        plugin_uri('x" ; a <y')


def test_turtle_strings_escape_what_the_grammar_requires():
    # Turtle §6.4: \" \\ \n \r \t as ECHAR; other control characters as \uXXXX (UCHAR)
    assert turtle_string('a"b\\c\nd\re\tf') == '"a\\"b\\\\c\\nd\\re\\tf"'
    assert turtle_string("\x01\x7f") == '"\\u0001\\u007F"'
    assert turtle_string("\ud800") == '"\\uFFFD"'            # a lone surrogate has no UTF-8 form
    assert turtle_string("é ok") == '"é ok"'


def test_units_map_to_the_lv2_units_vocabulary():
    # LV2 units extension (units.ttl): units:hz, units:ms, units:db, units:semitone12TET
    assert lv2_unit("Hz") == "hz" and lv2_unit("ms") == "ms" and lv2_unit("dB") == "db"
    assert lv2_unit("semitones") == "semitone12TET"
    assert lv2_unit("gain per pass") is None
