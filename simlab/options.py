"""`Option`: a setting a study file may give to an extension (a policy, a noise shape, a world kind).

Each extension class declares its settings as a dict of name -> Option; `simlab.study.spec`
validates them generically (type, range, allowed words), so a new extension needs no code
in the reader.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

__all__ = ["Option", "WithOptions"]


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
    # False: the study dump leaves the setting out while it has its default, so studies written before
    # the setting existed dump (and hash) as they did (e.g. a policy's ``feasible``)
    always_written: bool = True

    def written(self, value) -> bool:
        """Whether a study dump writes this setting with ``value``."""
        return self.always_written or value != self.default


class WithOptions:
    """A class with study-file settings: ``options`` declared on a class are merged with those of its
    bases (so a subclass lists only its own), and :meth:`_set_options` stores each as an attribute,
    the default where it is not given. Policies and stopping rules share it."""

    options: dict[str, Option] = {}
    option_owner = "rule"          # the words naming this kind of class in an error

    def __init_subclass__(cls, **kwargs):
        super().__init_subclass__(**kwargs)
        merged: dict[str, Option] = {}
        for base in reversed(cls.__mro__[1:]):
            merged.update(base.__dict__.get("options", {}))
        merged.update(cls.__dict__.get("options", {}))
        cls.options = merged

    def _set_options(self, settings: dict) -> None:
        for key, opt in self.options.items():
            setattr(self, key, settings.pop(key, opt.default))
        if settings:
            raise ValueError(f"unknown setting(s) for {self.option_owner} {self.rule!r}: {', '.join(settings)}; "
                             f"allowed: {', '.join(self.options) or 'none'}")
