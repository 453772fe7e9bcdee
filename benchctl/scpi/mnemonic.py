"""Long and short forms of SCPI mnemonics.

A declared mnemonic such as ``VOLTage`` carries both forms in its capitalisation: the
short form is the upper-case part (``VOLT``), the long form is the whole word
(``VOLTAGE``). Matching is case-insensitive, and only exactly the short or the long form
matches: ``VOLTA`` is neither.
"""

from __future__ import annotations

import re
from functools import lru_cache

# IEEE 488.2-1992 §7.6.1.2 (from memory): a program mnemonic is an upper/lower-case
# alpha followed by up to 11 more alpha, digit or underscore characters (12 in all).
MAX_MNEMONIC_CHARS = 12

_DECLARED = re.compile(r"[A-Za-z][A-Za-z0-9_]*")
_TYPED = re.compile(r"([A-Za-z](?:[A-Za-z_]*[A-Za-z_])?)([0-9]*)")


@lru_cache(maxsize=1024)
def mnemonic_forms(declared: str) -> tuple[str, str]:
    """Return ``(short, long)`` upper-case forms of a declared mnemonic.

    Parameters
    ----------
    declared : str
        Mnemonic written with its short form in capitals, e.g. ``"VOLTage"``, ``"CH"``.

    Returns
    -------
    tuple of str
        ``("VOLT", "VOLTAGE")``; both equal when the word is all capitals.

    Raises
    ------
    ValueError
        If ``declared`` is not a mnemonic or has no capital letter.

    References
    ----------
    SCPI-1999 Vol. 1 §6.2.1 "Mnemonic forms" (long form, short form, upper-case letters
    of the long form make the short form), from memory.
    """
    if not _DECLARED.fullmatch(declared):
        raise ValueError(f"{declared=} is not a SCPI mnemonic")
    short = "".join(ch for ch in declared if ch.isupper() or ch.isdigit() or ch == "_")
    if not short or not declared[0].isupper():
        raise ValueError(f"{declared=} must start with its upper-case short form")
    if not declared.startswith(short):
        raise ValueError(f"{declared=}: the short form must be a prefix of the long form")
    return short, declared.upper()


def split_suffix(typed: str) -> tuple[str, int | None] | None:
    """Split a typed mnemonic into its letters and its numeric suffix.

    Parameters
    ----------
    typed : str
        A mnemonic as received, e.g. ``"sour2"``, ``"VOLT"``.

    Returns
    -------
    tuple or None
        ``("SOUR", 2)``, ``("VOLT", None)``; None if ``typed`` is not a mnemonic.

    References
    ----------
    SCPI-1999 Vol. 1 §6.2.5 numeric suffixes on header nodes (from memory).
    """
    m = _TYPED.fullmatch(typed)
    if m is None:
        return None
    letters, digits = m.groups()
    return letters.upper(), (int(digits) if digits else None)
