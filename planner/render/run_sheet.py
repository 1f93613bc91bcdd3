"""The run sheet of one laboratory: its codes trial by trial in the order they are tested.

One table per trial with blank columns for the result (its unit printed in
the heading), date and time, analyst and remarks, and a QR code per row so
that a scanner can fill in the code of a result. Built from the public
manifest alone: a run sheet never needs the key, so it can never show a
material.

For a circulating set the sheet is per stop: the same artefacts in every
trial, in that stop's own order, with the stop's own test window and the day
the set must leave; the host gets one sheet per stop (``visit``).
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Any

from planner import codes, tokens
from planner.render import _layout, _qr

if TYPE_CHECKING:
    from planner.spec import Study

__all__ = ["CIRCULATING_INSTRUCTIONS", "INSTRUCTIONS", "file_name", "render"]

INSTRUCTIONS = (
    "Test the units of each trial in the order of its table, top to bottom.",
    ("Run one trial per session (a separate day or shift); finish a trial before you start the "
    "next, and do not look back at earlier results."),
    ("Report every result, including failed or doubtful tests: leave the value empty and say "
    "what happened under remarks. Do not repeat a test to get a better value."),
    ("If a unit is lost or damaged, tell the coordinator its code; the host sends a replacement "
    "unit. Test it in the lost unit's place and write the code on its label in the code column "
    "of the result form."),
    ("The decoding key stays sealed with the coordinator until every laboratory has reported; "
    "do not try to find out which material a unit holds."),
)

CIRCULATING_INSTRUCTIONS = (
    ("Every artefact is measured once in each trial. Test the artefacts of a trial in the "
     "order of its table, top to bottom."),
    INSTRUCTIONS[1],
    INSTRUCTIONS[2],
    ("The code of an artefact is the same in every trial: keep the trial and position of each "
     "row on the result form as printed, so that each result belongs to its measurement."),
    ("The artefacts travel on to the next laboratory: do not mark, clean or change them, and "
     "pass the set on by the date above (see the hand-over sheet)."),
    ("The decoding key stays sealed with the coordinator until every stop has reported; do not "
     "try to find out what an artefact is made of."),
)

_MM = 72.0 / 25.4


def file_name(visit: str | None) -> str:
    """Return the file name of a run sheet: ``run-sheet.pdf``, a host stop's ``run-sheet-<visit>.pdf``."""
    return f"run-sheet-{visit}.pdf" if visit and visit != "start" else "run-sheet.pdf"


def _station(manifest: dict[str, Any], lab_id: str, visit: str | None) -> dict[str, Any]:
    """Return the route entry of a laboratory's stop (the host's first without ``visit``)."""
    host = manifest["host"]
    want = visit or ("start" if lab_id == host else None)
    for s in manifest.get("route", ()):
        if s["lab"] == lab_id and s.get("visit") == want:
            return dict(s)
    raise ValueError(f"laboratory {lab_id!r} has no stop {want!r} on the route")


def render(path: Path, study: Study, manifest: dict[str, Any], lab_id: str, *,
           paper: str, visit: str | None = None, token: str | None = None) -> Path:
    """Write the run sheet of ``lab_id`` to ``path``; return ``path``.

    ``visit`` picks a host's later stop ("middle", "end") of a circulating set;
    ``token`` is the laboratory's submission token (``planner.tokens``).
    """
    from reportlab.platypus import KeepTogether, Paragraph, Spacer

    st = _layout.styles()
    esc = _layout.escape
    lab = study.lab(lab_id)
    dates = manifest["dates"]
    width = _layout.content_width(paper)
    unit = manifest.get("unit", study.study.unit)
    circulating = manifest.get("mode") == "circulate"
    if visit == "start":
        visit = None
    if circulating:
        station = _station(manifest, lab_id, visit)
        entry = {"trials": manifest["host_visits"][visit] if visit
                 else manifest["labs"][lab_id]["trials"]}
        stop = (f"stop {station['index']} of {len(manifest['route'])}"
                + (f" ({station['visit']})" if station.get("visit") else ""))
        passing = (f"pass the set on by {esc(station['pass_on'])}" if station.get("pass_on")
                   else "the set stays with the host")
        lead = (f"<b>{esc(lab.name)}</b> · {esc(stop)} of the circulating set · "
                f"{esc(manifest.get('measurand', ''))}, in {esc(unit)}. Test from "
                f"{esc(station['test_start'])} to {esc(station['test_end'])}; {passing}; "
                f"results due {esc(dates.get('results_due', ''))}.")
        instructions: tuple[str, ...] = CIRCULATING_INSTRUCTIONS
    else:
        entry = manifest["labs"][lab_id]
        lead = (f"<b>{esc(lab.name)}</b> · {esc(manifest.get('measurand', ''))}, in "
                f"{esc(unit)}. Test window {esc(dates.get('test_start', ''))} to "
                f"{esc(dates.get('test_end', ''))}; results due "
                f"{esc(dates.get('results_due', ''))}.")
        instructions = INSTRUCTIONS

    story: list[Any] = [
        Paragraph("Run sheet", st["title"]),
        Paragraph(lead, st["lead"]),
        Paragraph("How to test", st["h2"]),
    ]
    story += [Paragraph(esc(text), st["bullet"], bulletText=f"{i}.")
              for i, text in enumerate(instructions, start=1)]
    story += [Paragraph("Round fingerprint", st["h2"]),
              Paragraph(_layout.grouped_fingerprint(manifest["fingerprint"]), st["mono"])]
    if token is not None:
        story += [Paragraph("Submission token", st["h2"]),
                  Paragraph(f"<font name='{_layout.MONO}'>{esc(tokens.format(token))}</font>"
                            " &#8212; for your laboratory only. It is already on your result "
                            "form; the coordinator records a form only with it. Do not pass it "
                            "on.", st["body"])]

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
    name = f"{lab.id}@{visit}" if visit else lab.id
    running = _layout.Running(study.id, study.study.title, manifest["round"],
                              f"run sheet · {name}")
    return _layout.build(path, story, paper=paper, running=running,
                         title=f"run sheet {name}, {study.id} round {manifest['round']}")
