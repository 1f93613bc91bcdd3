"""The host's preparation sheet: what to prepare of each material, and its codes.

Confidential: it links every code to its material, so it stays with the host
and is kept with the sealed key, never sent to a participant. Per material the
units by kind and the total amount to prepare, a checklist, and then per
material the list of its codes with destination and kind, in the order the
host's label sheet prints them: the test units, then the host's spare pool
(spares go in no parcel; ``planner.spares`` picks the one to send), the
retained and the homogeneity units.
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Any

from planner import codes
from planner.render import _layout

if TYPE_CHECKING:
    from planner.spec import Study

__all__ = ["CHECKLIST", "CIRCULATE_CHECKLIST", "CONFIDENTIAL", "render"]

CONFIDENTIAL = ("CONFIDENTIAL · host only · links codes to materials · keep with the sealed "
                "key, never send to a participant")

CHECKLIST = (
    "Print the labels and this sheet; check that the fingerprint below is the one printed on "
    "every packing list of this round.",
    "Prepare each material as one homogeneous batch before it is split into units.",
    "Split each material into the number of units in the table, each of the amount given.",
    ("Label the units of one material at a time, following the separator labels; never have "
    "two materials open on the bench at once."),
    "Set the homogeneity units aside at once and test them before the parcels leave.",
    "Keep the retained units in their storage condition until the round is evaluated.",
    ("Keep the spares too, in their storage condition: they are the pool from which a "
     "replacement is sent when a laboratory reports a unit damaged ('ringplan spare' names the "
     "unit); no spare goes into a parcel."),
    "Pack each laboratory's parcel against its packing list; a second person checks it.",
    "Store this sheet with the sealed key, away from the units and the parcels.",
)

# For a circulating set: one artefact per material that travels the whole route.
CIRCULATE_CHECKLIST = (
    "Print the labels and this sheet; check that the fingerprint below is the one printed on "
    "every packing list of this round.",
    "Check every artefact for damage and clean it as the method prescribes.",
    ("Label the artefacts one at a time, following the separator labels; the label goes where "
    "it does not touch a measuring surface."),
    "Measure the set at the start stop as its run sheet says, before it leaves.",
    "Pack the set with the next laboratory's hand-over sheet; a second person checks it.",
    "Store this sheet with the sealed key; the set comes back for the host's later stops.",
)

_MM = 72.0 / 25.4
_KINDS = ("test", "spare", "retained", "homogeneity")


_ROW_HEIGHT = 16.0
_HEAD_HEIGHT = 16.6
"""Heights in points of a code row and of the header row, as the table measures them."""


def _amount(value: float) -> str:
    return f"{value:g}"


def render(path: Path, study: Study, manifest: dict[str, Any], key: dict[str, Any], *,
           paper: str) -> Path:
    """Write the preparation sheet of the round to ``path``; return ``path``."""
    from reportlab.platypus import KeepTogether, Paragraph, Spacer

    st = _layout.styles()
    esc = _layout.escape
    width = _layout.content_width(paper)
    host = study.lab(manifest["host"])
    lab_rank = {lab.id: i for i, lab in enumerate(study.laboratories)}
    kind_rank = {k: i for i, k in enumerate(_KINDS)}
    by_material: dict[str, list[dict[str, Any]]] = {}
    for unit in key["units"]:
        by_material.setdefault(unit["material"], []).append(unit)

    story: list[Any] = [
        Paragraph("Preparation sheet", st["title"]),
        Paragraph(f"For the host, <b>{esc(host.name)}</b>: prepare on "
                  f"{esc(manifest['dates'].get('prepare_on', ''))}. "
                  f"{len(key['units'])} units of {len(by_material)} materials.", st["lead"]),
    ]
    if manifest.get("mode") == "circulate":
        return _render_circulating(path, study, manifest, by_material, paper=paper,
                                   story=story[:1])
    rows: list[list[Any]] = [["material", "test", "spare", "retained", "homog.", "units",
                              "per unit", "to prepare"]]
    for material in study.materials:
        units = by_material.get(material.id, [])
        counts = [sum(1 for u in units if u["kind"] == k) for k in _KINDS]
        total = len(units)
        rows.append([Paragraph(f"<b>{esc(material.id)}</b><br/>{esc(material.description)}",
                               st["cell"]), *counts, total,
                     f"{_amount(material.amount)} {material.amount_unit}",
                     f"{_amount(material.amount * total)} {material.amount_unit}"])
    widths = [0.34, 0.07, 0.07, 0.09, 0.08, 0.08, 0.12, 0.15]
    story.append(_layout.table(rows, [w * width for w in widths], _layout.table_style(extra=[
        ("ALIGN", (1, 0), (-1, -1), "RIGHT"), ("FONT", (5, 1), (5, -1), _layout.BOLD, 9),
        ("FONT", (7, 1), (7, -1), _layout.BOLD, 9)]), repeatRows=1))
    story.append(Paragraph("The amount to prepare includes the spares (kept by the host as a "
                           "pool for replacements), retained and homogeneity units; add what "
                           "your splitting method loses.", st["small"]))

    _storage_and_checklist(story, study, manifest, CHECKLIST, width)

    for material in study.materials:
        units = sorted(by_material.get(material.id, []), key=lambda u: (
            kind_rank.get(u["kind"], 9), lab_rank.get(u["lab"], 99), u["trial"] or 0,
            u["position"] or 0, u["code"]))
        if not units:
            continue
        body = [[codes.format(u["code"]),
                 "host's pool" if u["kind"] == "spare" and u["lab"] == host.id else u["lab"],
                 u["kind"],
                 u["trial"] if u["trial"] is not None else "",
                 u["position"] if u["position"] is not None else ""] for u in units]
        # Every row of the same height, given: a table split at a page break is measured
        # again, and measuring each cell of every remaining row would cost the square of
        # the rows.
        table = _layout.table([["code", "for", "kind", "trial", "run"], *body],
                              [w * width for w in (0.28, 0.2, 0.22, 0.15, 0.15)],
                              _layout.table_style(extra=[
                                  ("FONT", (0, 1), (0, -1), _layout.MONO, 10),
                                  ("TOPPADDING", (0, 1), (-1, -1), 2),
                                  ("BOTTOMPADDING", (0, 1), (-1, -1), 2)]), repeatRows=1,
                              rowHeights=[_HEAD_HEIGHT] + [_ROW_HEIGHT] * len(body))
        story.append(KeepTogether([
            Paragraph(f"{esc(material.id)} · {len(units)} units", st["h2"]),
            Paragraph(esc(material.description), st["small"]), Spacer(1, 2 * _MM),
            table]))
    return _build(path, study, manifest, story, paper)


def _render_circulating(path: Path, study: Study, manifest: dict[str, Any],
                        by_material: dict[str, list[dict[str, Any]]], *, paper: str,
                        story: list[Any]) -> Path:
    """The sheet of a circulating set: each material's artefact code, then the route."""
    from reportlab.platypus import Paragraph

    st = _layout.styles()
    esc = _layout.escape
    width = _layout.content_width(paper)
    route = manifest.get("route", [])
    story.append(Paragraph(
        f"For the host, <b>{esc(study.lab(manifest['host']).name)}</b>: one circulating set of "
        f"{len(study.materials)} artefacts; it leaves on {esc(route[0]['pass_on'] or '')} and "
        f"comes back for {sum(1 for s in route if s['visit'] not in (None, 'start'))} more "
        "stops of the host.", st["lead"]))
    rows: list[list[Any]] = [["material", "artefact code"]]
    for material in study.materials:
        units = by_material.get(material.id, [])
        rows.append([Paragraph(f"<b>{esc(material.id)}</b><br/>{esc(material.description)}",
                               st["cell"]),
                     ", ".join(codes.format(u["code"]) for u in units)])
    story.append(_layout.table(rows, [w * width for w in (0.6, 0.4)],
                               _layout.table_style(extra=[
                                   ("FONT", (1, 1), (1, -1), _layout.MONO, 10)]), repeatRows=1))
    _storage_and_checklist(story, study, manifest, CIRCULATE_CHECKLIST, width)
    story.append(Paragraph("Route", st["h2"]))
    stops = [["stop", "laboratory", "arrives", "tests", "passes on"]]
    stops += [[s["index"], s["lab"] + (f" ({s['visit']})" if s["visit"] else ""), s["arrive"],
               f"{s['test_start']} to {s['test_end']}", s["pass_on"] or ""] for s in route]
    story.append(_layout.table(stops, [w * width for w in (0.08, 0.27, 0.17, 0.3, 0.18)],
                               _layout.table_style(), repeatRows=1))
    return _build(path, study, manifest, story, paper)


