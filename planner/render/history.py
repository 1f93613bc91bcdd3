"""One page of the study's history: a line per laboratory over the evaluated rounds.

Each laboratory gets a row: its mean z of each round (over the round's
materials) joined by a line, on a scale from -4 to 4 with the zero line and
dashed lines at -2 and +2; rounds it hosted have a filled mark, others an open
one. Beside the row: its mean |z| when hosting and when not. Under the rows,
the pooled host-effect statement. Drawn from ``planner.history.collect``'s
result alone; the rows shrink to keep everything on one page. A study with
several measurands gets such a page per measurand, its title naming it.
"""

from __future__ import annotations

from collections.abc import Mapping
from itertools import pairwise
from pathlib import Path
from typing import Any

from planner.render import _layout

__all__ = ["render"]

_MM = 72.0 / 25.4
_Z_LIMIT = 4.0
_ROW_MAX = 14 * _MM


def _fmt(value: float | None) -> str:
    return "-" if value is None else f"{value:.2f}"


def _rows_flowable(record: Mapping[str, Any], width: float, height: float) -> Any:
    from reportlab.lib.colors import HexColor
    from reportlab.platypus import Flowable

    rounds = [r["round"] for r in record["rounds"]]
    labs = list(record["labs"].items())
    effect = record["host_effect"]["labs"]

    class Rows(Flowable):  # type: ignore[misc]
        def wrap(self, avail_width: float, avail_height: float) -> tuple[float, float]:
            return width, height

        def draw(self) -> None:
            c = self.canv
            left, right, top = 22 * _MM, 34 * _MM, 10.0
            # A gap between the last round and the right-hand column.
            plot_w = width - left - right - 10 * _MM
            row_h = (height - top) / max(len(labs), 1)
            font = max(3.0, min(8.0, row_h * 0.6))
            step = plot_w / max(len(rounds) - 1, 1)

            def x_of(i: int) -> float:
                return left + (i * step if len(rounds) > 1 else plot_w / 2)

            c.setFont(_layout.FONT, 6.5)
            c.setFillColor(HexColor(_layout.MUTED))
            every = max(1, len(rounds) // 12)
            for i, name in enumerate(rounds):
                if i % every == 0:
                    c.drawCentredString(x_of(i), height - 7, _layout.fit_text(name, _layout.FONT,
                                                                              6.5, 16 * _MM))
            c.drawString(width - right + 3, height - 7, "mean |z| host / not")
            for k, (lab, data) in enumerate(labs):
                y_top = height - top - k * row_h
                mid = y_top - row_h / 2
                scale = row_h * 0.45 / _Z_LIMIT
                c.setFillColor(HexColor(_layout.INK))
                c.setFont(_layout.FONT, font)
                c.drawString(0, mid - font / 3, _layout.fit_text(lab, _layout.FONT, font,
                                                                 left - 4))
                c.setStrokeColor(HexColor(_layout.RULE))
                if k:  # a hairline between rows, so a large z stays visibly in its own row
                    c.setLineWidth(0.2)
                    c.line(0, y_top, width, y_top)
                c.setLineWidth(0.3)
                c.line(left, mid, left + plot_w, mid)
                c.setDash(1, 2)
                for guide in (-2.0, 2.0):
                    c.line(left, mid + guide * scale, left + plot_w, mid + guide * scale)
                c.setDash()
                points: list[tuple[float, float, bool] | None] = []
                for i, name in enumerate(rounds):
                    entry = data["rounds"].get(name)
                    if entry is None or entry["mean_z"] is None:
                        points.append(None)
                        continue
                    z = max(-_Z_LIMIT, min(_Z_LIMIT, entry["mean_z"]))
                    points.append((x_of(i), mid + z * scale, bool(entry["hosted"])))
                c.setStrokeColor(HexColor(_layout.ACCENT))
                c.setLineWidth(0.8)
                for a, b in pairwise(points):
                    if a is not None and b is not None:
                        c.line(a[0], a[1], b[0], b[1])
                radius = max(0.8, min(2.2, row_h * 0.12))
                for p in points:
                    if p is None:
                        continue
                    c.setFillColor(HexColor(_layout.ACCENT if p[2] else "#ffffff"))
                    c.circle(p[0], p[1], radius, stroke=1, fill=1)
                lab_effect = effect.get(lab)
                text = "never hosted"
                if lab_effect is not None:
                    text = (f"{_fmt(lab_effect['hosting']['mean_abs_z'])} / "
                            f"{_fmt(lab_effect['not_hosting']['mean_abs_z'])}")
                c.setFillColor(HexColor(_layout.MUTED))
                c.setFont(_layout.FONT, min(font, 7.0))
                c.drawString(width - right + 3, mid - font / 3, text)

    return Rows()


def _page(record: Mapping[str, Any], heading: str, width: float, page_h: float) -> list[Any]:
    """One measurand's page: its rows of laboratories and its host effect."""
    from reportlab.platypus import Paragraph, Spacer

    st = _layout.styles()
    esc = _layout.escape
    pooled = record["host_effect"]["pooled"]
    return [
        Paragraph(esc(heading), st["title"]),
        Paragraph(f"{len(record['rounds'])} evaluated round(s), {len(record['labs'])} "
                  "laboratories. Each row: the laboratory's mean z per round (scale -4 to 4, "
                  "dotted at -2 and +2); a filled mark is a round it hosted.", st["lead"]),
        Spacer(1, 3 * _MM),
        # The rows take at most what the page leaves after header, text and margins.
        _rows_flowable(record, width, min(page_h * 0.58, 10.0 + _ROW_MAX * len(record["labs"]))),
        Spacer(1, 4 * _MM),
        Paragraph("Host effect", st["h2"]),
        Paragraph(esc(pooled["statement"]), st["body"]),
    ]


def render(path: Path, record: Mapping[str, Any], *, study_id: str, title: str,
           paper: str) -> Path:
    """Write the history of ``record`` (from history.collect) to ``path``, a page per
    measurand; return it."""
    from reportlab.platypus import PageBreak

    width = _layout.content_width(paper)
    page_h = _layout.page_size(paper)[1]
    blocks = record["measurands"]
    single = list(blocks) == ["value"]  # history.SHORTHAND_ID: the page reads as it always has
    story: list[Any] = []
    for k, (mid, block) in enumerate(blocks.items()):
        one = {**record, "labs": block["labs"], "host_effect": block["host_effect"],
               "rounds": [r for r in record["rounds"] if r["round"] in block["rounds"]]}
        heading = ("Laboratories over rounds" if single else
                   f"Laboratories over rounds: {mid}" + (f", {block['name']}" if block.get("name")
                                                         else ""))
        story += ([PageBreak()] if k else []) + _page(one, heading, width, page_h)
    names = [r["round"] for r in record["rounds"]]
    span = f"{names[0]} to {names[-1]}" if len(names) > 1 else (names[0] if names else "none")
    running = _layout.Running(study_id, title, span, "history")
    return _layout.build(path, story, paper=paper, running=running,
                         title=f"history of {study_id}")
