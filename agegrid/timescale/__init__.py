"""Geomagnetic polarity timescales: bundled published tables, user tables, chron labels.

Each table is a CSV file, one polarity interval a row (``chron,young_ma,old_ma,polarity,...``), whose
``# key: value`` header lines name the publication. See ``tables/`` for the bundled ones.
"""
from __future__ import annotations

import csv
import difflib
import io
import re
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path

import numpy as np

from agegrid.errors import BadInput

TABLES = Path(__file__).parent / "tables"

#: Bundled timescales by name, and the table that holds each.
BUNDLED = {"CK95": "ck95.csv", "GTS2004": "gts2004.csv", "GTS2012": "gts2012.csv", "GTS2020": "gts2020.csv"}

EDGES = ("young", "old")

_LABEL = re.compile(
    r"^\s*(?P<seq>[CcMm])?\s*(?P<num>\d+)\s*(?P<letters>[A-Za-z]*?)\s*(?P<pol>[NnRr])"
    r"(?P<sub>(?:\s*\.\s*\d+\s*[NnRr])*)\s*$")


def normalise_chron(label: str) -> str | None:
    """The canonical spelling of a chron label (``"c 5n.2N"`` -> ``"C5n.2n"``), or None if malformed."""
    match = _LABEL.match(str(label))
    if not match:
        return None
    seq = (match["seq"] or "C").upper()
    subs = re.findall(r"(\d+)\s*([NnRr])", match["sub"] or "")
    return (seq + match["num"] + match["letters"].upper() + match["pol"].lower()
            + "".join(f".{num}{pol.lower()}" for num, pol in subs))


@dataclass(frozen=True)
class Timescale:
    """A polarity timescale: consecutive intervals from young to old.

    Parameters
    ----------
    name : str
        Short name (``"CK95"``).
    chrons : tuple of str
        Interval names, youngest first.
    young, old : numpy.ndarray
        Interval ends in Ma; ``old`` of the last interval may be NaN when the publication gives none.
    polarity : numpy.ndarray
        +1 normal, -1 reversed.
    metadata : dict
        The ``# key: value`` header lines (``reference``, ``caveat`` ...).
    """

    name: str
    chrons: tuple[str, ...]
    young: np.ndarray
    old: np.ndarray
    polarity: np.ndarray
    metadata: dict = field(default_factory=dict)
    _row_cache: dict = field(default_factory=dict, init=False, repr=False, compare=False)

    @property
    def reference(self) -> str:
        return self.metadata.get("reference", "")

    @property
    def oldest_ma(self) -> float:
        """The oldest boundary age the table defines."""
        finite = self.old[np.isfinite(self.old)]
        return float(max(finite.max(initial=0.0), self.young.max()))

    def __len__(self) -> int:
        return len(self.chrons)

    def __hash__(self) -> int:
        return hash((self.name, self.chrons, self.young.tobytes(), self.old.tobytes()))

    def __eq__(self, other) -> bool:
        return isinstance(other, Timescale) and hash(self) == hash(other)

    def _rows(self, label: str) -> np.ndarray:
        """Indices of the rows that make up a chron (the row itself, or all its subchrons), looked up once."""
        if label not in self._row_cache:
            self._row_cache[label] = np.array([i for i, c in enumerate(self.chrons)
                                               if c == label or c.startswith(label + ".")], dtype=int)
        return self._row_cache[label]

    def resolve(self, label: str) -> str:
        """The canonical name of a chron known to this timescale.

        Raises
        ------
        KeyError
            With a message suggesting the closest names.
        """
        name = normalise_chron(label)
        if name is None:
            raise KeyError(f"{label!r} is not a chron label (expected forms such as C5n.2n, C3An.1n, "
                           "C13r, M0r)")
        if len(self._rows(name)):
            return name
        close = difflib.get_close_matches(name, self.names(), n=3, cutoff=0.6)
        hint = f"; close matches: {', '.join(close)}" if close else ""
        raise KeyError(f"chron {name} is not in {self.name}{hint}")

    def names(self) -> list[str]:
        """Every chron this timescale can resolve: the rows and their parent chrons."""
        names = set(self.chrons)
        for chron in self.chrons:
            parts = chron.split(".")
            names.update(".".join(parts[:k]) for k in range(1, len(parts)))
        return sorted(names)

    def boundary(self, label: str, edge: str = "young") -> float:
        """Age (Ma) of the young or old end of a chron.

        Raises
        ------
        KeyError
            Unknown chron, or an end the publication does not define.
        """
        if edge not in EDGES:
            raise KeyError(f"edge must be 'young' or 'old', got {edge!r}")
        rows = self._rows(self.resolve(label))
        age = self.young[rows[0]] if edge == "young" else self.old[rows[-1]]
        if not np.isfinite(age):
            raise KeyError(f"{self.name} gives no {edge} end for {label}")
        return float(age)

    def neighbours(self, label: str, edge: str = "young") -> tuple[str | None, str | None]:
        """The intervals on either side of a chron end (younger, older): what a boundary means."""
        rows = self._rows(self.resolve(label))
        i = rows[0] if edge == "young" else rows[-1] + 1
        return (self.chrons[i - 1] if i > 0 else None, self.chrons[i] if i < len(self.chrons) else None)

    def index_at(self, age) -> np.ndarray:
        """Row index of the interval holding each age (-1 outside the table)."""
        age = np.asarray(age, dtype=float)
        edges = np.append(self.young, self.old[-1])
        index = np.searchsorted(edges, age, side="right") - 1
        top = np.isfinite(self.old[-1])
        outside = ~np.isfinite(age) | (age < 0) | (index >= len(self.chrons)) | (
            (index == len(self.chrons) - 1) & (age > self.old[-1]) if top else False)
        if not top:  # an open last interval: its end is unknown, so nothing past its start is dated
            outside = outside | (age >= self.young[-1])
        return np.where(outside, -1, np.clip(index, 0, len(self.chrons) - 1))

    def chron_at(self, age: float) -> str | None:
        """Name of the interval holding an age, or None past the table."""
        i = int(self.index_at(age))
        return None if i < 0 else self.chrons[i]

    def polarity_at(self, age) -> np.ndarray:
        """+1 normal, -1 reversed, 0 where the table does not reach (or the age is NaN)."""
        index = self.index_at(age)
        return np.where(index >= 0, self.polarity[np.maximum(index, 0)], 0).astype(np.int8)

    def check(self, source=None) -> list[str]:
        """Validate the table; returns notes (zero-length intervals), raises BadInput on errors."""
        notes = []
        for i, chron in enumerate(self.chrons):
            where = f"row {i + 1} ({chron})"
            if np.isfinite(self.old[i]) and self.old[i] < self.young[i]:
                raise BadInput(f"old end {self.old[i]} is younger than young end {self.young[i]}",
                               source, where)
            if self.old[i] == self.young[i]:
                notes.append(f"{chron} has zero length ({self.young[i]} Ma) as tabulated")
            if i and abs(self.young[i] - self.old[i - 1]) > 1e-9:
                raise BadInput(f"starts at {self.young[i]} but the previous interval ends at "
                               f"{self.old[i - 1]}: intervals must be contiguous", source, where)
            if i and self.polarity[i] == self.polarity[i - 1]:
                raise BadInput("has the same polarity as the previous interval: polarity must alternate",
                               source, where)
            if i < len(self.chrons) - 1 and not np.isfinite(self.old[i]):
                raise BadInput("only the last interval may lack an old end", source, where)
        if len(set(self.chrons)) != len(self.chrons):
            dup = sorted({c for c in self.chrons if self.chrons.count(c) > 1})
            raise BadInput(f"chron names repeat: {', '.join(dup)}", source)
        return notes

    def describe(self) -> dict:
        """Name, publication, range and size, for listings and the manifest."""
        return {"name": self.name, "reference": self.reference, "intervals": len(self),
                "youngest_chron": self.chrons[0], "oldest_chron": self.chrons[-1],
                "covers_ma": [float(self.young[0]), self.oldest_ma],
                "caveat": self.metadata.get("caveat", ""), "composite": self.metadata.get("composite", "")}


