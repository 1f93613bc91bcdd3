"""The performance letter of one laboratory: its own results and scores, the others anonymous.

A letter names only the laboratory it is addressed to. Every other
participant appears under its participant code of this round (``P-07``),
drawn from the round secret, so the codes change from round to round and a
laboratory cannot follow another through the rounds. The host is not marked
among the others (everyone knows who shipped the parcels, so marking it would
name it), and only the host's own letter gives the consensus without the host:
with it any participant could leave out each code in turn, recompute, and find
the host's code. The host's letter says that its results were prepared in-house.
Numbers are written with the laboratory's decimal sign, and every sentence in the
laboratory's language; what the evaluation wrote in words (where sigma_pt comes
from, why a material has no band) is put in that language by matching it against
the English texts, and stays as written if it does not match.

Contents: the round, how the decoding key was opened as the ledger shows it
(forced before every result was in, or not; when it was decrypted while sealed)
with its full fingerprint, the assigned values, the laboratory's scores with
their bands, its results unit by unit, a chart of everyone's scores with its
own marked, and for rounds of up to ``TABLE_LABS`` participants a table of the
others' scores by participant code.

A study with several measurands gets one letter per laboratory all the same: after
the key, a table of its scores by measurand, then the parts from its scores on once
per measurand under the measurand's heading. A study in the single-measurand form
reads as it always has, without measurand headings.
"""

from __future__ import annotations

import re
import string
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from functools import cache
from pathlib import Path
from typing import TYPE_CHECKING, Any

from planner import codes, language
from planner.render import _layout
from planner.results import SHORTHAND_ID, is_shorthand, measurand_ids, measurand_view

if TYPE_CHECKING:
    from planner.language import Texts
    from planner.results import Unblinded

__all__ = ["Addressee", "render", "render_all", "TABLE_LABS", "anonymous_view",
           "anonymous_views"]

TABLE_LABS = 40
"""Largest round whose letters list every other participant's scores in a table."""

_MM = 72.0 / 25.4


@dataclass(frozen=True, slots=True)
class Addressee:
    """Who a letter goes to: laboratory id, name, address lines, contact, decimal sign and
    language (``planner.language``)."""

    lab: str
    name: str
    address: tuple[str, ...] = ()
    contact: str = ""
    decimal: str = "point"
    language: str = language.DEFAULT


def _num(v: Any, digits: int = 4, comma: bool = False) -> str:
    if v is None:
        return "-"
    text = f"{v:.{digits}g}" if isinstance(v, float) else str(v)
    return text.replace(".", ",") if comma else text


def anonymous_views(statistics: Mapping[str, Any]) -> dict[str, dict[str, Any]]:
    """Return ``anonymous_view`` of each measurand of a round's statistics, by measurand id."""
    return {mid: anonymous_view(measurand_view(statistics, mid))
            for mid in measurand_ids(statistics)}


def anonymous_view(statistics: Mapping[str, Any]) -> dict[str, Any]:
    """Return what every letter shares of one measurand: per material the scores under
    participant codes.

    ``statistics`` is one measurand's view (``results.measurand_view``). ``{"codes":
    [participant codes sorted], "materials": {m: {"name": "z" or "z'", "scores": {code:
    score}}}}``; no laboratory id appears in it.
    """
    codes_of = statistics["participants"]
    out: dict[str, Any] = {"codes": sorted(codes_of.values()), "materials": {}}
    for m in statistics["materials"]:
        sc = statistics["scores"].get(m, {})
        if "labs" not in sc or not sc.get("banded"):
            continue
        zp = bool(sc.get("use_z_prime"))
        out["materials"][m] = {
            "name": "z'" if zp else "z",
            "scores": {codes_of[lab]: (e.get("z_prime") if zp else e.get("z"))
                       for lab, e in sc["labs"].items() if lab in codes_of},
            "bands": {codes_of[lab]: e.get("band") for lab, e in sc["labs"].items()
                      if lab in codes_of},
        }
        out["materials"][m]["all"] = list(out["materials"][m]["scores"].values())
    out["cache"] = {}
    return out


