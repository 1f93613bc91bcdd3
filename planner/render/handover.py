"""The hand-over sheet of one stop of a circulating set: what a technician signs for.

A circulating set travels from laboratory to laboratory, so in place of a
packing list each stop gets a sheet that says where the set comes from, where
it goes next (with the contact to tell that a parcel is on its way), the
stop's dates, and the artefact codes with boxes to tick when the set arrives
and again when it leaves. The host gets one sheet per stop: at the start it
prepares and sends the set, in the middle it receives it back and sends it on,
at the end it receives it back.

Built from the public manifest and the spec alone: no key, so no material.
Every artefact is stored and handled alike (``planner.parcel``): one storage
text and the cautions of every material, as every label says, deferring to the
safety data sheet and local rules.
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Any

from planner import codes, language, parcel
from planner.render import _layout

if TYPE_CHECKING:
    from planner.language import Texts
    from planner.spec import Lab, Study

__all__ = ["file_name", "handling_notes", "render"]

_MM = 72.0 / 25.4


def file_name(station: dict[str, Any]) -> str:
    """Return the file name of a stop's sheet: ``handover.pdf``, the host's ``handover-<visit>.pdf``."""
    visit = station.get("visit")
    return f"handover-{visit}.pdf" if visit else "handover.pdf"


def handling_notes(station: dict[str, Any], t: Texts) -> tuple[str, ...]:
    """Return the handling notes of a stop in the order printed: the host reports damage to
    the coordinator (the one the others would tell), and the last stop passes nothing on."""
    keys = ["keep_unchanged", "keep_packed",
            "damage_host" if station.get("visit") is not None else "damage"]
    if station.get("next_lab"):
        keys.append("pass_on_in_time")
    return tuple(t(f"handover.{key}") for key in keys)


def _party(lab: Lab | None, heading: str, st: dict[str, Any], *, contact: bool,
           note: str = "") -> list[Any]:
    from reportlab.platypus import Paragraph

    esc = _layout.escape
    out = [Paragraph(esc(heading), st["label"])]
    if lab is None:
        return [*out, Paragraph(esc(note), st["body"])]
    lines = [f"<b>{esc(lab.name)}</b>", *(esc(line) for line in lab.address)]
    out.append(Paragraph("<br/>".join(lines), st["body"]))
    if contact:
        who = ", ".join(esc(x) for x in (lab.contact.name, lab.contact.email, lab.contact.phone)
                        if x)
        out.append(Paragraph(who, st["small"]))
    if note:
        out.append(Paragraph(esc(note), st["small"]))
    return out


def _role(station: dict[str, Any], t: Texts) -> tuple[str, str, str]:
    """Return (what happens here, first signer, second signer) of a stop."""
    visit = station.get("visit")
    if visit == "start":
        return (t("handover.role_start"), t("handover.prepared_by_host"),
                t("handover.passed_on_by_host"))
    if visit == "end":
        return (t("handover.role_end"), t("handover.received_back_by_host"),
                t("handover.checked_by_host"))
    if visit is not None:
        return (t("handover.role_middle"), t("handover.received_back_by_host"),
                t("handover.passed_on_by_host"))
    return t("handover.role_stop"), t("handover.received_by"), t("handover.passed_on_by")


def _route_line(manifest: dict[str, Any], index: int, t: Texts) -> str:
    """Return the route as one line, this stop in bold."""
    parts = []
    for s in manifest["route"]:
        text = f"{s['index']} {_layout.escape(str(s['lab']))}"
        if s.get("visit"):
            visit = t(f"common.visit.{s['visit']}")
            text += f" ({_layout.escape(visit)})"
        parts.append(f"<b>{text}</b>" if s["index"] == index else text)
    return " → ".join(parts)


def render(path: Path, study: Study, manifest: dict[str, Any], station: dict[str, Any], *,
           paper: str) -> Path:
    """Write the hand-over sheet of one stop (a ``manifest["route"]`` entry) to ``path``, in
    the language of the stop's laboratory.

    Returns ``path``. Raises ValueError if the manifest is not a circulating set's.
    """
    from reportlab.platypus import CondPageBreak, KeepTogether, Paragraph, Spacer

    from planner.render.packing_list import hazard_section, sign_heads

    if manifest.get("mode") != "circulate" or "route" not in manifest:
        raise ValueError("a hand-over sheet is for a circulating set; this round is not one")
    st = _layout.styles()
    esc = _layout.escape
    width = _layout.content_width(paper)
    route = manifest["route"]
    lab = study.lab(str(station["lab"]))
    t = language.texts(language.of(lab))
    host = study.lab(str(manifest["host"]))
    visit = station.get("visit")
    came = study.lab(str(station["received_from"])) if station.get("received_from") else None
    goes = study.lab(str(station["next_lab"])) if station.get("next_lab") else None
    following = next((s for s in route if s["index"] == station["index"] + 1), None)
    artefacts = sorted(manifest["artefacts"])
    what, first_signer, second_signer = _role(station, t)
    stop_name = (t("handover.stop_visit", index=station["index"], count=len(route),
                   visit=t(f"common.visit.{visit}")) if visit else
                 t("handover.stop", index=station["index"], count=len(route)))

    story: list[Any] = [
        Paragraph(esc(t("handover.title")), st["title"]),
        Paragraph(t.markup("handover.lead", round=manifest["round"], title=study.study.title,
                           lab=lab.name, stop=stop_name, what=what), st["lead"]),
    ]
    if visit == "start":
        left = _party(None, t("handover.received_from"), st, contact=False,
                      note=t("handover.starts_here"))
    else:
        assert came is not None
        left = _party(came, t("handover.received_from"), st, contact=False)
    if goes is None:
        right = _party(None, t("handover.pass_on_to"), st, contact=False,
                       note=t("handover.ends_here"))
    else:
        right = _party(goes, t("handover.pass_on_to"), st, contact=True,
                       note=t("handover.tell_contact"))
    story += [_layout.table(
        [[left, right]], [width / 2, width / 2], _layout.table_style(header=False, extra=[
            ("VALIGN", (0, 0), (-1, -1), "TOP"), ("LINEBELOW", (0, 0), (-1, -1), 0, "#ffffff"),
            ("LEFTPADDING", (0, 0), (-1, -1), 0)]))]

    dates = [[t("handover.arrives"), station["arrive"]],
             [t("handover.test_from"), station["test_start"]],
             [t("handover.test_until"), station["test_end"]]]
    if station.get("pass_on"):
        dates.append([t("handover.pass_on_by"),
                      t("handover.pass_on_date", date=station["pass_on"])])
        if following is not None:
            days = following["transit_days"]
            dates.append([t("handover.arrives_at", lab=following["lab"]),
                          t("handover.transit_one" if days == 1 else "handover.transit_many",
                            date=following["arrive"], days=days)])
    else:
        dates.append([t("handover.pass_on_by"), t("handover.stays")])
    dates.append([t("handover.due"), manifest["dates"].get("results_due", "")])
    shown = language.Markup(f"<font face='{_layout.MONO_REGULAR}'>"
                            f"{_layout.grouped_fingerprint(manifest['fingerprint'])}</font>")
    story += [Paragraph(esc(t("common.dates_heading")), st["h2"]), _layout.table(
        [[_cell(label, 48 * _MM, st, label=True), _cell(value, width - 48 * _MM, st)]
         for label, value in dates],
        [48 * _MM, width - 48 * _MM], _layout.table_style(
            header=False, extra=[("FONT", (0, 0), (0, -1), _layout.BOLD, 8.5)])),
        Spacer(1, 1.5 * _MM),
        Paragraph(t.markup("handover.route", route=language.Markup(
            _route_line(manifest, int(station["index"]), t))), st["small"]),
        Paragraph(t.markup("handover.fingerprint", fingerprint=shown), st["small"])]

    box = 3.6 * _MM
    artefact, remarks = t("handover.col_artefact"), t("handover.col_remarks")
    if visit == "start":
        head = [artefact, t("handover.col_prepared"), remarks, t("handover.col_passed"), remarks]
    elif goes is None:
        head = [artefact, t("handover.col_received"), t("handover.col_remarks_arrival"), "", ""]
    else:
        head = [artefact, t("handover.col_received"), t("handover.col_remarks_arrival"),
                t("handover.col_passed"), t("handover.col_remarks_leaving")]
    leaving = goes is not None
    widths = [0.20, 0.15, 0.25, 0.15, 0.25] if leaving else [0.20, 0.15, 0.65]
    rows: list[list[Any]] = [[_cell(h, w * width, st, head=True)
                              for h, w in zip(head, widths, strict=False)]]
    for code in artefacts:
        row = [codes.format(code), _layout.check_box(box), ""]
        rows.append(row + [_layout.check_box(box), ""] if leaving else row)
    style: list[tuple[Any, ...]] = [
        ("FONT", (0, 1), (0, -1), _layout.MONO, 10.5), ("ALIGN", (1, 0), (1, -1), "CENTER"),
        ("TOPPADDING", (0, 1), (-1, -1), 5), ("BOTTOMPADDING", (0, 1), (-1, -1), 5)]
    if leaving:
        style += [("ALIGN", (3, 0), (3, -1), "CENTER"),
                  ("LINEAFTER", (2, 1), (2, -1), 0.4, _layout.RULE)]
    story += [Paragraph(esc(t("handover.artefacts_heading")), st["h2"]),
              Paragraph(t.markup("handover.artefacts_leaving" if leaving
                                 else "handover.artefacts_staying", count=len(artefacts)),
                        st["body"]),
              Spacer(1, 2 * _MM),
              _layout.table(rows, [w * width for w in widths],
                            _layout.table_style(extra=style), repeatRows=1)]

    story.append(KeepTogether([
        Paragraph(esc(t("common.signatures_heading")), st["h2"]),
        _layout.sign_lines(width, (esc(first_signer), esc(second_signer)),
                           heads=sign_heads(t))]))

    story += [CondPageBreak(45 * _MM),
              Paragraph(esc(t("handover.handling_heading")), st["h2"])]
    story += [Paragraph(esc(text), st["bullet"], bulletText="•")
              for text in handling_notes(station, t)]
    story.append(Paragraph(t.markup("handover.storage", storage=parcel.storage(study)),
                           st["body"]))
    hazards = parcel.cautions(study)
    if hazards:
        story.append(Paragraph(t.markup("handover.hazard_all"), st["body"]))
    story += hazard_section(hazards, t, none_text=t("handover.no_hazard"))
    if visit is None:
        contact = ", ".join(x for x in (host.contact.name, host.contact.email) if x)
        story += [Spacer(1, 3 * _MM), Paragraph(
            t.markup("handover.questions", host=host.name, contact=contact), st["small"])]

    key = station.get("key") or lab.id
    running = _layout.Running(study.id, study.study.title, manifest["round"],
                              t("handover.running", key=key),
                              round_text=t.template("common.round"),
                              page_text=t.template("common.page"))
    return _layout.build(path, story, paper=paper, running=running,
                         title=t("handover.pdf_title", key=key, study=study.id,
                                 round=manifest["round"]))


def _cell(text: str, width: float, st: dict[str, Any], *, head: bool = False,
          label: bool = False) -> Any:
    """Return ``text`` as a table cell: plain where it fits on one line, else a paragraph that
    wraps (a longer word of another language). ``head``: a heading cell; ``label``: the bold
    first column of the dates."""
    from reportlab.lib.colors import HexColor
    from reportlab.lib.styles import ParagraphStyle
    from reportlab.pdfbase.pdfmetrics import stringWidth
    from reportlab.platypus import Paragraph

    font, size = ((_layout.BOLD, 8) if head else (_layout.BOLD, 8.5) if label
                  else (_layout.FONT, 9))
    if stringWidth(text, font, size) <= width - 8:  # table_style pads 4 pt either side
        return text
    style = ParagraphStyle("cell-wrap", parent=st["cell"], fontName=font, fontSize=size,
                           leading=size + 1.5,
                           textColor=HexColor(_layout.ACCENT if head else _layout.INK))
    return Paragraph(_layout.escape(text), style)