def parse_table(text: str, source: str, name: str | None = None) -> Timescale:
    """Parse a timescale CSV (same layout as the bundled tables) and validate it."""
    metadata, body = {}, []
    for line in text.splitlines():
        if line.startswith("#"):
            key, sep, value = line[1:].strip().partition(":")
            if sep and key.strip() and " " not in key.strip():
                metadata.setdefault(key.strip(), value.strip())
        elif line.strip():
            body.append(line)
    reader = csv.DictReader(io.StringIO("\n".join(body)))
    missing = {"chron", "young_ma", "old_ma", "polarity"} - set(reader.fieldnames or [])
    if missing:
        raise BadInput(f"missing column(s): {', '.join(sorted(missing))}", source, "header")
    chrons, young, old, polarity = [], [], [], []
    for i, row in enumerate(reader):
        where = f"row {i + 1}"
        label = normalise_chron(row["chron"] or "")
        if label is None:
            raise BadInput(f"{row['chron']!r} is not a chron label", source, where)
        try:
            young.append(float(row["young_ma"]))
            old.append(float(row["old_ma"]) if (row["old_ma"] or "").strip() else np.nan)
        except ValueError:
            raise BadInput(f"ages must be numbers, got {row['young_ma']!r}, {row['old_ma']!r}",
                           source, where) from None
        pol = (row["polarity"] or "").strip().upper()
        if pol not in ("N", "R"):
            raise BadInput(f"polarity must be N or R, got {row['polarity']!r}", source, where)
        if label[-1].upper() != pol:
            raise BadInput(f"chron {label} does not match its polarity {pol}", source, where)
        chrons.append(label)
        polarity.append(1 if pol == "N" else -1)
    if not chrons:
        raise BadInput("no intervals", source)
    scale = Timescale(name or metadata.get("name", Path(source).stem), tuple(chrons), np.array(young),
                      np.array(old), np.array(polarity, dtype=np.int8), metadata)
    notes = scale.check(source)
    if notes:
        scale.metadata["notes"] = "; ".join(notes)
    return scale


@lru_cache(maxsize=None)
def load(name_or_path: str) -> Timescale:
    """A bundled timescale by name (case-insensitive) or a user table by path.

    Raises
    ------
    BadInput
        Unknown name, unreadable table or a table that fails validation.
    """
    key = str(name_or_path).upper()
    if key in BUNDLED:
        path = TABLES / BUNDLED[key]
        return parse_table(path.read_text(), str(path), key)
    path = Path(name_or_path)
    if not path.is_file():
        close = difflib.get_close_matches(key, list(BUNDLED), n=1)
        hint = f" (did you mean {close[0]}?)" if close else ""
        raise BadInput(f"unknown timescale{hint}; bundled: {', '.join(BUNDLED)}, or give a CSV path",
                       str(name_or_path))
    try:
        text = path.read_text(encoding="utf-8")
    except UnicodeDecodeError:
        raise BadInput("not UTF-8 text", path) from None
    return parse_table(text, str(path))
