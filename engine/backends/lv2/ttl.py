"""The bundle's Turtle files: manifest.ttl and the plugin description.

Every word that reaches these files is either fixed text, a number printed
by Python, a URI or symbol checked in engine.backends.lv2.names, or a
label escaped by ``names.turtle_string``.  Port indices match
csrc/lv2/ss_lv2.c: 0 MIDI in (atom sequence of midi:MidiEvent), 1 mono audio
out, then one control input per parameter.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from sheafsynth.engine.backends.lv2.names import SYMBOL_RE, lv2_unit, plugin_uri, turtle_string
from sheafsynth.engine.errors import BuildError

__all__ = ["PortSpec", "manifest_ttl", "plugin_ttl", "PREFIXES"]

PREFIXES = """@prefix atom: <http://lv2plug.in/ns/ext/atom#> .
@prefix doap: <http://usefulinc.com/ns/doap#> .
@prefix lv2: <http://lv2plug.in/ns/lv2core#> .
@prefix midi: <http://lv2plug.in/ns/ext/midi#> .
@prefix rdfs: <http://www.w3.org/2000/01/rdf-schema#> .
@prefix state: <http://lv2plug.in/ns/ext/state#> .
@prefix units: <http://lv2plug.in/ns/extensions/units#> .
@prefix urid: <http://lv2plug.in/ns/ext/urid#> .
"""


@dataclass(frozen=True)
class PortSpec:
    """One control port: symbol (checked), label (free text), range and default in ``unit``."""

    symbol: str
    label: str
    lo: float
    hi: float
    default: float
    unit: str


def _number(x: float) -> str:
    x = float(x)
    if not math.isfinite(x):
        raise BuildError(f"refusing to print a non-finite number ({x!r}) into a plugin description")
    s = repr(x)
    return s if ("e" in s or "." in s) else s + ".0"


def manifest_ttl(slug_text: str) -> str:
    """manifest.ttl: the plugin's URI, its binary ``<slug>.so`` and its description ``<slug>.ttl``."""
    uri = plugin_uri(slug_text)
    binary = slug_text + ".so"
    return (PREFIXES + "\n"
            f"<{uri}>\n"
            "    a lv2:Plugin , lv2:InstrumentPlugin ;\n"
            f"    lv2:binary <{binary}> ;\n"
            f"    rdfs:seeAlso <{slug_text}.ttl> .\n")


def plugin_ttl(slug_text: str, name: str, ports: list[PortSpec]) -> str:
    """The plugin description: name, features, ports with ranges, defaults and units; state keys."""
    uri = plugin_uri(slug_text)
    lines = [PREFIXES, f"<{uri}>",
             "    a lv2:Plugin , lv2:InstrumentPlugin ;",
             f"    doap:name {turtle_string('sheafsynth ' + name)} ;",
             "    lv2:requiredFeature urid:map ;",
             "    lv2:optionalFeature lv2:hardRTCapable ;",
             "    lv2:extensionData state:interface ;",
             "    lv2:port [",
             "        a lv2:InputPort , atom:AtomPort ;",
             "        atom:bufferType atom:Sequence ;",
             "        atom:supports midi:MidiEvent ;",
             "        lv2:designation lv2:control ;",
             "        lv2:index 0 ;",
             '        lv2:symbol "midi_in" ;',
             '        lv2:name "MIDI in"',
             "    ] , [",
             "        a lv2:OutputPort , lv2:AudioPort ;",
             "        lv2:index 1 ;",
             '        lv2:symbol "out" ;',
             '        lv2:name "Out"',
             "    ]"]
    for i, p in enumerate(ports):
        if not SYMBOL_RE.match(p.symbol):
            raise BuildError(f"port symbol {p.symbol!r} is not a C identifier")
        if not p.lo <= p.default <= p.hi:
            raise BuildError(f"port {p.symbol}: default {p.default:g} is outside [{p.lo:g}, {p.hi:g}]")
        unit = lv2_unit(p.unit)
        lines[-1] += " , ["
        lines += ["        a lv2:InputPort , lv2:ControlPort ;",
                  f"        lv2:index {i + 2} ;",
                  f'        lv2:symbol "{p.symbol}" ;',
                  f"        lv2:name {turtle_string(p.label)} ;",
                  f"        lv2:default {_number(p.default)} ;",
                  f"        lv2:minimum {_number(p.lo)} ;",
                  f"        lv2:maximum {_number(p.hi)} ;"]
        if unit is not None:
            lines.append(f"        units:unit units:{unit}")
        elif p.unit.strip():
            lines += ["        units:unit [",
                      "            a units:Unit ;",
                      f"            rdfs:label {turtle_string(p.unit)} ;",
                      f"            units:symbol {turtle_string(p.unit)} ;",
                      f"            units:render {turtle_string('%f ' + p.unit.replace('%', '%%'))}",
                      "        ]"]
        else:
            lines[-1] = lines[-1].removesuffix(" ;")
        lines.append("    ]")
    lines[-1] += " ."
    return "\n".join(lines) + "\n"
