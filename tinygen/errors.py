"""User-facing errors: one line naming file, node, op and reason; the CLI exits 2.

Every message passes through `safe_line` before it reaches the user: names taken from a
model or a command line can hold terminal control bytes (an ESC sequence would reach the
user's terminal) or be a megabyte long, so each name is capped and every control byte is
shown escaped, here once for every message rather than at each place that raises.
"""
from __future__ import annotations

import re

NAME_LIMIT = 120  # characters of a name (node, op, a quoted name) a message shows
PATH_LIMIT = 400  # characters of the file a message names
LINE_LIMIT = 1000  # characters of a whole message, the last guard

# C0 controls, DEL, C1 controls, and the Unicode line separators and bidirectional
# overrides that would move or reorder what a terminal shows
_CONTROL = re.compile("[\x00-\x1f\x7f-\x9f\u2028\u2029\u202a-\u202e\u2066-\u2069]")
_CAPPED = re.compile(r"\.\.\. \(\d+ chars\)$")  # what cap_name leaves
_QUOTED = re.compile(f"'([^']{{{NAME_LIMIT + 1},}})'")


def escape_controls(text: str, keep: str = "") -> str:
    """`text` with every control character shown as \\xNN or \\uNNNN (those in `keep` kept)."""
    def one(m: re.Match) -> str:
        ch = m.group(0)
        if ch in keep:
            return ch
        return f"\\x{ord(ch):02x}" if ord(ch) < 0x100 else f"\\u{ord(ch):04x}"
    return _CONTROL.sub(one, text)


def cap_name(name: str, limit: int = NAME_LIMIT) -> str:
    """A name cut to `limit` characters, saying how long it was."""
    return name if len(name) <= limit else f"{name[:limit]}... ({len(name)} chars)"


def safe_line(text: str) -> str:
    """One line fit for a terminal: long quoted names capped, control characters (newlines
    and tabs too) escaped, spaces folded, the whole capped at LINE_LIMIT characters."""
    text = _QUOTED.sub(lambda m: m.group(0) if _CAPPED.search(m.group(1)) else
                       f"'{cap_name(m.group(1))}'", text)
    text = " ".join(escape_controls(text).split())
    return text if len(text) <= LINE_LIMIT else \
        f"{text[:LINE_LIMIT]}... (message of {len(text)} chars cut)"


class TinygenError(Exception):
    """An error the user can act on (bad model, unsupported op, a limit exceeded)."""

    def __init__(self, reason: str, *, file: str = "", node: str = "", op: str = ""):
        super().__init__(reason)
        self.reason = reason
        self.file = file
        self.node = node
        self.op = op

    def one_line(self) -> str:
        """`FILE: node 'N': op OP: reason` (docs/cli.md), one line whatever the names hold."""
        parts = [cap_name(self.file, PATH_LIMIT),
                 f"node '{cap_name(self.node)}'" if self.node else "",
                 f"op {cap_name(self.op)}" if self.op else "", self.reason]
        return safe_line(": ".join(p for p in parts if p))


class Interrupted(KeyboardInterrupt):
    """SIGINT or SIGTERM arrived; the CLI exits 128 + the signal number."""

    def __init__(self, signum: int):
        super().__init__(signum)
        self.signum = signum