def _story(statistics: Mapping[str, Any], rows: Sequence[Unblinded], to: Addressee,
           views: Mapping[str, Mapping[str, Any]], paper: str, t: Texts) -> list[Any]:
    from reportlab.platypus import Paragraph, Spacer

    shorthand = is_shorthand(statistics)
    s = measurand_view(statistics, SHORTHAND_ID) if shorthand else statistics
    st = _layout.styles()
    esc = _layout.escape
    n_labs = len(s["participants"])

    section, overview, results = _parts(s, to, paper, t)

    address = "<br/>".join(esc(line) for line in (to.name, *to.address))
    story: list[Any] = [
        Paragraph(esc(t("letter.title")), st["title"]),
        Paragraph(address + ("<br/>" + t.markup("letter.attn", contact=to.contact)
                             if to.contact else ""), st["body"]),
        Spacer(1, 4 * _MM),
        Paragraph(t.markup("letter.lead", title=s["title"], round=s["round"], labs=n_labs,
                           materials=len(s["materials"]), trials=s["trials"],
                           measurand=s["measurand"], unit=s["unit"], lab=to.lab,
                           you=t("letter.you")) if shorthand else
                  t.markup("letter.lead_measurands", title=s["title"], round=s["round"],
                           labs=n_labs, materials=len({m for b in s["measurands"].values()
                                                       for m in b.get("measured_on", ())}),
                           trials=s["trials"], count=len(s["measurands"]),
                           measurands=t("common.semicolon").join(
                               t("letter.measurand_item", measurand=mid, name=b["name"],
                                 unit=b["unit"]) for mid, b in s["measurands"].items()),
                           lab=to.lab, you=t("letter.you")), st["lead"]),
    ]
    if to.lab == s["host"]:
        story.append(Paragraph(t.markup("letter.in_house"), st["body"]))
    story += _key_section(s, to, t)
    if shorthand:
        story += section(s, rows, views[SHORTHAND_ID])
    else:
        story += overview(statistics)
        heading = _measurand_style()
        for mid in measurand_ids(statistics):
            sv = measurand_view(statistics, mid)
            story.append(Paragraph(esc(t("letter.measurand_heading", measurand=mid,
                                         name=sv["measurand"], unit=sv["unit"])), heading))
            story += section(sv, [r for r in rows if r.measurand == mid], views[mid],
                             own_results=False)
        story += results(statistics, rows)
    story.append(Spacer(1, 4 * _MM))
    story.append(Paragraph(t.markup("letter.issued", organiser=s.get("organiser")
                                    or t("letter.coordinator")), st["small"]))
    return story


def _measurand_style() -> Any:
    """The style of a measurand's heading in a letter: above the sections' headings."""
    from reportlab.lib.styles import ParagraphStyle

    return ParagraphStyle("measurand", parent=_layout.styles()["h2"], fontSize=13.5,
                          leading=17, spaceBefore=10)


