"""Delimited text files (CSV, TSV, semicolon-separated) and their text encodings.

Text is decoded as UTF-8 (a byte-order mark is allowed) unless an encoding is named; there is no silent
fallback, and a decoding failure names the first bad byte and its line.
"""

from __future__ import annotations

import codecs
import csv
from pathlib import Path

import pandas as pd

from ..core.errors import SiteproofError

COMPRESSED_SUFFIXES = (".gz", ".bz2", ".zip", ".xz", ".zst")


def _header_line(path: Path, encoding: str) -> str | None:
    """The first line of an uncompressed text file (None for compressed files or undecodable bytes)."""
    if path.suffix.lower() in COMPRESSED_SUFFIXES:
        return None
    with path.open("rb") as fh:
        first = fh.readline(1 << 20)
    try:
        return first.decode(encoding).rstrip("\r\n")
    except UnicodeDecodeError:
        return None


def _delimiter(path: Path, header: str | None) -> str:
    """Tab for .tsv; otherwise whichever of , ; tab occurs most in the header line (comma on ties)."""
    if ".tsv" in path.suffixes:
        return "\t"
    if not header:
        return ","
    return max([",", ";", "\t"], key=lambda sep: (header.count(sep), sep == ","))


def _check_header(header: str | None, sep: str, path: Path) -> None:
    """Refuse repeated column names (the CSV reader would silently rename them)."""
    if header is None:
        return
    names = [name.strip() for name in next(csv.reader([header], delimiter=sep), [])]
    seen: set[str] = set()
    for name in names:
        if name in seen and name:
            raise SiteproofError(f"column '{name}' appears twice in the header of {path}", "rename one of them")
        seen.add(name)


def _first_bad_byte(path: Path, encoding: str) -> str:
    """Where a file stops being valid text in ``encoding``: "byte 0xe9 on line 7" (lines count from 1)."""
    decoder = codecs.getincrementaldecoder(encoding)()
    line = 1
    with path.open("rb") as fh:
        while chunk := fh.read(1 << 20):
            try:
                decoder.decode(chunk)
            except UnicodeDecodeError as exc:
                bad_line = line + exc.object[: exc.start].count(b"\n")
                return f"byte 0x{exc.object[exc.start]:02x} on line {bad_line}"
            line += chunk.count(b"\n")
    return "an incomplete character at the end"


def check_encoding(encoding: str) -> None:
    """Refuse a codec name that Python does not know."""
    try:
        codecs.lookup(encoding)
    except LookupError:
        raise SiteproofError(
            f"unknown text encoding '{encoding}'", "name a standard one, e.g. --encoding latin-1"
        ) from None


def read_csv(path: Path, encoding: str | None) -> pd.DataFrame:
    """Read delimited text (delimiter , ; or tab from the header; tab for .tsv), UTF-8 unless ``encoding``."""
    enc = encoding or "utf-8-sig"
    check_encoding(enc)
    header = _header_line(path, enc)
    sep = _delimiter(path, header)
    _check_header(header, sep, path)
    try:
        return pd.read_csv(path, sep=sep, encoding=enc, low_memory=False)
    except UnicodeDecodeError:
        where = _first_bad_byte(path, enc)
        if encoding is None:
            raise SiteproofError(
                f"data file {path} is not UTF-8 text ({where})",
                "re-save it as UTF-8, or name its encoding, e.g. --encoding latin-1",
            ) from None
        raise SiteproofError(
            f"data file {path} is not valid {enc} text ({where})", "name its encoding with --encoding"
        ) from None
    except pd.errors.EmptyDataError:
        raise SiteproofError(
            f"data file {path} is empty", "give a file with a header row and one row per unit"
        ) from None
    except pd.errors.ParserError as exc:
        raise SiteproofError(
            f"cannot read {path} as CSV ({' '.join(str(exc).split())})",
            "check that every row has as many fields as the header and that quotes are closed",
        ) from None
    except (OSError, ValueError) as exc:
        raise SiteproofError(f"cannot read {path} as CSV ({exc})", "check that it is a CSV file") from None
