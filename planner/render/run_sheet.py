"""The run sheet of one laboratory: its codes trial by trial in the order they are tested.

One table per trial with blank columns for the result (its unit printed in
the heading), date and time, analyst and remarks, and a QR code per row so
that a scanner can fill in the code of a result. A study with several
measurands has a result column per measurand (id and unit in the heading, name
and unit in the lead), with a dash on grey where a measurand is not measured on
that unit (the manifest's ``not_measured``). Built from the public
manifest alone: a run sheet never needs the key, so it can never show a
material.

For a circulating set the sheet is per stop: the same artefacts in every
trial, in that stop's own order, with the stop's own test window and the day
the set must leave; the host gets one sheet per stop (``visit``).
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import TYPE_CHECKING, Any

from planner import codes, language, tokens
from planner.render import _layout, _qr

if TYPE_CHECKING:
    from planner.language import Texts
    from planner.spec import Study

__all__ = ["file_name", "instructions", "render"]

_INSTRUCTIONS = ("order", "session", "report_all", "lost", "sealed")
_CIRCULATING = ("circulating_order", "session", "report_all", "circulating_same_code",
                "circulating_travel", "circulating_sealed")


def instructions(texts: Texts, *, circulating: bool = False) -> tuple[str, ...]:
    """Return the numbered instructions of a run sheet (a circulating set's), in ``texts``."""
    return tuple(texts(f"run_sheet.{key}") for key in (_CIRCULATING if circulating
                                                       else _INSTRUCTIONS))


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

    from planner import plan

    st = _layout.styles()
    esc = _layout.escape
    lab = study.lab(lab_id)
    t = language.texts(language.of(lab))
    dates = manifest["dates"]
    width = _layout.content_width(paper)
    unit = manifest.get("unit", study.study.unit)
    circulating = manifest.get("mode") == "circulate"
    if visit == "start":
        visit = None
    measurand = manifest.get("measurand", "")
    several = manifest.get("measurands")
    if several is not None:
        # name and unit of every measurand in the lead; the columns carry id and unit
        measurand = t("common.semicolon").join(
            t("run_sheet.measurand", column=m["id"], name=m["name"],
              unit=str(m["unit"]).replace(" ", "\u00a0"))
            for m in several)
    due = dates.get("results_due", "")
    if circulating:
        station = _station(manifest, lab_id, visit)
        entry = {"trials": manifest["host_visits"][visit] if visit
                 else manifest["labs"][lab_id]["trials"]}
        count = len(manifest["route"])
        stop = (t("run_sheet.stop_visit", index=station["index"], count=count,
                  visit=t(f"common.visit.{station['visit']}"))
                if station.get("visit") else
                t("run_sheet.stop", index=station["index"], count=count))
        passing = (t("run_sheet.pass_on", date=station["pass_on"]) if station.get("pass_on")
                   else t("run_sheet.stays"))
        if several is None:
            lead = t.markup("run_sheet.lead_circulating", lab=lab.name, stop=stop,
                            measurand=measurand, unit=unit, start=station["test_start"],
                            end=station["test_end"], passing=passing, due=due)
        else:
            lead = t.markup("run_sheet.lead_circulating_several", lab=lab.name, stop=stop,
                            measurands=measurand, start=station["test_start"],
                            end=station["test_end"], passing=passing, due=due)
        first_day = station["test_start"]
    else:
        entry = manifest["labs"][lab_id]
        if several is None:
            lead = t.markup("run_sheet.lead", lab=lab.name, measurand=measurand, unit=unit,
                            start=dates.get("test_start", ""), end=dates.get("test_end", ""),
                            due=due)
        else:
            lead = t.markup("run_sheet.lead_several", lab=lab.name, measurands=measurand,
                            start=dates.get("test_start", ""), end=dates.get("test_end", ""),
                            due=due)
        first_day = dates.get("test_start", "")
    absent = plan.not_applicable(manifest, only=[c for run in entry["trials"] for c in run])
    dashed = any(code in absent for run in entry["trials"] for code in run)
    steps = [*instructions(t, circulating=circulating),
             *([t("run_sheet.not_measured_circulating" if circulating
                    else "run_sheet.not_measured")] if dashed else []),
             t("run_sheet.dates_note", example=first_day or "2027-01-25")]

    story: list[Any] = [
        Paragraph(esc(t("run_sheet.title")), st["title"]),
        Paragraph(lead, st["lead"]),
        Paragraph(esc(t("run_sheet.how_to")), st["h2"]),
    ]
    story += [Paragraph(esc(text), st["bullet"], bulletText=f"{i}.")
              for i, text in enumerate(steps, start=1)]
    story += [Paragraph(esc(t("common.fingerprint_heading")), st["h2"]),
              Paragraph(_layout.grouped_fingerprint(manifest["fingerprint"]), st["mono"])]
    if token is not None:
        shown = language.Markup(f"<font name='{_layout.MONO}'>{esc(tokens.format(token))}</font>")
        story += [Paragraph(esc(t("run_sheet.token_heading")), st["h2"]),
                  Paragraph(t.markup("run_sheet.token", token=shown), st["body"])]

    side = 13 * _MM
    results = ([t("run_sheet.col_result", unit=unit)] if several is None else
               [t("run_sheet.col_measurand", column=m["id"], unit=m["unit"]) for m in several])
    ids = [None] if several is None else [str(m["id"]) for m in several]
    head = [t("run_sheet.col_run"), t("run_sheet.col_scan"), t("run_sheet.col_code"),
            *results, t("run_sheet.col_when"), t("run_sheet.col_analyst"),
            t("run_sheet.col_remarks")]
    widths = (_widths(head, len(results), width, side) if several is not None
              else [w * width for w in _ONE_RESULT])
    last_result = 2 + len(results)
    for trial, run in enumerate(entry["trials"], start=1):
        rows: list[list[Any]] = [_heads(head, widths, st)]
        dashes: list[tuple[str, Any, Any]] = []
        for position, code in enumerate(run, start=1):
            printed = codes.format(code)
            skip = absent.get(code, frozenset())
            cells = ["\u2013" if i in skip else "" for i in ids]
            for column, i in enumerate(ids, start=3):
                if i in skip:
                    dashes += [("BACKGROUND", (column, position), (column, position), _GREY),
                               ("TEXTCOLOR", (column, position), (column, position), "#6b6b6b"),
                               ("ALIGN", (column, position), (column, position), "CENTER")]
            rows.append([str(position), _qr.flowable(printed, side), printed, *cells, "", "",
                         ""])
        table = _layout.table(rows, widths, _layout.table_style(extra=[
            ("FONT", (2, 1), (2, -1), _layout.MONO, 10.5),
            ("FONT", (0, 1), (0, -1), _layout.BOLD, 10),
            ("ALIGN", (0, 0), (1, -1), "CENTER"),
            ("LINEAFTER", (2, 1), (last_result + 2, -1), 0.4, "#c9cfd1"),
            ("TOPPADDING", (1, 1), (1, -1), 1), ("BOTTOMPADDING", (1, 1), (1, -1), 1),
            *dashes,
        ]), repeatRows=1)
        story.append(KeepTogether([
            Paragraph(esc(t("run_sheet.trial", trial=trial, count=len(entry["trials"]))),
                      st["h2"]),
            Paragraph(esc(t("run_sheet.started")), st["small"]),
            Spacer(1, 2 * _MM), table]))
    name = f"{lab.id}@{visit}" if visit else lab.id
    running = _layout.Running(study.id, study.study.title, manifest["round"],
                              t("run_sheet.running", name=name),
                              round_text=t.template("common.round"),
                              page_text=t.template("common.page"))
    return _layout.build(path, story, paper=paper, running=running,
                         title=t("run_sheet.pdf_title", name=name, study=study.id,
                                 round=manifest["round"]))


_ONE_RESULT = (0.06, 0.11, 0.17, 0.17, 0.16, 0.13, 0.20)
_GREY = "#e6e8e9"  # the cell of a measurand not measured on that unit, behind its dash


def _widths(head: list[str], results: int, width: float, side: float) -> list[float]:
    """Return the column widths in points of a table with ``results`` result columns (one
    per measurand) and the headings ``head``.

    Each column gets at least its longest heading word (a unit in brackets counts as one)
    and room for what is written in it: the run number, the QR code, the code in full, a
    number, a date and time, a name, a remark. What is left goes to the remarks, the date,
    the analyst and the results; when even the least does not fit, every column shrinks in
    proportion and headings wrap.
    """
    from reportlab.pdfbase.pdfmetrics import stringWidth

    padding = 8  # table_style: 4 pt either side

    def heading(text: str) -> float:
        return max(stringWidth(word, _layout.BOLD, 8)
                   for word in re.findall(r"\([^)]*\)|[^\s(]+", text) or [""])

    written = [stringWidth("99", _layout.BOLD, 10), side,
               stringWidth("WWWW-WWWWW", _layout.MONO, 10.5), *[13 * _MM] * results,
               17 * _MM, 14 * _MM, 16 * _MM]
    least = [max(heading(text), need) + padding for text, need in zip(head, written,
                                                                        strict=True)]
    spare = width - sum(least)
    if spare < 0:
        return [w * width / sum(least) for w in least]
    share = [0.0, 0.0, 0.0, *[0.25 / results] * results, 0.2, 0.15, 0.4]
    return [w + spare * f for w, f in zip(least, share, strict=True)]


def _heads(texts: list[str], widths: list[float], st: dict[str, Any]) -> list[Any]:
    """Return the heading cells of a trial's table: plain text where it fits on one line, else
    a paragraph that wraps (a longer word of another language)."""
    from reportlab.lib.colors import HexColor
    from reportlab.lib.styles import ParagraphStyle
    from reportlab.pdfbase.pdfmetrics import stringWidth
    from reportlab.platypus import Paragraph

    style = ParagraphStyle("head", parent=st["cell"], fontName=_layout.BOLD, fontSize=8,
                           leading=9.5, textColor=HexColor(_layout.ACCENT))
    padding = 8  # table_style: 4 pt either side
    # A unit in brackets stays on one line: "(g/10 min)" under "Ergebnis", not split.
    whole = re.compile(r"\([^)]*\)")
    return [text if stringWidth(text, _layout.BOLD, 8) <= width - padding
            else Paragraph(_layout.escape(whole.sub(lambda m: m.group().replace(" ", "\u00a0"),
                                                    text)), style)
            for text, width in zip(texts, widths, strict=True)]