def _parts(s: Mapping[str, Any], to: Addressee, paper: str, t: Texts) -> Any:
    """Return the functions that write a letter's parts: ``part`` (one measurand's scores,
    results and standing) and ``overview`` (the scores by measurand)."""
    from reportlab.platypus import KeepTogether, Paragraph, Spacer

    from planner.render import _charts

    st = _layout.styles()
    esc = _layout.escape
    width = _layout.content_width(paper)
    comma = to.decimal == "comma"
    me = s["participants"].get(to.lab, "")
    in_house = to.lab == s["host"]
    n_labs = len(s["participants"])

    def n(v: Any, digits: int = 4) -> str:
        return _num(v, digits, comma)

    def table(data: Sequence[Sequence[Any]], widths: Sequence[float],
              extra: Sequence[tuple[Any, ...]] = (), right_from: int = 1) -> Any:
        widths = _fit_columns(data, widths, width)
        head = [_head(h, w) for h, w in zip(data[0], widths, strict=False)]
        style = _layout.table_style(extra=[
            ("FONT", (0, 1), (-1, -1), _layout.FONT, 8),
            ("ALIGN", (right_from, 0), (-1, -1), "RIGHT"),
            ("TOPPADDING", (0, 0), (-1, -1), 2.2), ("BOTTOMPADDING", (0, 0), (-1, -1), 2.2),
            *extra])
        from planner.render import _tables

        return _tables.table([head, *data[1:]], widths, style, repeatRows=1)

    def _head(text: Any, column: float) -> Any:
        from reportlab.lib.colors import HexColor
        from reportlab.lib.styles import ParagraphStyle
        from reportlab.pdfbase.pdfmetrics import stringWidth

        if not isinstance(text, str) or stringWidth(text, _layout.BOLD, 8) <= column - _PAD:
            return text
        wrapped = ParagraphStyle("head-wrap", parent=st["cell"], fontName=_layout.BOLD,
                                 fontSize=8, leading=9.5, textColor=HexColor(_layout.ACCENT),
                                 alignment=2)
        return Paragraph(esc(text), wrapped)

    def bands(cells: Sequence[tuple[int, int, str | None]]) -> list[tuple[Any, ...]]:
        from reportlab.lib.colors import HexColor

        out = []
        for col, row, band in cells:
            colour = _charts.band_colour(band)
            if colour and band != "satisfactory":
                out.append(("BACKGROUND", (col, row), (col, row), HexColor(colour)))
        return out

    def band_word(band: str | None) -> str:
        return t(f"letter.band.{band}") if f"letter.band.{band}" in t.entries else (band or "-")

    said: set[str] = set()  # notes a letter gives once, under its first measurand

    def overview(statistics: Mapping[str, Any]) -> list[Any]:
        """The laboratory's scores by measurand: how many carry a band, how many are
        satisfactory, on which materials it is outside the band."""
        from reportlab.lib.styles import ParagraphStyle

        right = ParagraphStyle("cell8r", parent=st["cell"], fontSize=8, leading=9.6,
                               alignment=2)
        data: list[list[Any]] = [[t("letter.col_measurand"), t("letter.col_banded"),
                                  t("letter.band.satisfactory"), t("letter.col_outside")]]
        cells = []
        for mid in measurand_ids(statistics):
            sv = measurand_view(statistics, mid)
            mine = {m: sv["scores"].get(m, {}).get("labs", {}).get(to.lab)
                    for m in sv["materials"]}
            banded = {m: e for m, e in mine.items() if e and not e.get("reference")
                      and sv["scores"][m].get("banded")}
            outside = [m for m, e in banded.items()
                       if e.get("band") in ("questionable", "unsatisfactory")
                       or e.get("en_band") == "unsatisfactory"]
            good = sum(e.get("band") == "satisfactory" for e in banded.values())
            # The id and unit; the measurand's heading below gives its name. A list of
            # materials wraps when it is long.
            listed = ", ".join(outside) or "-"
            data.append([f"{mid} [{sv['unit']}]",
                         f"{len(banded)} / {len(sv.get('measured_on') or sv['materials'])}",
                         str(good) if banded else "-",
                         Paragraph(esc(listed), right) if len(listed) > 40 else listed])
            if outside:
                worst = ("unsatisfactory" if any(banded[m].get("band") == "unsatisfactory"
                                                 or banded[m].get("en_band") == "unsatisfactory"
                                                 for m in outside) else "questionable")
                cells.append((3, len(data) - 1, worst))
        return [Paragraph(esc(t("letter.overview_heading")), st["h2"]),
                table(data, [150, 60, 80, 190], [*bands(cells),
                                                  ("VALIGN", (0, 0), (-1, -1), "TOP"),
                                                  ("ALIGN", (0, 0), (0, -1), "LEFT")]),
                Paragraph(esc(t("letter.overview_note")), st["small"])]

    def section(s: Mapping[str, Any], rows: Sequence[Unblinded],
                view: Mapping[str, Any], own_results: bool = True) -> list[Any]:
        """One measurand's part of the letter: scores, results (unless ``own_results`` is
        False: a letter of several measurands lists them once, in ``results``), where the
        laboratory stands."""
        story: list[Any] = []
        mine = {m: s["scores"].get(m, {}).get("labs", {}).get(to.lab) for m in s["materials"]}
        own_rows = [r for r in rows if r.lab == to.lab]
        scored = any(r.value is not None for r in own_rows)
        if not scored:
            # Nothing to score: say so in words, not with a table of dashes or "0 of 0".
            text = t("letter.no_values") if own_rows else t("letter.no_results")
            story += [Paragraph(esc(t("letter.scores_heading")), st["h2"]),
                      Paragraph(f"<b>{esc(text)}</b>", st["body"])]
        else:
            story += [Paragraph(esc(t("letter.scores_heading")), st["h2"]),
                      Paragraph(esc(_verdict(s, mine, t, comma)), st["body"]), Spacer(1, 2 * _MM)]
        has_en = any(e and e.get("En") is not None for e in mine.values())
        head = [t("letter.col_material"), "x_pt", "u(x_pt)", "sigma_pt", t("letter.col_mean"),
                "D%", t("letter.col_score")] + (["En"] if has_en else []) + [t("letter.col_band")]
        data: list[list[Any]] = [head]
        cells = []
        for m in s["materials"]:
            sc = s["scores"].get(m, {})
            e = mine.get(m)
            if not e:
                data.append([m, n(sc.get("assigned_value")), "-", "-", t("letter.no_result"), "-",
                             "-"] + (["-"] if has_en else []) + ["-"])
                continue
            zp = bool(sc.get("use_z_prime"))
            score = e.get("z_prime") if zp else e.get("z")
            dp = e.get("D_percent")
            if e.get("reference"):
                shown, band = band_word("reference"), band_word("reference")
            elif sc.get("banded"):
                shown = f"{'z' + chr(39) if zp else 'z'} = {n(score, 3)}"
                band = band_word(e.get("band")) if e.get("band") else "-"
            else:
                shown, band = "-", t("letter.no_band")
            row = [m, n(sc.get("assigned_value")), n(sc.get("u_assigned_value"), 3),
                   n(sc.get("sigma_pt"), 3), n(e.get("mean")),
                   (f"{dp:+.1f}".replace(".", ",") if comma else f"{dp:+.1f}") if dp is not None
                   else "-", shown]
            if has_en:
                row.append(n(e.get("En"), 3))
            row.append(band)
            data.append(row)
            cells.append((len(head) - 1, len(data) - 1, e.get("band")))
            if has_en and e.get("en_band") == "unsatisfactory":
                cells.append((len(head) - 2, len(data) - 1, "unsatisfactory"))
        if scored:
            story.append(table(data, [66, 52, 46, 46, 54, 40, 62] + ([40] if has_en else []) + [70],
                               bands(cells)))
            # The rules of the bands are the same for every measurand: said once a letter.
            story.append(Paragraph(esc(_method_note(s, in_house, n, t, comma,
                                                    rules="rules" not in said)), st["small"]))
            said.add("rules")

        # The laboratory's own results, unit by unit.
        trials = int(s["trials"])
        own: dict[str, dict[int, Unblinded]] = {}
        for r in rows:
            if r.lab == to.lab:
                own.setdefault(r.material, {})[r.trial] = r
        data = [[t("letter.col_material")] + [h for i in range(1, trials + 1)
                                              for h in (t("letter.col_trial", trial=i),
                                                        t("letter.col_unit"))]]
        notes: list[str] = []
        for m in s["materials"]:
            cells_m = own.get(m, {})
            row = [m]
            for i in range(1, trials + 1):
                r = cells_m.get(i)
                if r is None:
                    row += ["-", ""]
                    continue
                value = n(r.value) if r.value is not None else t("letter.no_value")
                if r.uncertainty is not None:
                    value += f" ± {n(r.uncertainty, 3)}"
                # Plain strings, not Paragraphs: a big round makes hundreds of these letters.
                row += [value, codes.format(r.code)]
                extra = [t(f"letter.flag.{f}") if f"letter.flag.{f}" in t.entries else f
                         for f in r.flags if f != "in-house"]
                if extra:
                    notes.append(t("letter.flag_item", material=m, trial=i, flags=", ".join(extra)))
            data.append(row)
        tw = min(62.0, (width - 70) / max(trials, 1) - 58)
        mono = [("FONT", (c, 1), (c, -1), _layout.MONO_REGULAR, 7)
                for c in range(2, 2 * trials + 1, 2)]
        align = [("ALIGN", (c, 0), (c, -1), "LEFT") for c in range(2, 2 * trials + 1, 2)]
        if own_rows and own_results:
            story += [Paragraph(esc(t("letter.results_heading")), st["h2"]),
                      table(data, [70] + [tw, 58] * trials, mono + align)]
        if notes and own_results:
            story.append(Paragraph(t.markup("letter.flags",
                                            flags=t("common.semicolon").join(notes)),
                                   st["small"]))

        # Everyone's scores, the own marked; then the others by participant code.
        strip_rows = []
        for m in s["materials"]:
            mv = view["materials"].get(m)
            if not mv:
                continue
            strip_rows.append((m, mv["all"], mv["scores"].get(me)))
        if strip_rows and scored:
            name = "z / z'" if any(mv["name"] == "z'" for mv in view["materials"].values()) else "z"
            note = (t.markup("letter.stand_note_bars", step=n(0.25))
                    if n_labs > _charts.MAX_LABELS else t.markup("letter.stand_note"))
            story.append(KeepTogether([
                Paragraph(esc(t("letter.stand_heading")), st["h2"]),
                *([Paragraph(note, st["small"])] if "stand" not in said else []),
                _charts.StripChart(strip_rows, width=width, score_name=name,
                                   cache=view.get("cache")),
            ]))
            said.add("stand")
        if n_labs <= TABLE_LABS and view["materials"]:
            mats = [m for m in s["materials"] if m in view["materials"]]
            for start in range(0, len(mats), 8):
                part = mats[start:start + 8]
                data = [[t("letter.col_participant")]
                        + [m + ("'" if view["materials"][m]["name"] == "z'" else "") for m in part]]
                cells = []
                for i, code in enumerate(view["codes"], start=1):
                    row = [t("letter.you") if code == me else code]
                    for j, m in enumerate(part, start=1):
                        v = view["materials"][m]["scores"].get(code)
                        row.append("-" if v is None else n(round(v, 2), 3))
                        cells.append((j, i, view["materials"][m]["bands"].get(code)))
                    data.append(row)
                extra = bands(cells)
                if me in view["codes"]:
                    r_me = view["codes"].index(me) + 1
                    extra.append(("FONT", (0, r_me), (-1, r_me), _layout.BOLD, 8))
                block = [table(data, [70] + [min(52.0, (width - 70) / len(part))] * len(part),
                               extra)]
                if start == 0:
                    block = [Paragraph(esc(t("letter.all_heading")), st["h2"]),
                             Paragraph(esc(t("letter.all_note")), st["small"])] + block
                story.append(KeepTogether(block))
        return story

    def results(statistics: Mapping[str, Any], rows: Sequence[Unblinded]) -> list[Any]:
        """The laboratory's own results of every measurand, a line per unit as on its form
        (material, trial, unit code, then a column per measurand; at most ``_PER_TABLE``
        measurands to a table)."""
        ids = measurand_ids(statistics)
        blocks = statistics["measurands"]
        by_unit: dict[tuple[str, int], dict[str, Unblinded]] = {}
        for r in rows:
            if r.lab == to.lab:
                by_unit.setdefault((r.material, r.trial), {})[r.measurand] = r
        if not by_unit:
            return []
        rank = {m: i for i, m in enumerate(dict.fromkeys(
            m for b in blocks.values() for m in b.get("measured_on") or b.get("materials", ())))}
        units = sorted(by_unit, key=lambda k: (rank.get(k[0], len(rank)), k[0], k[1]))
        notes: list[str] = []
        for material, trial in units:
            first = next(iter(by_unit[material, trial].values()))
            extra = [t(f"letter.flag.{f}") if f"letter.flag.{f}" in t.entries else f
                     for f in first.flags if f != "in-house"]
            if extra:
                notes.append(t("letter.flag_item", material=material, trial=trial,
                               flags=", ".join(extra)))
        story: list[Any] = [Paragraph(esc(t("letter.results_heading")), st["h2"])]
        for start in range(0, len(ids), _PER_TABLE):
            part = ids[start:start + _PER_TABLE]
            data: list[list[Any]] = [[t("letter.col_material"), t("letter.col_trial_short"),
                                      t("letter.col_unit")]
                                     + [f"{mid} [{blocks[mid]['unit']}]" for mid in part]]
            for material, trial in units:
                got = by_unit[material, trial]
                row = [material, str(trial), codes.format(next(iter(got.values())).code)]
                for mid in part:
                    r = got.get(mid)
                    if r is None:
                        row.append("-")  # not measured on this material
                        continue
                    value = n(r.value) if r.value is not None else t("letter.no_value")
                    if r.uncertainty is not None:
                        value += f" ± {n(r.uncertainty, 3)}"
                    row.append(value)
                data.append(row)
            story.append(table(data, [62, 34, 62] + [(width - 158) / len(part)] * len(part),
                               [("FONT", (2, 1), (2, -1), _layout.MONO_REGULAR, 7),
                                ("ALIGN", (2, 0), (2, -1), "LEFT")], right_from=1))
        story.append(Paragraph(esc(t("letter.results_note")), st["small"]))
        if notes:
            story.append(Paragraph(t.markup("letter.flags",
                                            flags=t("common.semicolon").join(notes)), st["small"]))
        return story

    return section, overview, results


