"""Where the bundled files are: the study template, label-sheet geometries, document texts.

In an installed package they sit in ``planner/templates`` and
``planner/examples``; in a source checkout in the top-level ``templates/`` and
``examples/`` folders.
"""

from __future__ import annotations

from pathlib import Path

__all__ = ["template_path", "example_path"]

_HERE = Path(__file__).resolve().parent


def template_path(*parts: str) -> Path:
    """Return the path of a bundled template file or folder (``template_path("sheets")``)."""
    for base in (_HERE / "templates", _HERE.parent / "templates"):
        if base.is_dir():
            return base.joinpath(*parts)
    raise FileNotFoundError("ringplan's templates folder is missing from this installation")


def example_path(*parts: str) -> Path:
    """Return the path of a bundled example study (``example_path("norrvik-mfr")``)."""
    for base in (_HERE / "examples", _HERE.parent / "examples"):
        if base.is_dir():
            return base.joinpath(*parts)
    raise FileNotFoundError("ringplan's examples folder is missing from this installation")
