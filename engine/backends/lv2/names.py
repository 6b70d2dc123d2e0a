"""Names that reach C and Turtle: plugin URI, slug, port symbols, escaped strings.

Nothing a preset says is copied into C or TTL as it stands.  The plugin URI
is a fixed project base plus a slug made of ``[a-z0-9-]`` only; port symbols
are C identifiers made from the parameter names and checked against
``SYMBOL_RE``; labels (free text) enter Turtle only through
:func:`turtle_string`, which escapes them per the Turtle grammar
(W3C RDF 1.1 Turtle, §6.4 escape sequences); units map to the LV2 units
vocabulary where the preset's unit is one it knows.
"""

from __future__ import annotations

import re

from sheafsynth.engine.errors import BuildError

__all__ = ["URI_BASE", "SLUG_RE", "SYMBOL_RE", "RESERVED_SYMBOLS", "slug", "plugin_uri", "port_symbols",
           "turtle_string", "lv2_unit"]

#: Every exported plugin's URI starts with this (a URN: no web address is claimed).
URI_BASE = "urn:sheafsynth:lv2:"

SLUG_RE = re.compile(r"^[a-z0-9](?:[a-z0-9-]{0,62}[a-z0-9])?$")
SYMBOL_RE = re.compile(r"^[A-Za-z_][A-Za-z0-9_]{0,63}$")

#: Symbols of the fixed ports; a parameter never takes one of these.
RESERVED_SYMBOLS = ("midi_in", "out")

#: Preset unit text (lower case) -> LV2 units vocabulary term (http://lv2plug.in/ns/extensions/units#).
_UNITS = {"hz": "hz", "khz": "khz", "s": "s", "ms": "ms", "db": "db", "%": "pc", "percent": "pc",
          "semitones": "semitone12TET", "semitone": "semitone12TET", "cents": "cent", "cent": "cent",
          "bpm": "bpm", "m": "m", "cm": "cm", "mm": "mm"}


def slug(name: str) -> str:
    """A bundle and URI slug for a preset name: lower-case letters, digits and '-'.

    Raises BuildError when nothing usable is left (the name has no letter
    or digit).
    """
    s = re.sub(r"[^a-z0-9]+", "-", str(name).lower()).strip("-")[:64].strip("-")
    if not SLUG_RE.match(s):
        raise BuildError(f"preset name {name!r} gives no plugin name (it needs a letter or a digit)")
    return s


def plugin_uri(slug_text: str) -> str:
    """The plugin URI for a slug (checked again here: this text reaches C and TTL)."""
    if not SLUG_RE.match(slug_text):
        raise BuildError(f"{slug_text!r} is not a valid plugin slug")
    return URI_BASE + slug_text


def port_symbols(names: list[str]) -> list[str]:
    """One LV2 port symbol (a C identifier) per parameter name, unique, never a reserved one."""
    out: list[str] = []
    taken = set(RESERVED_SYMBOLS)
    for i, name in enumerate(names):
        base = re.sub(r"[^A-Za-z0-9_]+", "_", str(name)).strip("_")[:48] or f"param{i}"
        if base[0].isdigit():
            base = "p_" + base
        sym, k = base, 2
        while sym in taken:
            sym, k = f"{base}_{k}", k + 1
        if not SYMBOL_RE.match(sym):
            raise BuildError(f"could not make a port symbol for parameter {i}")
        taken.add(sym)
        out.append(sym)
    return out


def turtle_string(text: str) -> str:
    """``text`` as a Turtle string literal in double quotes, escaped (Turtle §6.4, ECHAR and UCHAR)."""
    parts = ['"']
    for ch in str(text):
        if ch == "\\":
            parts.append("\\\\")
        elif ch == '"':
            parts.append('\\"')
        elif ch == "\n":
            parts.append("\\n")
        elif ch == "\r":
            parts.append("\\r")
        elif ch == "\t":
            parts.append("\\t")
        elif 0xD800 <= ord(ch) <= 0xDFFF:       # a lone surrogate has no UTF-8 form
            parts.append("\\uFFFD")
        elif ord(ch) < 0x20 or ord(ch) == 0x7F:
            parts.append(f"\\u{ord(ch):04X}")
        else:
            parts.append(ch)
    parts.append('"')
    return "".join(parts)


def lv2_unit(unit: str) -> str | None:
    """The LV2 units term for a preset unit, or None when the vocabulary has none."""
    return _UNITS.get(str(unit).strip().lower())