def _key_section(s: Mapping[str, Any], to: Addressee, t: Texts) -> list[Any]:
    """Return how the key was opened, as the ledger shows it, and its full fingerprint."""
    from reportlab.platypus import Paragraph, Spacer

    from planner.render import _opening

    st = _layout.styles()
    esc = _layout.escape
    codes_of = s["participants"]
    opening = s.get("opening")
    hidden = False

    def name_of(slot: str) -> str:
        # Only the own laboratory by name; the others by this round's participant code.
        lab, at, visit = slot.partition("@")
        if at:
            where = t(f"common.visit.{visit}") if f"common.visit.{visit}" in t.entries else visit
            return t("letter.your_stop" if lab == to.lab else "letter.host_stop", visit=where)
        return (t("letter.your_laboratory") if lab == to.lab
                else codes_of.get(lab, t("letter.another_participant")))

    def reason(text: str) -> str:
        nonlocal hidden
        out, hidden = _opening.masked(text, codes_of, keep=to.lab)
        return out

    first = esc(_opening.opening_sentence(opening, name_of=name_of, reason=reason, texts=t))
    if hidden:
        first += " " + esc(t("letter.reason_masked"))
    if opening and opening.get("forced"):
        first = f"<b>{first}</b>"
    text = " ".join([first, *(esc(x) for x in _opening.later_sentences(
        opening, name_of=name_of, texts=t,
        spare_to=lambda slot: (t("letter.your_laboratory") if slot == to.lab
                               else t("letter.a_participant")))),
                     esc(_opening.sealing_sentence(opening or {}, texts=t))]).strip()
    mono = f"<font face='{_layout.MONO_REGULAR}'>{{}}</font>"
    return [
        Paragraph(esc(t("letter.key_heading")), st["h2"]),
        Paragraph(text, st["body"]),
        Spacer(1, 1.5 * _MM),
        Paragraph(t.markup("letter.fingerprint_handover" if _circulating(s)
                           else "letter.fingerprint_packing", fingerprint=language.Markup(
            mono.format(esc(_layout.grouped_fingerprint(s["fingerprint"]))))), st["body"]),
        *([Paragraph(t.markup("letter.ledger", link=s["ledger"]["link"], head=language.Markup(
            mono.format(esc(_layout.grouped_fingerprint(s["ledger"]["head"]))))), st["small"])]
          if s.get("ledger") else []),
    ]


