"""The run sheet of one laboratory: its codes trial by trial in the order they are tested.

One table per trial with blank columns for the result (its unit printed in
the heading), date and time, analyst and remarks, and a QR code per row so
that a scanner can fill in the code of a result. Built from the public
manifest alone: a run sheet never needs the key, so it can never show a
material.
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Any

from planner import codes
from planner.render import _layout, _qr

if TYPE_CHECKING:
    from planner.spec import Study

__all__ = ["INSTRUCTIONS", "render"]

INSTRUCTIONS = (
    "Test the units of each trial in the order of its table, top to bottom.",
    ("Run one trial per session (a separate day or shift); finish a trial before you start the "
    "next, and do not look back at earlier results."),
    ("Report every result, including failed or doubtful tests: leave the value empty and say "
    "what happened under remarks. Do not repeat a test to get a better value."),
    ("If a unit is lost or damaged, ask the coordinator which spare replaces it; test the spare "
    "in the unit's place and write the spare's code in the code column of the result form."),
    ("The decoding key stays sealed with the coordinator until every laboratory has reported; "
    "do not try to find out which material a unit holds."),
)

_MM = 72.0 / 25.4


def render(path: Path, study: Study, manifest: dict[str, Any], lab_id: str, *,
           paper: str) -> Path:
    """Write the run sheet of ``lab_id`` to ``path``; return ``path``."""
    from reportlab.platypus import KeepTogether, Paragraph, Spacer

    st = _layout.styles()
    esc = _layout.escape
    lab = study.lab(lab_id)
    entry = manifest["labs"][lab_id]
    dates = manifest["dates"]
    width = _layout.content_width(paper)
    unit = manifest.get("unit", study.study.unit)

    story: list[Any] = [
        Paragraph("Run sheet", st["title"]),
        Paragraph(f"<b>{esc(lab.name)}</b> · {esc(manifest.get('measurand', ''))}, in "
                  f"{esc(unit)}. Test window {esc(dates.get('test_start', ''))} to "
                  f"{esc(dates.get('test_end', ''))}; results due "
                  f"{esc(dates.get('results_due', ''))}.", st["lead"]),
        Paragraph("How to test", st["h2"]),
    ]
    story += [Paragraph(esc(text), st["bullet"], bulletText=f"{i}.")
              for i, text in enumerate(INSTRUCTIONS, start=1)]
    story += [Paragraph("Round fingerprint", st["h2"]),
              Paragraph(_layout.grouped_fingerprint(manifest["fingerprint"]), st["mono"])]

    side = 13 * _MM
    widths = [0.06, 0.11, 0.17, 0.17, 0.16, 0.13, 0.20]
    for trial, run in enumerate(entry["trials"], start=1):
        rows: list[list[Any]] = [["run", "scan", "code", f"result ({unit})", "date, time",
                                  "analyst", "remarks"]]
        for position, code in enumerate(run, start=1):
            printed = codes.format(code)
            rows.append([str(position), _qr.flowable(printed, side), printed, "", "", "", ""])
        table = _layout.table(rows, [w * width for w in widths], _layout.table_style(extra=[
            ("FONT", (2, 1), (2, -1), _layout.MONO, 10.5),
            ("FONT", (0, 1), (0, -1), _layout.BOLD, 10),
            ("ALIGN", (0, 0), (1, -1), "CENTER"),
            ("LINEAFTER", (2, 1), (5, -1), 0.4, "#c9cfd1"),
            ("TOPPADDING", (1, 1), (1, -1), 1), ("BOTTOMPADDING", (1, 1), (1, -1), 1),
        ]), repeatRows=1)
        story.append(KeepTogether([
            Paragraph(f"Trial {trial} of {len(entry['trials'])}", st["h2"]),
            Paragraph("one session; started on ____________ at ________", st["small"]),
            Spacer(1, 2 * _MM), table]))
    spares = entry.get("spares", [])
    if spares:
        story.append(KeepTogether([
            Paragraph("Spares", st["h2"]),
            Paragraph("Not part of any trial. " + ", ".join(
                f"<font name='{_layout.MONO}'>{codes.format(c)}</font>" for c in spares),
                st["body"])]))
    running = _layout.Running(study.id, study.study.title, manifest["round"],
                              f"run sheet · {lab.id}")
    return _layout.build(path, story, paper=paper, running=running,
                         title=f"run sheet {lab.id}, {study.id} round {manifest['round']}")
