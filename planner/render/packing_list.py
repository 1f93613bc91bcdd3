"""The packing list of one laboratory's parcel.

From host to laboratory with both addresses, the dates of the round for that
laboratory, the round fingerprint, and a table of the parcel's codes sorted by
code, so that the order in which the host prepared the materials cannot be
read from it. Spares are not in any parcel: they stay with the host, which sends
one when a laboratory reports a unit damaged (``planner.spares``), so a
laboratory holds nothing of which it could learn the materials by asking for
spares. Nothing on it names a material or tells units apart: every unit
of the round is stored and handled alike (``planner.parcel``), with one storage
text and the cautions of every material, as every label says.
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Any

from planner import codes, parcel
from planner.render import _layout

if TYPE_CHECKING:
    from planner.spec import Lab, Study

__all__ = ["SDS_NOTE", "render"]

SDS_NOTE = ("These notes do not replace the safety data sheet of the material or your local "
            "rules; where they differ, the safety data sheet and local rules apply.")

_MM = 72.0 / 25.4


def _address(lab: Lab, heading: str, st: dict[str, Any]) -> list[Any]:
    from reportlab.platypus import Paragraph

    esc = _layout.escape
    lines = [f"<b>{esc(lab.name)}</b>", *(esc(line) for line in lab.address)]
    contact = ", ".join(esc(x) for x in (lab.contact.name, lab.contact.email, lab.contact.phone)
                        if x)
    return [Paragraph(heading, st["label"]), Paragraph("<br/>".join(lines), st["body"]),
            Paragraph(contact, st["small"])]


def render(path: Path, study: Study, manifest: dict[str, Any], lab_id: str, *,
           paper: str) -> Path:
    """Write the packing list of ``lab_id``'s parcel to ``path``; return ``path``.

    Built from the manifest alone, without the key: it lists codes, never which material a
    code is, and gives one storage text and the cautions of every material of the round, the
    same on every laboratory's list, so that none of them singles a unit out.
    """
    from reportlab.platypus import KeepTogether, Paragraph, Spacer

    st = _layout.styles()
    esc = _layout.escape
    lab = study.lab(lab_id)
    host = study.lab(manifest["host"])
    entry = manifest["labs"][lab_id]
    dates = manifest["dates"]
    units = sorted(({"code": code, "trial": trial}
                    for trial, run in enumerate(entry["trials"], start=1) for code in run),
                   key=lambda u: u["code"])
    width = _layout.content_width(paper)

    story: list[Any] = [
        Paragraph("Packing list", st["title"]),
        Paragraph(f"Parcel for <b>{esc(lab.name)}</b> in round {esc(manifest['round'])} of "
                  f"{esc(study.study.title)}. Check every unit against this list when you pack "
                  "it and again when it arrives.", st["lead"]),
    ]
    addresses = _layout.table(
        [[_address(host, "from (host)", st), _address(lab, "to", st)]], [width / 2, width / 2],
        _layout.table_style(header=False, extra=[
        ("VALIGN", (0, 0), (-1, -1), "TOP"), ("LINEBELOW", (0, 0), (-1, -1), 0, "#ffffff"),
        ("LEFTPADDING", (0, 0), (-1, -1), 0)]))
    story += [addresses, Spacer(1, 5 * _MM)]

    date_rows = [
        ["ship date", entry.get("ship", "")],
        ["expected arrival", entry.get("arrive", "")],
        ["test window", f"{dates.get('test_start', '')} to {dates.get('test_end', '')}"],
        ["results due", dates.get("results_due", "")],
    ]
    date_table = _layout.table(date_rows, [40 * _MM, width - 40 * _MM], _layout.table_style(
        header=False, extra=[("FONT", (0, 0), (0, -1), _layout.BOLD, 8.5)]))
    story += [Paragraph("Dates", st["h2"]), date_table,
              Paragraph("Round fingerprint", st["h2"]),
              Paragraph(_layout.grouped_fingerprint(manifest["fingerprint"]), st["mono"]),
              Paragraph("The SHA-256 of the sealed decoding key, fixed before shipping. Keep "
                        "this page: when the key is opened, its fingerprint must be the same.",
                        st["small"])]

    story += [Paragraph("Contents", st["h2"]),
              Paragraph(f"<b>{len(units)} units</b> for testing ({manifest['trials']} trials). "
                        "Spares stay with the host: if a unit is lost or damaged, tell the "
                        "coordinator its code, and the host sends a replacement unit.",
                        st["body"]),
              Spacer(1, 2.5 * _MM)]
    box = 3.6 * _MM
    rows: list[list[Any]] = [["code", "trial", "packed", "received"]]
    for unit in units:
        rows.append([codes.format(unit["code"]), unit["trial"],
                     _layout.check_box(box), _layout.check_box(box)])
    contents = _layout.table(rows, [0.34 * width, 0.2 * width, 0.23 * width, 0.23 * width],
                             _layout.table_style(extra=[
                                 ("FONT", (0, 1), (0, -1), _layout.MONO, 10),
                                 ("ALIGN", (1, 0), (-1, -1), "CENTER")]), repeatRows=1)
    story.append(contents)

    story += [Paragraph("Storage and handling", st["h2"]),
              Paragraph(f"Store every unit: <b>{esc(parcel.storage(study))}</b>.", st["body"]),
              Paragraph("Keep units closed until they are tested; do not open, mix or split "
                        "them before the test. Report a damaged unit to the coordinator.",
                        st["body"])]
    hazards = parcel.cautions(study)
    if hazards:
        story.append(Paragraph(
            "Every label of this round carries the hazard words of all its materials, so that "
            "no label tells which units hold which material: a word on a label does not mean "
            "that unit is hazardous, but handle <b>every</b> unit of the parcel with all the "
            "cautions below.", st["body"]))
    story += _layout.hazard_cautions(
        hazards, none_text="No material of this round carries a hazard word.")
    story.append(Paragraph(SDS_NOTE, st["small"]))
    signers = ("packed by (host)", "checked by (host)", "received by (laboratory)")
    story.append(KeepTogether([
        Paragraph("Signatures", st["h2"]),
        _layout.sign_lines(width, signers, row_height=11 * _MM,
                           columns=(0.28, 0.30, 0.16, 0.26))]))

    running = _layout.Running(study.id, study.study.title, manifest["round"],
                              f"packing list · {lab.id}")
    return _layout.build(path, story, paper=paper, running=running,
                         title=f"packing list {lab.id}, {study.id} round {manifest['round']}")
