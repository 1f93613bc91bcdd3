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

from planner import codes, parcel
from planner.render import _layout

if TYPE_CHECKING:
    from planner.spec import Lab, Study

__all__ = ["HANDLING", "HOST_DAMAGE", "file_name", "handling_notes", "render"]

HANDLING = (
    ("Do not mark, clean, cut or otherwise change the artefacts: every laboratory after you "
     "measures the same pieces. Measure them only as the run sheet and your method say, and "
     "keep their labels on."),
    "Keep the set in its packaging between measurements, in the storage condition on the labels.",
    ("If an artefact arrives damaged or is damaged here, say so under remarks in the table "
     "above and on the result form, and tell the host at once; measure it only if the host "
     "agrees."),
    ("Pass the set on by the date above even if a measurement failed: the dates of every "
     "laboratory after you depend on it. Send it in the packaging it came in, with every "
     "artefact, and tell the next laboratory that it is on its way."),
)
"""Handling notes of a participant's stop, in the order printed."""

HOST_DAMAGE = ("If an artefact is damaged, say so under remarks in the table above and on the "
               "result form, and tell the coordinator, who decides whether it stays in the "
               "round.")
"""The host's version of the damage note: it is the one the others would tell."""

_MM = 72.0 / 25.4


def file_name(station: dict[str, Any]) -> str:
    """Return the file name of a stop's sheet: ``handover.pdf``, the host's ``handover-<visit>.pdf``."""
    visit = station.get("visit")
    return f"handover-{visit}.pdf" if visit else "handover.pdf"


def handling_notes(station: dict[str, Any]) -> tuple[str, ...]:
    """Return the handling notes of a stop: the host reports damage to the coordinator, and
    the last stop passes nothing on."""
    notes = list(HANDLING)
    if station.get("visit") is not None:
        notes[2] = HOST_DAMAGE
    if not station.get("next_lab"):
        notes.pop(3)
    return tuple(notes)


def _party(lab: Lab | None, heading: str, st: dict[str, Any], *, contact: bool,
           note: str = "") -> list[Any]:
    from reportlab.platypus import Paragraph

    esc = _layout.escape
    out = [Paragraph(heading, st["label"])]
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


def _role(station: dict[str, Any]) -> tuple[str, str, str]:
    """Return (what happens here, first signer, second signer) of a stop."""
    visit = station.get("visit")
    if visit == "start":
        return ("The host prepares the set, checks it, measures it and sends it on.",
                "prepared and checked by (host)", "passed on by (host)")
    if visit == "end":
        return (("The set comes back to the host, which checks it and measures it a last time. "
                 "The route ends here."), "received back by (host)", "checked by (host)")
    if visit is not None:
        return (("The set comes back to the host, which checks it, measures it again to watch "
                 "for drift, and sends it on."), "received back by (host)", "passed on by (host)")
    return (("Check the set when it arrives, measure it as the run sheet says, check it again "
             "and pass it on."), "received by", "passed on by")


def _route_line(manifest: dict[str, Any], index: int) -> str:
    """Return the route as one line, this stop in bold."""
    parts = []
    for s in manifest["route"]:
        text = f"{s['index']} {_layout.escape(str(s['lab']))}"
        if s.get("visit"):
            text += f" ({_layout.escape(str(s['visit']))})"
        parts.append(f"<b>{text}</b>" if s["index"] == index else text)
    return " → ".join(parts)


