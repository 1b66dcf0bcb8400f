"""Warnings grouped by kind: one line per kind with a count, instead of one line per bin.

A run can raise the same warning for hundreds of bins ("bin 17 [...] ps has 2 pump-on
shots ..."). The kind of a warning is its text with every number replaced by ``#``
(the stage tag ``[bins]`` kept); the summary, the log and the report print one line per
kind with its count and the first message as an example; the full list stays in the
movie's attrs.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field

__all__ = ["WarningGroup", "group_warnings", "summary_lines"]

#: A number in a message: integers, decimals, exponents, signs (not digits inside words like "Ir2").
_NUMBER = re.compile(r"(?<![\w.])[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?(?![\w])")


@dataclass
class WarningGroup:
    """Warnings of one kind.

    Attributes
    ----------
    kind : str
        The message with its numbers as ``#``.
    messages : list of str
        Every message of this kind, in the order raised.
    """

    kind: str
    messages: list[str] = field(default_factory=list)

    @property
    def count(self) -> int:
        return len(self.messages)

    def line(self) -> str:
        """One line: the count and the first message (the others differ only in numbers)."""
        if self.count == 1:
            return self.messages[0]
        return f"{self.count} x {self.messages[0]}  (and {self.count - 1} more like it)"


def warning_kind(message: str) -> str:
    """The kind of a warning: its text with every number replaced by ``#``."""
    return _NUMBER.sub("#", str(message))


def group_warnings(warnings) -> list[WarningGroup]:
    """Group warnings by kind, kinds in the order first raised.

    Parameters
    ----------
    warnings : iterable of str

    Returns
    -------
    list of WarningGroup
    """
    groups: dict[str, WarningGroup] = {}
    for w in warnings:
        kind = warning_kind(w)
        groups.setdefault(kind, WarningGroup(kind)).messages.append(str(w))
    return list(groups.values())


def summary_lines(warnings) -> list[str]:
    """The header line and one line per kind: ``warnings: N (K kinds)``, then ``  line``."""
    warnings = list(warnings)
    groups = group_warnings(warnings)
    head = f"warnings: {len(warnings)}" + (f" ({len(groups)} kinds)" if len(groups) < len(warnings) else "")
    return [head] + [f"  {g.line()}" for g in groups]
