"""Reading text files with the errors a person can act on (missing, empty, binary, not UTF-8)."""
from __future__ import annotations

from pathlib import Path

from agegrid.errors import BadInput


def read_text(path: str | Path) -> str:
    """The whole file as text; refuses a missing, empty, binary or non-UTF-8 file."""
    path = Path(path)
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise BadInput("file not found", path) from None
    except IsADirectoryError:
        raise BadInput("is a directory, not a file", path) from None
    if not data.strip():
        raise BadInput("file is empty", path)
    if b"\0" in data[:65536]:
        raise BadInput("binary file (NUL bytes), expected text", path)
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = data[: exc.start].count(b"\n") + 1
        raise BadInput(f"not UTF-8 text (byte {exc.start})", path, f"line {line}") from None
