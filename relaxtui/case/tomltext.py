"""Reading a case file's TOML text: the file itself and where its keys sit.

tomllib gives values without positions; :class:`KeyLines` scans the text for
the lines of headers and keys so that the case loader can put file and line
in front of every message.
"""

from __future__ import annotations

import re
import tomllib
from pathlib import Path

from relaxtui.errors import CaseError

MAX_NESTING = 64  # deepest [...]/{...} nesting of a case file (tomllib recurses per level)


# ---------------------------------------------------------------------------
# Where keys sit in the TOML text (tomllib gives no positions for keys)

_BARE_OR_QUOTED = r'"(?:[^"\\]|\\.)*"|\'[^\']*\'|[A-Za-z0-9_-]+'
_KEY_RE = re.compile(rf"^({_BARE_OR_QUOTED})\s*[.=]")
_AOT_RE = re.compile(r"^\[\[\s*(.+?)\s*\]\]\s*(?:#.*)?$")
_TABLE_RE = re.compile(r"^\[\s*([^\[].*?)\s*\]\s*(?:#.*)?$")
_FIRST_RE = re.compile(rf"^\s*({_BARE_OR_QUOTED})")


def _unquote(text: str) -> str:
    if len(text) >= 2 and text[0] == text[-1] and text[0] in "\"'":
        inner = text[1:-1]
        if text[0] == '"':
            try:
                return tomllib.loads(f"k = {text}")["k"]
            except tomllib.TOMLDecodeError:
                return inner
        return inner
    return text


def _first_component(dotted: str) -> str:
    m = _FIRST_RE.match(dotted)
    return _unquote(m.group(1)) if m else dotted.strip()


class KeyLines:
    """Line numbers (1-based) of headers and key assignments in a TOML text.

    A best-effort scan of the text, good for error messages: ``top[key]``,
    ``tables[name][key]`` (``tables[name][""]`` is the header) and
    ``regions[i]`` = ``(header line, {key: line})`` for the i-th
    ``[[region]]``.
    """

    def __init__(self, text: str):
        self.top: dict[str, int] = {}
        self.tables: dict[str, dict[str, int]] = {}
        self.regions: list[tuple[int, dict[str, int]]] = []
        self.arrays: dict[str, list[tuple[int, dict[str, int]]]] = {}  # other [[name]] entries
        current = self.top
        open_quote = None
        for no, raw in enumerate(text.splitlines(), 1):
            if open_quote:
                if raw.count(open_quote) % 2 == 1:
                    open_quote = None
                continue
            s = raw.strip()
            if not s or s.startswith("#"):
                continue
            m = _AOT_RE.match(s) or _TABLE_RE.match(s)  # [[array entry]] or [table] header
            if m:
                name = m.group(1)
                first = _first_component(name)
                self.top.setdefault(first, no)
                if m.re is _AOT_RE:
                    entry: dict[str, int] = {}
                    if first == "region" and _unquote(name) == "region":
                        self.regions.append((no, entry))
                    else:
                        self.arrays.setdefault(_unquote(name), []).append((no, entry))
                    current = entry
                elif first == "region" and self.regions:
                    # a sub-table of the last region: point its key at the header
                    rest = name.split(".", 1)[1] if "." in name else name
                    self.regions[-1][1].setdefault(_first_component(rest), no)
                    current = {}
                else:
                    current = self.tables.setdefault(first, {})
                    current.setdefault("", no)
                continue
            m = _KEY_RE.match(s)
            if m:
                current.setdefault(_unquote(m.group(1)), no)
                rest = s[m.end() :]
                for q in ('"""', "'''"):
                    if rest.count(q) % 2 == 1:
                        open_quote = q
                        break

    def top_line(self, key: str) -> int | None:
        return self.top.get(key)

    def table_line(self, table: str, key: str | None = None) -> int | None:
        lines = self.tables.get(table, {})
        if key is not None and key in lines:
            return lines[key]
        return lines.get("", self.top.get(table))

    def entry_line(self, array: str, i: int, key: str | None = None) -> int | None:
        """Line of ``key`` in the i-th ``[[array]]`` entry (its header without a key)."""
        entries = self.arrays.get(array, [])
        if i < len(entries):
            header, keys = entries[i]
            return keys.get(key, header) if key is not None else header
        return self.top.get(array)

    def region_line(self, i: int, key: str | None = None) -> int | None:
        if i < len(self.regions):
            header, keys = self.regions[i]
            if key is not None and key in keys:
                return keys[key]
            return header
        return self.top.get("region")


# ---------------------------------------------------------------------------
# Messages

def _where(label: str, line: int | None) -> str:
    return f"{label}:{line}" if line else label


def _fail(label: str, line: int | None, message: str) -> CaseError:
    return CaseError(f"{_where(label, line)}: {message}")


def _nesting_line(text: str) -> int | None:
    """The line where brackets first nest deeper than MAX_NESTING (strings skipped roughly), or None."""
    depth, line, quote = 0, 1, None
    for ch in text:
        if ch == "\n":
            line += 1
        if quote:
            if ch == quote:
                quote = None
            continue
        if ch in "\"'":
            quote = ch
        elif ch in "[{":
            depth += 1
            if depth > MAX_NESTING:
                return line
        elif ch in "]}":
            depth = max(0, depth - 1)
    return None


# ---------------------------------------------------------------------------
# The TOML file

def _read_toml(path: Path, label: str) -> tuple[dict, str]:
    from relaxtui.case.picture import read_file

    data = read_file(path, label, "case file", "case file")
    if data.startswith(b"\xef\xbb\xbf"):  # a UTF-8 byte-order mark some editors write
        data = data[3:]
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data[: exc.start].count(b"\n") + 1
        raise _fail(label, line, "not valid TOML: the file is not UTF-8 text") from None
    deep = _nesting_line(text)
    if deep is not None:
        raise _fail(label, deep, f"not valid for a case file: arrays or tables nested more than {MAX_NESTING} deep")
    try:
        doc = tomllib.loads(text)
    except RecursionError:
        raise _fail(label, None, "not valid for a case file: nested too deep") from None
    except tomllib.TOMLDecodeError as exc:
        msg = str(exc)
        m = re.search(r"\(at line (\d+), column (\d+)\)\s*$", msg)
        if m:
            reason = msg[: m.start()].strip()
            raise _fail(label, int(m.group(1)), f"not valid TOML: {reason} (column {m.group(2)})") from None
        m = re.search(r"\(at end of document\)\s*$", msg)
        if m:
            reason = msg[: m.start()].strip()
            raise _fail(label, text.count("\n") + 1, f"not valid TOML: {reason} (at the end of the file)") from None
        raise _fail(label, None, f"not valid TOML: {msg}") from None
    return doc, text
