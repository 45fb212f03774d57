"""File names made from taxon names: readable, unique, stable and length-limited.

Every file a run writes for one taxon (its suitability maps, ranges and novelty
maps) is named by the taxon's *file stem*; a time slice's maps carry the slice's stem
too (:func:`slice_file_stem`).  The stems come from here only, and
``run.json`` maps each taxon to its stem under ``taxa``, so ``debrief`` finds a
taxon's maps without guessing.
"""

from __future__ import annotations

import hashlib
import re
import unicodedata

__all__ = ["STEM_MAX", "slice_file_stem", "taxon_file_stem", "taxon_file_stems"]

#: longest readable part of a file stem (characters); file names stay far below the
#: 255-byte limit of common file systems
STEM_MAX = 60
#: names some systems reserve for devices (compared without case)
_RESERVED = {"con", "prn", "aux", "nul", *(f"com{i}" for i in range(1, 10)),
             *(f"lpt{i}" for i in range(1, 10))}
#: a plain name: a capital or digit, then lower-case letters, digits, single spaces
#: and hyphens
_PLAIN = re.compile(r"[A-Z0-9](?:[a-z0-9-]|(?<! ) (?! ))*(?<=[a-z0-9])|[A-Z0-9]")


def taxon_file_stem(taxon: str) -> str:
    """The part of a file name that stands for ``taxon``.

    A plain name (a capital letter or digit, then lower-case letters, digits, single
    spaces and hyphens; at most :data:`STEM_MAX` characters) keeps its letters, with
    spaces written as ``_``.  Any other name gets a readable part (letters
    transliterated to ASCII where Unicode allows, everything else ``_``, cut to
    :data:`STEM_MAX` characters), then ``__`` and the first 8 hex digits of the
    SHA-256 of the exact name.  Plain stems never hold ``__``, and plain names differ
    in more than case, so distinct names give distinct stems, also where the file
    system ignores case; the same name gives the same stem in every run.

    Examples
    --------
    >>> taxon_file_stem("Nebrivex tarvelli")
    'Nebrivex_tarvelli'
    >>> taxon_file_stem("Nebrivex a/b")
    'Nebrivex_a_b__05886e8c'
    >>> taxon_file_stem("Nebrivex a b")
    'Nebrivex_a_b'
    """
    name = str(taxon)
    if len(name) <= STEM_MAX and _PLAIN.fullmatch(name) and name.lower() not in _RESERVED:
        return name.replace(" ", "_")
    ascii_ = unicodedata.normalize("NFKD", name).encode("ascii", "ignore").decode()
    readable = re.sub(r"[^A-Za-z0-9-]+", "_", ascii_).strip("_-")[:STEM_MAX].rstrip("_-")
    tag = hashlib.sha256(name.encode("utf-8", "surrogatepass")).hexdigest()[:8]
    return f"{readable or 'taxon'}__{tag}"


def taxon_file_stems(taxa) -> dict:
    """File stem of every taxon, as a dict taxon -> stem (in the given order)."""
    return {name: taxon_file_stem(name) for name in taxa}


def slice_file_stem(name: str) -> str:
    """A time slice's part of a file name: the name itself when it is a short plain word
    (letters, digits, ``_`` and ``-``), else the same unique stem a taxon name gets.

    >>> slice_file_stem("cold_stage")
    'cold_stage'
    """
    if re.fullmatch(r"[A-Za-z0-9][A-Za-z0-9_-]{0,39}", name):
        return name
    return taxon_file_stem(name)
