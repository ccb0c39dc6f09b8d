"""Text that draws and prints as it is, whatever a user put in it.

A column name, a label or a file name can hold control characters (which drive a
terminal: colours, cursor moves, reversed text) and ``$`` or TeX specials (which
matplotlib would read as mathematics). :func:`printable` writes the first as escapes for
the console and the report; :func:`literal` and :data:`LITERAL_RC` make matplotlib draw
the text exactly as given. The report, the command line and the figures of the variance
partition, the sensitivity check, the design check and the occasion effects all use them.
"""

from __future__ import annotations

import re

__all__ = ["printable", "literal", "LITERAL_RC"]

_UNPRINTABLE = re.compile("[\x00-\x08\x0b-\x1f\x7f-\x9f\u061c\u200b-\u200f\u2028-\u202e"
                          "\u2060-\u2069\ufeff]")


def printable(text) -> str:
    """``text`` with control and direction-changing characters written as escapes
    (``\\x1b``), so a column name or a label cannot drive the terminal (colours, cursor
    moves, reversed text); line breaks and tabs stay."""
    return _UNPRINTABLE.sub(lambda m: m.group().encode("unicode_escape").decode("ascii"),
                            str(text))


#: settings under which :func:`literal` text is drawn as it is: no TeX (whose special
#: characters ``_ % & #`` would break), and mathtext only between unescaped ``$``
LITERAL_RC = {"text.usetex": False, "text.parse_math": True}


def literal(text) -> str:
    """``text`` as a string matplotlib draws literally.

    With mathtext on (matplotlib's default, and :data:`LITERAL_RC`), a string with an
    even number of unescaped ``$`` is parsed as mathematics; with every ``$`` escaped
    there is none, and matplotlib turns each ``\\$`` back into ``$`` when it draws the
    text, so any string, backslashes included, comes out exactly as given. Figures made
    by the package are built under :data:`LITERAL_RC` (usetex off), so TeX never sees
    the text either. Control characters, which no font draws, are written as escapes
    (``\\x1b``), as on the console.
    """
    return printable(text).replace("$", r"\$")
