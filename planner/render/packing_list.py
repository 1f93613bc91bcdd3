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

from planner import codes, language, parcel
from planner.render import _layout

if TYPE_CHECKING:
    from planner.language import Texts
    from planner.spec import Lab, Study

__all__ = ["hazard_section", "render", "sign_heads"]

_MM = 72.0 / 25.4


def _address(lab: Lab, heading: str, st: dict[str, Any]) -> list[Any]:
    from reportlab.platypus import Paragraph

    esc = _layout.escape
    lines = [f"<b>{esc(lab.name)}</b>", *(esc(line) for line in lab.address)]
    contact = ", ".join(esc(x) for x in (lab.contact.name, lab.contact.email, lab.contact.phone)
                        if x)
    return [Paragraph(esc(heading), st["label"]), Paragraph("<br/>".join(lines), st["body"]),
            Paragraph(contact, st["small"])]


def render(path: Path, study: Study, manifest: dict[str, Any], lab_id: str, *,
           paper: str) -> Path:
    """Write the packing list of ``lab_id``'s parcel to ``path``; return ``path``.

    Built from the manifest alone, without the key: it lists codes, never which material a
    code is, and gives one storage text and the cautions of every material of the round, the
    same on every laboratory's list, so that none of them singles a unit out. Written in the
    laboratory's language.
    """
    from reportlab.pdfbase.pdfmetrics import stringWidth
    from reportlab.platypus import KeepTogether, Paragraph, Spacer

    st = _layout.styles()
    esc = _layout.escape
    lab = study.lab(lab_id)
    t = language.texts(language.of(lab))
    host = study.lab(manifest["host"])
    entry = manifest["labs"][lab_id]
    dates = manifest["dates"]
    units = sorted(({"code": code, "trial": trial}
                    for trial, run in enumerate(entry["trials"], start=1) for code in run),
                   key=lambda u: u["code"])
    width = _layout.content_width(paper)

    story: list[Any] = [
        Paragraph(esc(t("packing_list.title")), st["title"]),
        Paragraph(t.markup("packing_list.lead", lab=lab.name, round=manifest["round"],
                           title=study.study.title), st["lead"]),
    ]
    addresses = _layout.table(
        [[_address(host, t("packing_list.from"), st), _address(lab, t("packing_list.to"), st)]],
        [width / 2, width / 2],
        _layout.table_style(header=False, extra=[
        ("VALIGN", (0, 0), (-1, -1), "TOP"), ("LINEBELOW", (0, 0), (-1, -1), 0, "#ffffff"),
        ("LEFTPADDING", (0, 0), (-1, -1), 0)]))
    story += [addresses, Spacer(1, 5 * _MM)]

    date_rows = [
        [t("packing_list.ship"), entry.get("ship", "")],
        [t("packing_list.arrive"), entry.get("arrive", "")],
        [t("packing_list.window"), t("common.date_range", start=dates.get("test_start", ""),
                                     end=dates.get("test_end", ""))],
        [t("packing_list.due"), dates.get("results_due", "")],
    ]
    # As wide as the longest label in the laboratory's words, and no less than 40 mm.
    labels = max(40 * _MM, max(stringWidth(row[0], _layout.BOLD, 8.5) for row in date_rows) + 10)
    date_table = _layout.table(date_rows, [labels, width - labels], _layout.table_style(
        header=False, extra=[("FONT", (0, 0), (0, -1), _layout.BOLD, 8.5)]))
    story += [Paragraph(esc(t("common.dates_heading")), st["h2"]), date_table,
              Paragraph(esc(t("common.fingerprint_heading")), st["h2"]),
              Paragraph(_layout.grouped_fingerprint(manifest["fingerprint"]), st["mono"]),
              Paragraph(esc(t("packing_list.fingerprint_note")), st["small"])]

    story += [Paragraph(esc(t("packing_list.contents_heading")), st["h2"]),
              Paragraph(t.markup("packing_list.contents", count=len(units),
                                 trials=manifest["trials"]), st["body"]),
              Spacer(1, 2.5 * _MM)]
    box = 3.6 * _MM
    rows: list[list[Any]] = [[t("packing_list.col_code"), t("packing_list.col_trial"),
                              t("packing_list.col_packed"), t("packing_list.col_received")]]
    for unit in units:
        rows.append([codes.format(unit["code"]), unit["trial"],
                     _layout.check_box(box), _layout.check_box(box)])
    contents = _layout.table(rows, [0.34 * width, 0.2 * width, 0.23 * width, 0.23 * width],
                             _layout.table_style(extra=[
                                 ("FONT", (0, 1), (0, -1), _layout.MONO, 10),
                                 ("ALIGN", (1, 0), (-1, -1), "CENTER")]), repeatRows=1)
    story.append(contents)

    story += [Paragraph(esc(t("packing_list.storage_heading")), st["h2"]),
              Paragraph(t.markup("packing_list.storage", storage=parcel.storage(study)),
                        st["body"]),
              Paragraph(esc(t("packing_list.closed")), st["body"])]
    hazards = parcel.cautions(study)
    if hazards:
        story.append(Paragraph(t.markup("packing_list.hazard_all"), st["body"]))
    story += hazard_section(hazards, t, none_text=t("packing_list.no_hazard"))
    signers = (t("packing_list.packed_by"), t("packing_list.checked_by"),
               t("packing_list.received_by"))
    story.append(KeepTogether([
        Paragraph(esc(t("common.signatures_heading")), st["h2"]),
        _layout.sign_lines(width, [esc(s) for s in signers], row_height=11 * _MM,
                           columns=(0.28, 0.30, 0.16, 0.26), heads=sign_heads(t))]))

    running = _layout.Running(study.id, study.study.title, manifest["round"],
                              t("packing_list.running", lab=lab.id),
                              round_text=t.template("common.round"),
                              page_text=t.template("common.page"))
    return _layout.build(path, story, paper=paper, running=running,
                         title=t("packing_list.pdf_title", lab=lab.id, study=study.id,
                                 round=manifest["round"]))


def hazard_section(hazards: dict[str, str], t: Texts, *, none_text: str) -> list[Any]:
    """Return the hazard cautions heading and bullets, then the note that the safety data
    sheet comes first, in the language of ``t`` (the hazard words are the study's)."""
    from reportlab.platypus import Paragraph

    st = _layout.styles()
    return [*_layout.hazard_cautions(hazards, none_text=_layout.escape(none_text),
                                     heading=t("common.hazard_heading")),
            Paragraph(_layout.escape(t("common.sds_note")), st["small"])]


def sign_heads(t: Texts) -> tuple[str, str, str]:
    """Return the headings of a table of signatures: name, date, signature."""
    return t("common.name"), t("common.date"), t("common.signature")
