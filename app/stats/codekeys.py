"""The matching key of a reason code, in plain Python (no numpy or pandas: the quick fit path reads it)."""

from __future__ import annotations

import re
import unicodedata

__all__ = ["code_key"]

# Dash and quote look-alikes that spreadsheets substitute as one types ("auto-correct"); folded to ASCII.
_CODE_FOLD = str.maketrans({**dict.fromkeys("\u2010\u2011\u2012\u2013\u2014\u2015\u2212\ufe58\ufe63\uff0d", "-"),
                            **dict.fromkeys("\u2018\u2019\u201a\u201b\u2032\u0060\u00b4\"\u201c\u201d\u201e\u201f\u2033",
                                            "'")})
_SPACES = re.compile(r"\s+")


def code_key(code: str) -> str:
    """The matching key of a reason code: codes differing only in case, surrounding or repeated spaces,
    or dash and quote variants share one key ("RETIRED", "retired ", "Retired" -> "retired")."""
    folded = unicodedata.normalize("NFKC", str(code)).translate(_CODE_FOLD)
    return _SPACES.sub(" ", folded).strip().casefold()