def _circulating(s: Mapping[str, Any]) -> bool:
    """Return whether the round was a circulating set (its statistics hold a drift check)."""
    return "drift" in s or any("drift" in b for b in (s.get("measurands") or {}).values())


def _verdict(s: Mapping[str, Any], mine: Mapping[str, Any], t: Texts, comma: bool) -> str:
    """Return the sentences that sum up a laboratory's scores, saying why a band is missing."""
    scored = {m: e for m, e in mine.items() if e and not e.get("reference")}
    banded = {m: e for m, e in scored.items() if s["scores"][m].get("banded")}
    unbanded = [m for m in scored if m not in banded]
    parts = []
    if any(e and e.get("reference") for e in mine.values()):
        refs = [m for m, e in mine.items() if e and e.get("reference")]
        parts.append(t("letter.reference_lab", materials=", ".join(refs)))
    if banded:
        bands = [e.get("band") for e in banded.values()]
        outside = [m for m, e in banded.items()
                   if e.get("band") in ("questionable", "unsatisfactory")]
        parts.append(t("letter.satisfactory_count_outside", good=bands.count("satisfactory"),
                       total=len(banded), materials=", ".join(outside)) if outside else
                     t("letter.satisfactory_count", good=bands.count("satisfactory"),
                       total=len(banded)))
    if unbanded:
        reasons = list(dict.fromkeys(_reworded(str(s["scores"][m].get("no_band")), "letter.why",
                                               t, comma) for m in unbanded))
        lead = (t("letter.no_band_any") if not banded
                else t("letter.no_band_for", materials=", ".join(unbanded)))
        parts.append(t("letter.no_band_instead", lead=lead,
                       reasons=t("common.semicolon").join(reasons)))
        if any(e.get("En") is not None for e in scored.values()):
            parts.append(t("letter.en_keeps_band"))
    if not scored and not parts:
        parts.append(t("letter.nothing_evaluated"))
    return " ".join(parts)


