"""`Option`: a setting a study file may give to an extension (a policy, a noise shape, a world kind).

Each extension class declares its settings as a dict of name -> Option; `simlab.study.spec`
validates them generically (type, range, allowed words), so a new extension needs no code
in the reader.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

__all__ = ["Option"]


@dataclass(frozen=True)
class Option:
    """A setting's default, type and allowed range (``low < x`` when ``low_open``, ``x < high`` when
    ``high_open``). A default of None means "resolved from the study when it is read" (the reader says how)."""

    default: Any
    kind: type = float
    low: float | None = None
    high: float | None = None
    help: str = ""
    choices: tuple[str, ...] = ()   # for kind=str: the allowed words
    low_open: bool = False
    high_open: bool = False
