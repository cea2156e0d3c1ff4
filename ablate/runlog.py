"""``train.log``: one line per event of a run, appended as it happens.

A line is ``<ISO 8601 time> <event> key=value key=value ...``::

    2026-12-03T11:40:25.123+00:00 eval step=8 tokens=8192 val_loss=5.4751

A value is written bare when it is a number, a boolean, null or a string without spaces,
quotes or ``=``; otherwise as a JSON string (dicts and lists as compact JSON; a non-finite
float as ``NaN`` / ``Infinity``, which Python's json reads back), so
:func:`read_log` gives back what was written. Each line is opened in append mode, written and
flushed on its own: a resumed run adds to the same file, and nothing is buffered when a run is
killed.
"""

from __future__ import annotations

import datetime
import json
import math
import re
from pathlib import Path

from .records import LOG, WriteError

_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_.]*\Z")
_BARE = re.compile(r'[^\s"=]+\Z')
_FIELD = re.compile(r'([A-Za-z_][A-Za-z0-9_.]*)=("(?:[^"\\]|\\.)*"|\S+)')


def _value(v) -> str:
    if isinstance(v, str):
        plain = _BARE.match(v) and v not in ("true", "false", "null") and not _is_number(v)
        return v if plain else json.dumps(v)
    if isinstance(v, float) and math.isfinite(v):
        return repr(v)  # shortest text that reads back as the same float (Python docs, repr)
    return json.dumps(v, separators=(",", ":"), default=str)


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def format_line(event: str, fields: dict, when: datetime.datetime | None = None) -> str:
    """One log line (no newline). ``event`` and field names are single words."""
    if not _NAME.match(event):
        raise ValueError(f"event={event!r}: must be one word of letters, digits, '_' or '.'")
    bad = [k for k in fields if not _NAME.match(k)]
    if bad:
        raise ValueError(f"field {bad[0]!r}: must be one word of letters, digits, '_' or '.'")
    when = when or datetime.datetime.now().astimezone()
    parts = [when.isoformat(timespec="milliseconds"), event, *(f"{k}={_value(v)}" for k, v in fields.items())]
    return " ".join(parts)


def parse_line(line: str) -> dict:
    """``{"time": datetime, "event": str, **fields}`` of one line written by :class:`RunLog`."""
    when, event, *rest = line.rstrip("\n").split(" ", 2)
    out = {"time": datetime.datetime.fromisoformat(when), "event": event}
    for key, raw in _FIELD.findall(rest[0] if rest else ""):
        try:
            out[key] = json.loads(raw)
        except ValueError:
            out[key] = raw
    return out


def read_log(folder: Path) -> list[dict]:
    """Every line of ``<folder>/train.log`` parsed (lines written by other code are left out)."""
    path = Path(folder) / LOG
    if not path.exists():
        return []
    lines = []
    for line in path.read_text().splitlines():
        try:
            lines.append(parse_line(line))
        except ValueError:
            continue
    return lines


class RunLog:
    """Appends timestamped event lines to ``<folder>/train.log``."""

    def __init__(self, folder: Path):
        self.path = Path(folder) / LOG

    def line(self, event: str, **fields) -> str:
        """Append one line and flush it; returns the line. A failed write (disk full) raises
        :class:`ablate.records.WriteError` in one line; lines written before stay."""
        text = format_line(event, fields)
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            with open(self.path, "a", encoding="utf-8") as f:
                f.write(text + "\n")
                f.flush()
        except OSError as exc:
            raise WriteError(
                f"{self.path}: could not append a line ({exc.strerror}); earlier lines are kept"
            ) from None
        return text
