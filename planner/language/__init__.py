"""The words of every document a laboratory receives, in the laboratory's language.

One YAML file per language sits beside this module (``en.yaml``, ``de.yaml``,
``fr.yaml``, ``es.yaml``): sections by document, each sentence under a key, read
here as dotted names (``run_sheet.title``). English is the reference: every other
file has the same keys and, in each text, the same ``{placeholders}``
(``tests/test_language.py``). A term a native speaker should check carries a
``# review:`` comment in its file.

A laboratory's ``language`` in study.yaml picks the file for its packing list or
hand-over sheet, run sheet, result form, the labels of its units and its letter;
without one it gets the study's language, English, in which the coordinator's and
the host's own documents (report, prep sheet, label separators) are written.

What a program reads back stays the same in every language: the identity keys
(``# round: 2027-1``) and the column names (``code``, ``value``, ...) of the
result form. A localized form says in its own words what those names mean.

A text is a ``str.format`` template. Texts set as a paragraph may hold reportlab's
``<b>`` and ``<i>``; nothing else of mark-up, and no ``&`` or ``<`` as text, so that
``markup`` can fill them with escaped values.
"""

from __future__ import annotations

import string
from dataclasses import dataclass, field
from functools import cache
from pathlib import Path
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from planner.spec import Lab

__all__ = ["DEFAULT", "Markup", "Texts", "available", "fields", "of", "texts"]

DEFAULT = "en"
"""The study's language: the coordinator's documents, and a laboratory's without ``language``."""

_HERE = Path(__file__).resolve().parent


class Markup(str):
    """Text that is already paragraph mark-up: ``Texts.markup`` inserts it unescaped."""

    __slots__ = ()


@dataclass(frozen=True, slots=True)
class Texts:
    """The texts of one language by dotted key."""

    code: str
    entries: dict[str, str] = field(repr=False)

    def __call__(self, key: str, /, **values: Any) -> str:
        """Return the text of ``key`` with ``values`` filled in (KeyError for an unknown key)."""
        return self.entries[key].format(**values)

    def template(self, key: str) -> str:
        """Return the text of ``key`` with its placeholders unfilled."""
        return self.entries[key]

    def markup(self, key: str, /, **values: Any) -> str:
        """Return the text of ``key`` as paragraph mark-up: values escaped unless ``Markup``."""
        return self.entries[key].format(**{name: value if isinstance(value, Markup)
                                           else _escape(str(value))
                                           for name, value in values.items()})


def _escape(text: str) -> str:
    return text.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")


def available() -> tuple[str, ...]:
    """Return the language codes there is a text file for, the default first."""
    found = sorted(p.stem for p in _HERE.glob("*.yaml"))
    return (DEFAULT, *(c for c in found if c != DEFAULT))


@cache
def texts(code: str = DEFAULT) -> Texts:
    """Return the texts of language ``code``; ValueError if there is no file for it."""
    import yaml

    if code not in available():
        raise ValueError(f"no texts for language {code!r}; there are {', '.join(available())}")
    raw = yaml.safe_load((_HERE / f"{code}.yaml").read_text(encoding="utf-8"))
    entries: dict[str, str] = {}
    _flatten(raw, "", entries)
    return Texts(code, entries)


def _flatten(node: Any, prefix: str, out: dict[str, str]) -> None:
    if isinstance(node, dict):
        for name, value in node.items():
            _flatten(value, f"{prefix}{name}." if isinstance(value, dict) else prefix + name,
                     out)
    elif isinstance(node, str):
        out[prefix] = node
    else:
        raise ValueError(f"text {prefix!r} is {type(node).__name__}, not text")


def fields(template: str) -> set[str]:
    """Return the names of the placeholders of a template ({lab}, {date}, ...)."""
    return {name for _, name, _, _ in string.Formatter().parse(template) if name}


def of(lab: Lab | None) -> str:
    """Return the language a laboratory's documents are written in (the study's without one)."""
    return (lab.language if lab is not None else None) or DEFAULT