def _method_note(s: Mapping[str, Any], in_house: bool, n: Any, t: Texts, comma: bool, *,
                 rules: bool = True) -> str:
    st = s["settings"]
    parts = ([] if st["assigned_value"] == "known" else
             [t("letter.x_pt_reference") if st["assigned_value"] == "reference"
              else t("letter.x_pt_consensus")])
    known = st.get("known_values") or {}
    if known:
        parts.append(t("letter.x_pt_known", values=t("common.semicolon").join(
            f"{m} {n(k['value'])} (u = {n(k['u'], 3)}"
            + (f", {k['source']}" if k.get("source") else "") + ")" for m, k in known.items())))
    policies = {m: _reworded(str(v), "letter.policy", t, comma)
                for m, v in (st.get("sigma_pt") or {}).items()}
    kinds = list(dict.fromkeys(policies.values()))
    if len(kinds) == 1:
        parts.append(t("letter.sigma_pt", policy=kinds[0]))
    elif kinds:
        parts.append(t("letter.sigma_pt", policy=t("common.semicolon").join(
            f"{m}: {v}" for m, v in policies.items())))
    if rules:
        parts.append(t("letter.rules", ratio=n(0.3)))
    # Only the host's own letter gives the consensus without the host: in anyone else's,
    # leaving out each participant code in turn and recomputing would single the host out.
    diffs = []
    for m in s["materials"] if in_house else ():
        wh = s["scores"].get(m, {}).get("without_host") or {}
        if wh.get("assigned_value") is not None:
            diffs.append(f"{m} {n(wh['assigned_value'])} ({n(wh['difference'], 2)})")
    if diffs:
        parts.append(t("letter.without_host", values=t("common.semicolon").join(diffs)))
    return " ".join(parts)


