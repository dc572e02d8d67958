"""Names that come from the data (feature, target and time columns): the one rule for the
characters they may hold, and the renderers that keep every other name safe where it is shown.

The rule (:func:`name_refusal`, applied where the trainer reads or chooses its columns):
a name may not hold a character of Unicode category Cc (controls: ESC, BEL, newline …),
Cf (invisible format characters: the bidirectional embeddings, overrides and isolates
U+202A–U+202E and U+2066–U+2069, the marks U+200E, U+200F and U+061C, zero-width space and
joiners, a byte order mark inside a name), Cs (lone surrogates), Zl or Zp (line and paragraph
separators). Such a character is invisible or moves the text around it, so the name a person
reads is not the name the model uses. Everything else is allowed — any printable Unicode, ``$``,
``=``, quotes, markup — and is made harmless where it is shown:

* terminal: :func:`visible` writes each refused character as an escape (``\\x1b``,
  ``\\u202e``), so no escape sequence reaches a terminal and nothing is hidden;
* CSV: :func:`csv_cell` neutralises a text cell a spreadsheet would run as a formula;
* plots: :func:`plot_label` keeps matplotlib from reading ``$…$`` as mathtext;
* HTML: :func:`html_name` isolates the name's direction in ``<bdi>``, escaped.

Models published before the rule held may carry such names; they load and serve unchanged,
and the renderers show their names safely all the same.
"""

from __future__ import annotations

import unicodedata
from collections.abc import Sequence

from markupsafe import Markup, escape

#: Unicode general categories a data name may not hold.
REFUSED_CATEGORIES = frozenset({"Cc", "Cf", "Cs", "Zl", "Zp"})
#: The bidirectional controls (all of category Cf), named so that a refusal says what they do.
BIDI_CONTROLS = frozenset(
    [chr(c) for c in range(0x202A, 0x202F)] + [chr(c) for c in range(0x2066, 0x206A)]
    + ["\u200e", "\u200f", "\u061c"])
#: First characters that make a spreadsheet read a cell as a formula (OWASP, "CSV Injection":
#: equals, plus, minus, at, tab, carriage return).
FORMULA_LEADS = ("=", "+", "-", "@", "\t", "\r")


def is_refused(ch: str) -> bool:
    """Whether one character is barred from data names (see the module's rule)."""
    return unicodedata.category(ch) in REFUSED_CATEGORIES


def escape_char(ch: str) -> str:
    """``\\x1b``, ``\\u202e`` or ``\\U000e0001``: a character written as visible ASCII."""
    code = ord(ch)
    if code < 0x100:
        return f"\\x{code:02x}"
    return f"\\u{code:04x}" if code < 0x10000 else f"\\U{code:08x}"


def visible(text: str) -> str:
    """``text`` with every refused character escaped: safe to print on a terminal."""
    if not any(is_refused(ch) for ch in text):
        return text
    return "".join(escape_char(ch) if is_refused(ch) else ch for ch in text)


def describe(ch: str) -> str:
    """``U+202E RIGHT-TO-LEFT OVERRIDE, a bidirectional control``."""
    name = unicodedata.name(ch, "")
    kind = ("a bidirectional control" if ch in BIDI_CONTROLS
            else "a control character" if unicodedata.category(ch) == "Cc"
            else "a line or paragraph separator" if unicodedata.category(ch) in ("Zl", "Zp")
            else "an invisible format character")
    return f"U+{ord(ch):04X}{' ' + name if name else ''}, {kind}"


def name_refusal(names: Sequence[str], header: Sequence[str]) -> str | None:
    """The one-line refusal of the first name in ``names`` that breaks the rule, else None.

    The message gives the column's position in ``header`` (1-based) and the name in its
    :func:`visible` form; the caller adds where the file is.
    """
    for name in names:
        bad = next((ch for ch in name if is_refused(ch)), None)
        if bad is None:
            continue
        where = f"column {header.index(name) + 1}" if name in header else "column"
        return (f"{where} \"{visible(name)}\": its name holds {describe(bad)}; names may not "
                "hold control, bidirectional or invisible format characters: rename the "
                "column")
    return None


def csv_cell(text: str) -> str:
    """A text cell a spreadsheet shows as text: a cell starting with ``= + - @``, tab or
    carriage return gets a leading single quote, as the OWASP "CSV Injection" page
    recommends; refused characters are escaped (:func:`visible`), since the file may be
    standard output. For text cells only (headers, names): numbers stay numbers."""
    lead = text.startswith(FORMULA_LEADS)
    text = visible(text)
    return "'" + text if lead else text


def plot_label(text: str) -> str:
    """A matplotlib label that shows ``text`` literally: each ``$`` escaped as ``\\$``.

    matplotlib parses a text with an even number of unescaped ``$`` as mathtext; a text
    that is not mathtext has each ``\\$`` shown as ``$`` (matplotlib 3.11,
    ``Text._preprocess_math`` and ``cbook.is_math_text``), so the escaped label renders
    exactly as the name, including a backslash of its own before a ``$``.
    """
    return visible(text).replace("$", "\\$")


def html_name(text: str) -> Markup:
    """The name escaped inside ``<bdi>``, so right-to-left text in it cannot reorder the
    figures beside it (HTML's bidirectional isolate element)."""
    return Markup("<bdi>%s</bdi>") % escape(text)
