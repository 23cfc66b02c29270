"""How a file name appears in every output: valid UTF-8 text, always.

On POSIX a file name is bytes.  Python hands a name that is not valid UTF-8
to us as text in which each undecodable byte became a lone surrogate
(``os.fsdecode``, the ``surrogateescape`` rule): ``caf\\udce9.pcap`` for the
bytes ``caf\\xe9.pcap``.  Such text cannot be written as UTF-8.  Every output
(JSONL, CSV, the terminal table, ``rate``'s tables, report.json,
report.html, error messages) therefore shows each such byte as the four
characters ``\\xNN`` (two lower-case hex digits), Python's
``backslashreplace`` form: ``caf\\xe9.pcap``.  Names that are valid UTF-8
appear exactly as they are (a backslash already in a name is not doubled,
so ``caf\\xe9.pcap`` may also be a name typed that way).

:func:`shown` applies the rule to one string, :func:`shown_all` to every
string in a JSON-ready object, :class:`TextOut` to text written to a stream;
:data:`ERRORS` is the same rule as a codec error handler, for streams whose
text is not ours to check (``cli.main`` sets it on stdout and stderr).
"""

from __future__ import annotations

import codecs

ERRORS = "seamscan-filename"


def _escape(err: UnicodeError):
    """Codec error handler: a surrogate-escaped byte as ``\\xNN``; any other
    character that cannot be encoded as ``\\uNNNN`` (Python's form)."""
    if not isinstance(err, UnicodeEncodeError):
        raise err
    bad = err.object[err.start:err.end]
    return "".join(f"\\x{ord(c) - 0xDC00:02x}" if 0xDC80 <= ord(c) <= 0xDCFF
                   else f"\\u{ord(c):04x}" for c in bad), err.end


codecs.register_error(ERRORS, _escape)


def shown(text: str) -> str:
    """``text`` as every output shows it (the module docstring's rule)."""
    if text.isascii():
        return text
    return text.encode("utf-8", ERRORS).decode("utf-8")


def shown_all(obj):
    """A copy of a JSON-ready object (dicts, lists, strings, numbers) with every
    string, keys too, passed through :func:`shown` (tuples become lists)."""
    if isinstance(obj, str):
        return shown(obj)
    if isinstance(obj, dict):
        return {shown_all(k): shown_all(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [shown_all(v) for v in obj]
    return obj


def needs_escape(text: str) -> bool:
    """True when ``text`` cannot be written as UTF-8 as it is."""
    if text.isascii():
        return False
    try:
        text.encode("utf-8")
    except UnicodeEncodeError:
        return True
    return False


class TextOut:
    """A text stream's ``write`` and ``flush`` with :func:`shown` applied to
    every piece of text (for plain-text formats: table, CSV, HTML)."""

    def __init__(self, out):
        self.out = out

    def write(self, text: str) -> int:
        return self.out.write(shown(text))

    def flush(self) -> None:
        self.out.flush()
