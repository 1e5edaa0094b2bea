r"""Reading bibliographies (BibTeX with bibtexparser, RIS with rispy) into source records.

BibTeX fields are decoded from LaTeX to Unicode (`M{\"u}ller` -> `Müller`, `\&` -> `&`,
braces dropped) by bibtexparser's latex-decoding middleware. A BibTeX entry's key is its
citation key; a key given twice is an error naming both lines.

An RIS record's key is its `ID` tag when present, else the first author's family name in
lower case with anything but a-z dropped, then the year (`smith2019`; `anon` without an
author), with `a`, `b`, ... added when that key repeats within the file.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path

from registry.errors import InputError
from registry.evidence.reading import read_text


@dataclass(frozen=True)
class SourceRecord:
    key: str
    citation: str
    title: str | None = None
    authors: str | None = None
    journal: str | None = None
    doi: str | None = None
    year: int | None = None

    def fields(self) -> dict[str, object]:
        return {k: v for k, v in self.__dict__.items() if k != "key" and v is not None}


def _year(text: str | None, path: Path, key: str) -> int | None:
    if not text:
        return None
    match = re.search(r"\d{4}", text)
    if not match:
        raise InputError(
            f"entry {key!r}: year {text!r} is not a year", field="year", path=str(path)
        )
    return int(match.group())


def _doi(text: str | None) -> str | None:
    if not text:
        return None
    return re.sub(r"^(https?://(dx\.)?doi\.org/|doi:)", "", text.strip(), flags=re.I)


def format_citation(
    authors: list[str], year: int | None, title: str | None, journal: str | None
) -> str:
    """A plain one-line citation: Authors (year). Title. Journal. (Title first if no authors.)"""
    names = "; ".join(authors) if len(authors) <= 3 else f"{authors[0]} et al."
    dated = f" ({year})" if year else ""
    parts = [names + dated, title, journal] if names else [(title or "") + dated, journal]
    return ". ".join(p.strip().rstrip(".") for p in parts if p) + "."


def _clean(text: str | None) -> str | None:
    return re.sub(r"\s+", " ", text.replace("{", "").replace("}", "")).strip() if text else None


def _read_bibtex(path: Path, text: str) -> list[SourceRecord]:
    import bibtexparser
    from bibtexparser.middlewares import LatexDecodingMiddleware
    from bibtexparser.model import DuplicateBlockKeyBlock

    try:
        library = bibtexparser.parse_string(text, append_middleware=[LatexDecodingMiddleware()])
    except Exception as error:  # the parser's own errors on malformed input, whatever they are
        raise InputError(f"cannot parse the BibTeX file: {error}", path=str(path)) from None
    for block in library.failed_blocks:
        if isinstance(block, DuplicateBlockKeyBlock):
            raise InputError(
                f"citation key {block.key!r} appears twice: on line "
                f"{block.previous_block.start_line + 1} and on line {block.start_line + 1}",
                path=str(path),
            )
    if library.failed_blocks:
        block = library.failed_blocks[0]
        raise InputError(
            f"cannot parse the BibTeX entry starting on line {block.start_line + 1}", path=str(path)
        )
    records = []
    for entry in library.entries:
        if not entry.key.strip():
            line = "" if entry.start_line is None else f" on line {entry.start_line + 1}"
            raise InputError(f"the BibTeX entry{line} has no citation key", path=str(path))
        fields = {k.lower(): _clean(f.value) for k, f in entry.fields_dict.items()}
        authors = [a.strip() for a in (fields.get("author") or "").split(" and ") if a.strip()]
        year = _year(fields.get("year"), path, entry.key)
        journal = fields.get("journal") or fields.get("booktitle") or fields.get("publisher")
        records.append(
            SourceRecord(
                key=entry.key,
                citation=format_citation(authors, year, fields.get("title"), journal),
                title=fields.get("title"),
                authors="; ".join(authors) or None,
                journal=journal,
                doi=_doi(fields.get("doi")),
                year=year,
            )
        )
    return records


def _read_ris(path: Path, text: str) -> list[SourceRecord]:
    import rispy

    try:
        items = rispy.loads(text)
    except Exception as error:  # rispy raises plain IOError/ValueError on malformed input
        raise InputError(f"cannot parse the RIS file: {error}", path=str(path)) from None
    records, seen = [], set()
    for item in items:
        authors = item.get("authors") or item.get("first_authors") or []
        year = _year(item.get("year") or item.get("publication_year"), path, str(item.get("id")))
        key = item.get("id")
        if not key:
            family = re.sub(r"[^a-z]", "", authors[0].split(",")[0].lower()) if authors else "anon"
            key = f"{family}{year or ''}"
            base, n = key, 0
            while key in seen:
                n += 1
                key = base + "abcdefghijklmnopqrstuvwxyz"[n - 1]
        seen.add(key)
        title = item.get("title") or item.get("primary_title")
        journal = item.get("journal_name") or item.get("secondary_title")
        records.append(
            SourceRecord(
                key=key,
                citation=format_citation(authors, year, title, journal),
                title=title,
                authors="; ".join(authors) or None,
                journal=journal,
                doi=_doi(item.get("doi")),
                year=year,
            )
        )
    return records


def read_bibliography(path: str | Path, *, encoding: str | None = None) -> list[SourceRecord]:
    """Source records from a .bib or .ris file; a key given twice is an error."""
    path = Path(path)
    if not path.is_file():
        raise InputError("no such file", path=str(path))
    readers = {".bib": _read_bibtex, ".ris": _read_ris}
    reader = readers.get(path.suffix.lower())
    if reader is None:
        raise InputError("a bibliography must be .bib (BibTeX) or .ris (RIS)", path=str(path))
    text = read_text(path, encoding)
    records = reader(path, text)
    keys = [r.key for r in records]
    repeated = sorted({k for k in keys if keys.count(k) > 1})
    if repeated:
        raise InputError(f"citation key {repeated[0]!r} appears twice", path=str(path))
    if not records:
        raise InputError("the file holds no references", path=str(path))
    return records