def render(path: Path, study: Study, manifest: dict[str, Any], station: dict[str, Any], *,
           paper: str) -> Path:
    """Write the hand-over sheet of one stop (a ``manifest["route"]`` entry) to ``path``.

    Returns ``path``. Raises ValueError if the manifest is not a circulating set's.
    """
    from reportlab.platypus import CondPageBreak, KeepTogether, Paragraph, Spacer

    from planner.render.packing_list import SDS_NOTE

    if manifest.get("mode") != "circulate" or "route" not in manifest:
        raise ValueError("a hand-over sheet is for a circulating set; this round is not one")
    st = _layout.styles()
    esc = _layout.escape
    width = _layout.content_width(paper)
    route = manifest["route"]
    lab = study.lab(str(station["lab"]))
    host = study.lab(str(manifest["host"]))
    visit = station.get("visit")
    came = study.lab(str(station["received_from"])) if station.get("received_from") else None
    goes = study.lab(str(station["next_lab"])) if station.get("next_lab") else None
    following = next((s for s in route if s["index"] == station["index"] + 1), None)
    artefacts = sorted(manifest["artefacts"])
    what, first_signer, second_signer = _role(station)
    stop_name = f"stop {station['index']} of {len(route)}" + (f", {visit}" if visit else "")

    story: list[Any] = [
        Paragraph("Hand-over sheet", st["title"]),
        Paragraph(f"Circulating set of round {esc(manifest['round'])} of "
                  f"{esc(study.study.title)}: <b>{esc(lab.name)}</b>, {esc(stop_name)}. "
                  f"{esc(what)}", st["lead"]),
    ]
    if visit == "start":
        left = _party(None, "received from", st, contact=False,
                      note="the set starts here: the host prepares it")
    else:
        assert came is not None
        left = _party(came, "received from", st, contact=False)
    if goes is None:
        right = _party(None, "pass on to", st, contact=False,
                       note="nobody: the route ends here and the set stays with the host")
    else:
        right = _party(goes, "pass on to", st, contact=True,
                       note="tell this contact when the set leaves")
    story += [_layout.table(
        [[left, right]], [width / 2, width / 2], _layout.table_style(header=False, extra=[
            ("VALIGN", (0, 0), (-1, -1), "TOP"), ("LINEBELOW", (0, 0), (-1, -1), 0, "#ffffff"),
            ("LEFTPADDING", (0, 0), (-1, -1), 0)]))]

    dates = [["arrives (expected)", station["arrive"]],
             ["test from", station["test_start"]],
             ["test until", station["test_end"]]]
    if station.get("pass_on"):
        dates.append(["pass on by", (f"{station['pass_on']}  (hand it to the carrier on this "
                                     "day at the latest)")])
        if following is not None:
            days = following["transit_days"]
            dates.append([f"arrives at {following['lab']} (expected)",
                          (f"{following['arrive']}, after {days} working "
                           f"day{'s' if days != 1 else ''} in transit")])
    else:
        dates.append(["pass on by", "the set stays with the host"])
    dates.append(["results due", manifest["dates"].get("results_due", "")])
    story += [Paragraph("Dates", st["h2"]), _layout.table(
        dates, [48 * _MM, width - 48 * _MM], _layout.table_style(
            header=False, extra=[("FONT", (0, 0), (0, -1), _layout.BOLD, 8.5)])),
        Spacer(1, 1.5 * _MM),
        Paragraph("Route: " + _route_line(manifest, int(station["index"])), st["small"]),
        Paragraph(f"Round fingerprint <font face='{_layout.MONO_REGULAR}'>"
                  f"{_layout.grouped_fingerprint(manifest['fingerprint'])}</font>, the same as "
                  "on the run sheet and the result form.", st["small"])]

    box = 3.6 * _MM
    if visit == "start":
        head = ["artefact", "prepared: OK", "remarks", "passed on: OK", "remarks"]
    elif goes is None:
        head = ["artefact", "received: OK", "remarks on arrival", "", ""]
    else:
        head = ["artefact", "received: OK", "remarks on arrival", "passed on: OK",
                "remarks on leaving"]
    leaving = goes is not None
    rows: list[list[Any]] = [head[:5] if leaving else head[:3]]
    for code in artefacts:
        row = [codes.format(code), _layout.check_box(box), ""]
        rows.append(row + [_layout.check_box(box), ""] if leaving else row)
    widths = [0.22, 0.13, 0.26, 0.13, 0.26] if leaving else [0.22, 0.13, 0.65]
    style: list[tuple[Any, ...]] = [
        ("FONT", (0, 1), (0, -1), _layout.MONO, 10.5), ("ALIGN", (1, 0), (1, -1), "CENTER"),
        ("TOPPADDING", (0, 1), (-1, -1), 5), ("BOTTOMPADDING", (0, 1), (-1, -1), 5)]
    if leaving:
        style += [("ALIGN", (3, 0), (3, -1), "CENTER"),
                  ("LINEAFTER", (2, 1), (2, -1), 0.4, _layout.RULE)]
    story += [Paragraph("Artefacts", st["h2"]),
              Paragraph(f"<b>{len(artefacts)} artefacts</b> travel together. Tick each one "
                        "when the set arrives" + (" and again before it leaves" if leaving
                                                   else "") + "; note scratches, cracks, "
                        "marks or a missing label.", st["body"]),
              Spacer(1, 2 * _MM),
              _layout.table(rows, [w * width for w in widths],
                            _layout.table_style(extra=style), repeatRows=1)]

    story.append(KeepTogether([
        Paragraph("Signatures", st["h2"]),
        _layout.sign_lines(width, (first_signer, second_signer))]))

    story += [CondPageBreak(45 * _MM),
              Paragraph("Handling: read before you open the set", st["h2"])]
    story += [Paragraph(esc(text), st["bullet"], bulletText="•")
              for text in handling_notes(station)]
    story.append(Paragraph(f"Store every artefact of the set: <b>{esc(parcel.storage(study))}"
                           "</b>.", st["body"]))
    hazards = parcel.cautions(study)
    if hazards:
        story.append(Paragraph("Every label of the set carries the hazard words of all its "
                               "artefacts, so that no label tells them apart: handle every "
                               "artefact with all the cautions below.", st["body"]))
    story += _layout.hazard_cautions(
        hazards, none_text="No artefact of this set carries a hazard word.")
    story.append(Paragraph(SDS_NOTE, st["small"]))
    if visit is None:
        story += [Spacer(1, 3 * _MM), Paragraph(
            f"Questions about the set: the host, {esc(host.name)}, {esc(host.contact.name)}"
            + (f", {esc(host.contact.email)}" if host.contact.email else "") + ".",
            st["small"])]

    key = station.get("key") or lab.id
    running = _layout.Running(study.id, study.study.title, manifest["round"],
                              f"hand-over · {key}")
    return _layout.build(path, story, paper=paper, running=running,
                         title=f"hand-over sheet {key}, {study.id} round {manifest['round']}")