_PAD = 8.0  # a table cell's padding, both sides (_layout.table_style)
_PER_TABLE = 4  # measurands to a table of a laboratory's own results, so that they fit


def _fit_columns(data: Sequence[Sequence[Any]], widths: Sequence[float], room: float
                 ) -> list[float]:
    """Return column widths for a letter's table within ``room`` points.

    The widths given were chosen for English; another language's words may be longer. A
    column gets at least its widest cell and the longest word of its heading (headings may
    wrap between words), and as much of its given width and whole heading as fits.
    """
    from reportlab.pdfbase.pdfmetrics import stringWidth

    # While render_all makes many letters in one set of fonts, the widths of the texts
    # that recur (numbers, band words, headings) are measured once.
    known: dict[tuple[str, str], float] = _SHARED.get("widths", {})

    def wide(text: str, font: str) -> float:
        got = known.get((text, font))
        if got is None:
            if len(known) > 20_000:  # a laboratory's own numbers recur in no other letter
                known.clear()
            got = known[(text, font)] = stringWidth(text, font, 8) + _PAD + 1
        return got

    least, most = [], []
    for i, given in enumerate(widths):
        head = data[0][i] if i < len(data[0]) and isinstance(data[0][i], str) else ""
        cells = [wide(row[i], _layout.FONT) for row in data[1:]
                 if i < len(row) and isinstance(row[i], str)]
        low = max([*cells, *(wide(word, _layout.BOLD) for word in head.split()), 0.0])
        least.append(low)
        most.append(max(low, given, wide(head, _layout.BOLD) if head else 0.0))
    if sum(most) <= room:
        return most
    if sum(least) >= room:
        return [w * room / sum(least) for w in least]
    share = (room - sum(least)) / (sum(most) - sum(least))
    return [lo + (hi - lo) * share for lo, hi in zip(least, most, strict=True)]


_NUMBER = re.compile(r"[-+]?\d+(?:\.\d+)?(?:e[-+]?\d+)?")


def _reworded(text: str, section: str, t: Texts, comma: bool) -> str:
    """Return a sentence the evaluation wrote in English (statistics.json) in the words of
    ``t``: matched against the English texts of ``section``, its values carried over (with a
    decimal comma if the laboratory writes one); ``text`` itself if no text matches."""
    # The same few sentences recur on every material of every letter: remember them, for
    # the texts of a language file (a Texts made otherwise is not remembered).
    known = t is language.texts(t.code)
    memo = (text, section, t.code, comma)
    if known and memo in _REWORDED:
        return _REWORDED[memo]
    out = text
    for key, pattern in _section_patterns(section):
        found = pattern.fullmatch(text)
        if found is None:
            continue
        values = {name: (value.replace(".", ",") if comma and _NUMBER.fullmatch(value)
                         else value) for name, value in found.groupdict().items()}
        out = t(key, **values)
        break
    if known:
        if len(_REWORDED) > 4096:  # a long-lived process: keep it small
            _REWORDED.clear()
        _REWORDED[memo] = out
    return out