def _storage_and_checklist(story: list[Any], study: Study, manifest: dict[str, Any],
                           checklist: tuple[str, ...], width: float) -> None:
    from reportlab.platypus import Paragraph

    st = _layout.styles()
    esc = _layout.escape
    story.append(Paragraph("Storage and hazards", st["h2"]))
    for material in study.materials:
        hazard = (f" <b>{esc(material.hazard.word)}</b>: {esc(material.hazard.note)}"
                  if material.hazard else "")
        story.append(Paragraph(f"<b>{esc(material.id)}</b>: {esc(material.storage)}; stable "
                               f"{material.stability_days} days.{hazard}", st["bullet"],
                               bulletText="•"))

    story.append(Paragraph("Checklist", st["h2"]))
    box = 3.6 * _MM
    checks = [[_layout.check_box(box), Paragraph(esc(text), st["body"])] for text in checklist]
    story.append(_layout.table(checks, [8 * _MM, width - 8 * _MM], _layout.table_style(
        header=False, extra=[("VALIGN", (0, 0), (-1, -1), "TOP"),
                             ("LINEBELOW", (0, 0), (-1, -1), 0, "#ffffff")])))
    story += [Paragraph("Round fingerprint", st["h2"]),
              Paragraph(_layout.grouped_fingerprint(manifest["fingerprint"]), st["mono"])]


def _build(path: Path, study: Study, manifest: dict[str, Any], story: list[Any],
           paper: str) -> Path:
    running = _layout.Running(study.id, study.study.title, manifest["round"],
                              "preparation sheet · host", confidential=CONFIDENTIAL)
    return _layout.build(path, story, paper=paper, running=running,
                         title=f"preparation sheet, {study.id} round {manifest['round']}")
