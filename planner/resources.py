"""Where the bundled files are: the study template, label-sheet geometries, document texts.

In an installed package they sit in ``planner/templates``; in a source checkout
in the top-level ``templates/`` folder.
"""

from __future__ import annotations

from pathlib import Path

__all__ = ["template_path"]

_HERE = Path(__file__).resolve().parent


def template_path(*parts: str) -> Path:
    """Return the path of a bundled template file or folder (``template_path("sheets")``)."""
    for base in (_HERE / "templates", _HERE.parent / "templates"):
        if base.is_dir():
            return base.joinpath(*parts)
    raise FileNotFoundError("ringplan's templates folder is missing from this installation")
