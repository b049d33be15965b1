"""What text the ledger accepts, and how hostile stored text is made safe for exports.

Input (one rule for the CLI, the API, spec import and the UI, applied by the records
themselves, ``ledger/store/models.py``): a text field holds printable characters only.
Multi-line fields (statements, rationales, notes, descriptions, model texts) may also hold
tab, line feed and carriage return; one-line fields (names, IDs, labels, titles, units, limits,
authors, sign-off name and role) hold none of them.  Refused everywhere:

* C0 control characters (U+0000-U+001F) other than those three, DEL (U+007F) and C1 control
  characters (U+0080-U+009F): form feed, NUL, ESC sequences...;
* surrogates (U+D800-U+DFFF), which are not characters, and the noncharacters U+FFFE, U+FFFF
  (and U+nFFFE, U+nFFFF in every plane, U+FDD0-U+FDEF);
* in one-line fields, the line and paragraph separators U+2028 and U+2029.

Output: text already stored (written into the database behind the ledger's back) can hold
anything; :func:`xml_safe` and :func:`cell_safe` make it safe for XML and for spreadsheet
cells, replacing what the format cannot carry with a visible ``\\uXXXX`` escape.
"""

from __future__ import annotations

import json
import re
import unicodedata

from .errors import IntegrityViolation

__all__ = ["check_line", "check_block", "check_json_strings", "first_bad", "xml_safe",
           "cell_safe", "printable"]

_NONCHAR = "\ufdd0-\ufdef" + "".join(
    f"{chr(p * 0x10000 + 0xFFFE)}{chr(p * 0x10000 + 0xFFFF)}" for p in range(17))
_SURR = "\ud800-\udfff"
_BLOCK_BAD = re.compile(f"[\x00-\x08\x0b\x0c\x0e-\x1f\x7f-\x9f{_SURR}{_NONCHAR}]")
_LINE_BAD = re.compile(f"[\x00-\x1f\x7f-\x9f\u2028\u2029{_SURR}{_NONCHAR}]")
# XML 1.0 Char production: #x9 | #xA | #xD | [#x20-#xD7FF] | [#xE000-#xFFFD] | [#x10000-#x10FFFF]
_XML_BAD = re.compile(f"[\x00-\x08\x0b\x0c\x0e-\x1f{_SURR}\ufffe\uffff]")
# what a spreadsheet cell cannot hold: openpyxl's ILLEGAL_CHARACTERS_RE (C0 but tab, LF, CR),
# plus everything XML cannot carry (the workbook is XML)
_CELL_BAD = re.compile(f"[\x00-\x08\x0b\x0c\x0e-\x1f{_SURR}\ufffe\uffff]")


def _describe(ch: str) -> str:
    name = unicodedata.name(ch, "").lower()
    if not name:
        name = {"\x00": "NUL", "\x0c": "form feed", "\x1b": "escape", "\x7f": "delete",
                "\x0b": "vertical tab", "\x08": "backspace", "\r": "carriage return",
                "\n": "line feed", "\t": "tab"}.get(ch, "")
    if not name and 0xD800 <= ord(ch) <= 0xDFFF:
        name = "surrogate"
    if not name and (ord(ch) & 0xFFFE == 0xFFFE or 0xFDD0 <= ord(ch) <= 0xFDEF):
        name = "noncharacter"
    if not name and ord(ch) < 0xA0:
        name = "control character"
    return f"U+{ord(ch):04X}" + (f" ({name})" if name else "")


def first_bad(value: str, multiline: bool) -> tuple[int, str] | None:
    """``(index, character)`` of the first character not allowed, or None."""
    m = (_BLOCK_BAD if multiline else _LINE_BAD).search(value)
    return (m.start(), m.group()) if m else None


def _check(what: str, value, multiline: bool):
    if value is None or not isinstance(value, str):
        return value
    bad = first_bad(value, multiline)
    if bad is not None:
        i, ch = bad
        allowed = ("printable characters, tab and line breaks" if multiline
                   else "printable characters on one line")
        raise IntegrityViolation(f"{what}: character {_describe(ch)} at position {i + 1} is not "
                                 f"allowed; this field takes {allowed}")
    return value


def check_line(what: str, value):
    """``value`` unchanged when it is fit for a one-line field; else IntegrityViolation."""
    return _check(what, value, multiline=False)


def check_block(what: str, value):
    """``value`` unchanged when it is fit for a multi-line field; else IntegrityViolation."""
    return _check(what, value, multiline=True)


def check_json_strings(what: str, value):
    """Every key and string inside the JSON text ``value`` fit for a one-line field."""
    if not isinstance(value, str) or not value:
        return value

    def walk(obj):
        if isinstance(obj, str):
            check_line(what, obj)
        elif isinstance(obj, dict):
            for k, v in obj.items():
                check_line(what, k)
                walk(v)
        elif isinstance(obj, list):
            for v in obj:
                walk(v)

    try:
        walk(json.loads(value))
    except ValueError as e:
        if isinstance(e, IntegrityViolation):
            raise
    return value


def _escape(m: re.Match) -> str:
    return f"\\u{ord(m.group()):04x}"


def xml_safe(value) -> str:
    """``value`` as text XML 1.0 can carry: forbidden characters become ``\\uXXXX``."""
    text = "" if value is None else str(value)
    return _XML_BAD.sub(_escape, text)


def cell_safe(value):
    """A spreadsheet cell value: strings with characters a workbook cannot hold escaped as
    ``\\uXXXX``; other values unchanged."""
    if isinstance(value, str):
        return _CELL_BAD.sub(_escape, value)
    return value


def printable(value) -> str:
    """``value`` with every control character (and surrogate or noncharacter) escaped as
    ``\\uXXXX``, tab and line breaks kept: for plain-text outputs (CSV, Markdown, terminal)."""
    text = "" if value is None else str(value)
    return _BLOCK_BAD.sub(_escape, text)
