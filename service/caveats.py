"""Caveats: the warnings the pipeline attaches to a result, each with a stable code.

A :class:`Caveat` is a string (its text, so every place that prints, compares or searches
warnings keeps working) that also carries ``code``, a stable snake_case name a program can
test for without reading the words. Each is made where its condition is found (image
loading, segmentation, measurement, ranking, the pipeline); the analysis JSON gives each as
``{"code", "text"}`` (:mod:`service.contract`). The numeric core knows nothing of that JSON.
"""

from __future__ import annotations

import re
from typing import Any

_CODE = re.compile(r"^[a-z][a-z0-9_]*$")

#: The code given to a warning that carries none (a stored analysis older than the codes).
UNCLASSIFIED = "unclassified"


class Caveat(str):
    """A warning's text (the string itself) with a stable snake_case ``code``; immutable."""

    code: str

    def __new__(cls, code: str, text: str) -> Caveat:
        if not isinstance(code, str) or not _CODE.match(code):
            raise ValueError(f"a caveat code is snake_case, got {code!r}")
        self = super().__new__(cls, text)
        object.__setattr__(self, "code", code)
        return self

    def __setattr__(self, name: str, value: Any) -> None:
        raise AttributeError("a Caveat cannot be changed")

    def __getnewargs__(self) -> tuple[str, str]:  # pickling to worker processes keeps the code
        return (self.code, str(self))

    def __reduce__(self):
        return (Caveat, (self.code, str(self)))

    @property
    def text(self) -> str:
        return str.__str__(self)

    def __repr__(self) -> str:
        return f"Caveat({self.code!r}, {str.__repr__(self)})"

    def to_dict(self) -> dict[str, str]:
        return {"code": self.code, "text": self.text}


def code_of(warning: Any) -> str:
    """The code of a warning: its own, or :data:`UNCLASSIFIED` for a plain string."""
    return getattr(warning, "code", UNCLASSIFIED)


def caveat(warning: Any) -> Caveat:
    """``warning`` as a Caveat: itself, a ``{"code", "text"}`` mapping, or a plain string (unclassified)."""
    if isinstance(warning, Caveat):
        return warning
    if isinstance(warning, dict):
        return Caveat(str(warning.get("code") or UNCLASSIFIED), str(warning.get("text", "")))
    return Caveat(UNCLASSIFIED, str(warning))
