"""User-facing errors: one line naming file, node, op and reason; the CLI exits 2."""
from __future__ import annotations


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
        parts = [self.file, f"node '{self.node}'" if self.node else "",
                 f"op {self.op}" if self.op else "", self.reason]
        return " ".join(": ".join(p for p in parts if p).split())