_REWORDED: dict[tuple[str, str, str, bool], str] = {}


@cache
def _section_patterns(section: str) -> tuple[tuple[str, re.Pattern[str]], ...]:
    """Return the keys of the English texts of ``section`` with their patterns."""
    return tuple((key, _pattern(template)) for key, template in language.texts().entries.items()
                 if key.startswith(section + "."))


@cache
def _pattern(template: str) -> re.Pattern[str]:
    """Return a regular expression that matches what ``template`` gives for any values."""
    out = ""
    for literal, name, _, _ in string.Formatter().parse(template):
        out += re.escape(literal)
        if name:
            out += f"(?P<{name}>.+?)"
    return re.compile(out)


def render(path: Path, statistics: Mapping[str, Any], rows: Sequence[Unblinded],
           addressee: Addressee, *, paper: str,
           views: Mapping[str, Mapping[str, Any]] | None = None) -> Path:
    """Write the letter to ``addressee`` to ``path`` on ``paper``; return ``path``.

    ``statistics`` is statistics.json (format ``ringplan-statistics/3``); ``views`` is
    ``anonymous_views(statistics)``, computed once when many letters are made.
    """
    s = statistics
    t = language.texts(addressee.language)
    story = _story(s, rows, addressee, views or anonymous_views(s), paper, t)
    running = _layout.Running(s["study"], s["title"], s["round"],
                              t("letter.running", lab=addressee.lab),
                              t("letter.confidential", name=addressee.name),
                              round_text=t.template("common.round"),
                              page_text=t.template("common.page"))
    return _layout.build(path, story, paper=paper, running=running,
                         title=t("letter.pdf_title", study=s["study"], round=s["round"],
                                 lab=addressee.lab))


# --- many letters in parallel --------------------------------------------------

_SHARED: dict[str, Any] = {}


def _init(statistics: Mapping[str, Any], rows_by_lab: Mapping[str, Sequence[Unblinded]],
          paper: str, worker: bool = False) -> None:
    if worker:
        from reportlab import rl_config

        # In a worker process only: plain Flate streams instead of Flate + ASCII85.
        # The pure-Python ASCII85 encoder costs a sixth of a letter's time, and the
        # files get smaller; every PDF reader takes either.
        rl_config.useA85 = 0
        import gc

        # What the worker inherited (the statistics, every result) is read, never freed
        # here: keep it out of the garbage collector's passes, which would otherwise walk
        # it, and copy its pages from the parent, again and again.
        gc.freeze()
    _SHARED.update(statistics=statistics, rows=rows_by_lab, paper=paper,
                   views=anonymous_views(statistics), widths={})


def _one(job: tuple[Path, Addressee]) -> Path:
    path, to = job
    return render(path, _SHARED["statistics"], _SHARED["rows"].get(to.lab, ()), to,
                  paper=_SHARED["paper"], views=_SHARED["views"])


def render_all(folder: Path, statistics: Mapping[str, Any], rows: Sequence[Unblinded],
               addressees: Sequence[Addressee], *, paper: str, workers: int = 1) -> list[Path]:
    """Write ``letter-<lab>.pdf`` for every addressee into ``folder``; return the paths.

    With ``workers`` > 1 the letters are made in that many processes; each process
    receives the statistics once, not once per letter.
    """
    by_lab: dict[str, list[Unblinded]] = {}
    for r in rows:
        by_lab.setdefault(r.lab, []).append(r)
    jobs = [(Path(folder) / f"letter-{to.lab}.pdf", to) for to in addressees]
    if workers <= 1 or len(jobs) < 2:
        _init(statistics, by_lab, paper)
        try:
            return [_one(job) for job in jobs]
        finally:
            _SHARED.clear()
    from planner.render import _workers

    # fork shares the parent's memory (no pickling of the statistics) where it exists.
    chunk = max(1, len(jobs) // (workers * 4))
    with _workers.pool(workers, initializer=_init, initargs=(statistics, by_lab, paper, True),
                       fork=True) as pool:
        return list(pool.map(_one, jobs, chunksize=chunk))
