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
(forced before every result was in, or not, with who was missing then: past
``NAMED_MISSING`` laboratories how many, and whether the reader's own was among them;
when it was decrypted while sealed) with its full fingerprint, the assigned values, the laboratory's scores with
their bands, its results unit by unit, a chart of everyone's scores with its
own marked, and for rounds of up to ``TABLE_LABS`` participants a table of the
others' scores by participant code.

A study with several measurands gets one letter per laboratory all the same: after
the key, a table of its scores by measurand, then the parts from its scores on once
per measurand under the measurand's heading. A study in the single-measurand form
reads as it always has, without measurand headings.

A round of hundreds of laboratories has hundreds of letters of one build, so
``render_all`` makes them cheap without changing a word or a pixel of them: tables
drawn straight from the style's commands (``Grid``, each cell's style worked out once
per shape), paragraphs that recur broken into lines and turned into PDF operators once
(``Laid``, their parts at a page's foot too), the lead that differs only in the
addressee's id broken once per width of the id (``Shaped``), the scores chart but its
markers turned into operators once (``Chart``), lines of table text encoded with one
``str.translate`` (``_first_subset``), and fonts given their characters in a fixed
order first (``_Seed``) so that the letters of a language embed the same font
subsets, each made once (``_shared_font_files``).
tests/render/test_letter_batch.py holds them to what reportlab's Table and Paragraph
draw.
"""

from __future__ import annotations

import copy
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

__all__ = ["Addressee", "render", "render_all", "TABLE_LABS", "NAMED_MISSING",
           "anonymous_view", "anonymous_views"]

TABLE_LABS = 40
"""Largest round whose letters list every other participant's scores in a table."""

NAMED_MISSING = 10
"""Most laboratories a letter names (by participant code) as without results when the key
was opened, or as recorded after it; past it, the letter says how many of how many
participants, and whether its own laboratory is among them. The report names them all."""

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
    # + 0.0 turns a negative zero (a difference of equal values, say) into 0, not '-0'
    text = f"{v + 0.0:.{digits}g}" if isinstance(v, float) else str(v)
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
    from reportlab.platypus import Spacer

    shorthand = is_shorthand(statistics)
    s = measurand_view(statistics, SHORTHAND_ID) if shorthand else statistics
    st = _styles()
    esc = _layout.escape
    n_labs = len(s["participants"])

    section, overview, results = _parts(s, to, paper, t)

    address = "<br/>".join(esc(line) for line in (to.name, *to.address))
    story: list[Any] = [
        _para(esc(t("letter.title")), st["title"]),
        _para(address + ("<br/>" + t.markup("letter.attn", contact=to.contact)
                         if to.contact else ""), st["body"], shared=False),
        Spacer(1, 4 * _MM),
        _para(t.markup("letter.lead", title=s["title"], round=s["round"], labs=n_labs,
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
                           lab=to.lab, you=t("letter.you")), st["lead"], but=to.lab),
    ]
    if to.lab == s["host"]:
        story.append(_para(t.markup("letter.in_house"), st["body"]))
    story += _key_section(s, to, t)
    if shorthand:
        story += section(s, rows, views[SHORTHAND_ID])
    else:
        story += overview(statistics)
        heading = st["measurand"]
        for mid in measurand_ids(statistics):
            sv = measurand_view(statistics, mid)
            story.append(_para(esc(t("letter.measurand_heading", measurand=mid,
                                         name=sv["measurand"], unit=sv["unit"])), heading))
            story += section(sv, [r for r in rows if r.measurand == mid], views[mid],
                             own_results=False)
        story += results(statistics, rows)
    story.append(Spacer(1, 4 * _MM))
    story.append(_para(t.markup("letter.issued", organiser=s.get("organiser")
                                or t("letter.coordinator")), st["small"]))
    return story


def _styles() -> dict[str, Any]:
    """Return the paragraph styles of a letter by name: ``_layout.styles()`` and the
    letter's own. The letters of one batch share them."""
    kept = _kept("styles")
    if not kept:
        from reportlab.lib.colors import HexColor
        from reportlab.lib.styles import ParagraphStyle

        st = _layout.styles()
        kept.update(st)
        # a measurand's heading: above the sections' headings
        kept["measurand"] = ParagraphStyle("measurand", parent=st["h2"], fontSize=13.5,
                                           leading=17, spaceBefore=10)
        # a table heading that wraps, and a table cell of text that wraps
        kept["head-wrap"] = ParagraphStyle("head-wrap", parent=st["cell"],
                                           fontName=_layout.BOLD, fontSize=8, leading=9.5,
                                           textColor=HexColor(_layout.ACCENT), alignment=2)
        kept["cell8r"] = ParagraphStyle("cell8r", parent=st["cell"], fontSize=8, leading=9.6,
                                        alignment=2)
    return kept


def _kept(name: str) -> dict[Any, Any]:
    """Return a cache the letters of one batch (``render_all``) share; a new one outside."""
    return _SHARED.setdefault(name, {}) if _SHARED else {}


def _para(text: str, style: Any, *, shared: bool = True, but: str = "") -> Any:
    """Return a paragraph of ``text`` in ``style``. With ``shared`` (a text that recurs in
    many letters) the letters of a batch share its layout: it is broken into lines once.
    ``but`` is the word in which the letters' texts differ (the addressee's id, set as a
    word of its own): letters whose word is as wide share the lines (``Shaped``)."""
    from reportlab.platypus import Paragraph

    if but and _SHARED:
        return _kinds().Shaped(text, style, but)
    if not shared or not _SHARED:
        return Paragraph(text, style)
    kept = _kept("paragraphs")
    got = kept.get((text, style.name))
    if got is None:
        if len(kept) > 4096:  # a long-lived process: keep it small
            kept.clear()
        got = kept[(text, style.name)] = (Paragraph(text, style), {})
    return _kinds().Laid(*got)


def _parts(s: Mapping[str, Any], to: Addressee, paper: str, t: Texts) -> Any:
    """Return the functions that write a letter's parts: ``part`` (one measurand's scores,
    results and standing) and ``overview`` (the scores by measurand)."""
    from reportlab.platypus import KeepTogether, Spacer

    from planner.render import _charts

    st = _styles()
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
        return _grid([head, *data[1:]], widths, style)

    def _head(text: Any, column: float) -> Any:
        from reportlab.pdfbase.pdfmetrics import stringWidth

        if not isinstance(text, str) or stringWidth(text, _layout.BOLD, 8) <= column - _PAD:
            return text
        return _para(esc(text), st["head-wrap"])

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
        right = st["cell8r"]
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
                         _para(esc(listed), right) if len(listed) > 40 else listed])
            if outside:
                worst = ("unsatisfactory" if any(banded[m].get("band") == "unsatisfactory"
                                                 or banded[m].get("en_band") == "unsatisfactory"
                                                 for m in outside) else "questionable")
                cells.append((3, len(data) - 1, worst))
        return [_para(esc(t("letter.overview_heading")), st["h2"]),
                table(data, [150, 60, 80, 190], [*bands(cells),
                                                  ("VALIGN", (0, 0), (-1, -1), "TOP"),
                                                  ("ALIGN", (0, 0), (0, -1), "LEFT")]),
                _para(esc(t("letter.overview_note")), st["small"])]

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
            story += [_para(esc(t("letter.scores_heading")), st["h2"]),
                      _para(f"<b>{esc(text)}</b>", st["body"])]
        else:
            story += [_para(esc(t("letter.scores_heading")), st["h2"]),
                      _para(esc(_verdict(s, mine, t, comma)), st["body"]), Spacer(1, 2 * _MM)]
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
            story.append(_para(esc(_method_note(s, in_house, n, t, comma,
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
                unit = cells_m.get(i)
                if unit is None:
                    row += ["-", ""]
                    continue
                value = n(unit.value) if unit.value is not None else t("letter.no_value")
                if unit.uncertainty is not None:
                    value += f" ± {n(unit.uncertainty, 3)}"
                # Plain strings, not Paragraphs: a big round makes hundreds of these letters.
                row += [value, codes.format(unit.code)]
                extra = [t(f"letter.flag.{f}") if f"letter.flag.{f}" in t.entries else f
                         for f in unit.flags if f != "in-house"]
                if extra:
                    notes.append(t("letter.flag_item", material=m, trial=i, flags=", ".join(extra)))
            data.append(row)
        tw = min(62.0, (width - 70) / max(trials, 1) - 58)
        mono = [("FONT", (c, 1), (c, -1), _layout.MONO_REGULAR, 7)
                for c in range(2, 2 * trials + 1, 2)]
        align = [("ALIGN", (c, 0), (c, -1), "LEFT") for c in range(2, 2 * trials + 1, 2)]
        if own_rows and own_results:
            story += [_para(esc(t("letter.results_heading")), st["h2"]),
                      table(data, [70] + [tw, 58] * trials, mono + align)]
        if notes and own_results:
            story.append(_para(t.markup("letter.flags",
                                        flags=t("common.semicolon").join(notes)),
                               st["small"], shared=False))

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
            # A chart of many materials goes on in a second chart: one taller than a page
            # cannot be drawn at all. Each part keeps its own operators (``cache``).
            charts = [_strip_chart(
                strip_rows[i:i + _CHART_ROWS], width=width, score_name=name,
                cache=view.get("cache") if not i or view.get("cache") is None
                else view["cache"].setdefault(f"rows {i}", {}))
                for i in range(0, len(strip_rows), _CHART_ROWS)]
            story.append(KeepTogether([
                _para(esc(t("letter.stand_heading")), st["h2"]),
                *([_para(note, st["small"])] if "stand" not in said else []),
                charts[0],
            ]))
            story += charts[1:]
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
                marks = bands(cells)
                if me in view["codes"]:
                    r_me = view["codes"].index(me) + 1
                    marks.append(("FONT", (0, r_me), (-1, r_me), _layout.BOLD, 8))
                block = [table(data, [70] + [min(52.0, (width - 70) / len(part))] * len(part),
                               marks)]
                if start == 0:
                    block = [_para(esc(t("letter.all_heading")), st["h2"]),
                             _para(esc(t("letter.all_note")), st["small"])] + block
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
        story: list[Any] = [_para(esc(t("letter.results_heading")), st["h2"])]
        for start in range(0, len(ids), _PER_TABLE):
            part = ids[start:start + _PER_TABLE]
            data: list[list[Any]] = [[t("letter.col_material"), t("letter.col_trial_short"),
                                      t("letter.col_unit")]
                                     + [f"{mid} [{blocks[mid]['unit']}]" for mid in part]]
            for material, trial in units:
                got = by_unit[material, trial]
                row = [material, str(trial), codes.format(next(iter(got.values())).code)]
                for mid in part:
                    unit = got.get(mid)
                    if unit is None:
                        row.append("-")  # not measured on this material
                        continue
                    value = n(unit.value) if unit.value is not None else t("letter.no_value")
                    if unit.uncertainty is not None:
                        value += f" ± {n(unit.uncertainty, 3)}"
                    row.append(value)
                data.append(row)
            story.append(table(data, [62, 34, 62] + [(width - 158) / len(part)] * len(part),
                               [("FONT", (2, 1), (2, -1), _layout.MONO_REGULAR, 7),
                                ("ALIGN", (2, 0), (2, -1), "LEFT")], right_from=1))
        story.append(_para(esc(t("letter.results_note")), st["small"]))
        if notes:
            story.append(_para(t.markup("letter.flags",
                                        flags=t("common.semicolon").join(notes)), st["small"],
                               shared=False))
        return story

    return section, overview, results


def _key_section(s: Mapping[str, Any], to: Addressee, t: Texts) -> list[Any]:
    """Return how the key was opened, as the ledger shows it, and its full fingerprint."""
    from reportlab.platypus import Spacer

    from planner.render import _opening

    st = _styles()
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

    def names(slots: Sequence[str]) -> str:
        # Hundreds of codes would help no reader: past a few, how many and whether its own.
        if len(slots) <= NAMED_MISSING:
            return ", ".join(name_of(slot) for slot in slots)
        labs = {slot.partition("@")[0] for slot in slots}
        if len(labs) == len(codes_of):
            return t("opening.count_all", total=len(codes_of))
        return t("opening.count_yours" if to.lab in labs else "opening.count_others",
                 count=len(labs), total=len(codes_of))

    def reason(text: str) -> str:
        nonlocal hidden
        out, hidden = _opening.masked(text, codes_of, keep=to.lab)
        return out

    first = esc(_opening.opening_sentence(opening, name_of=name_of, reason=reason, texts=t,
                                          names=names))
    if hidden:
        first += " " + esc(t("letter.reason_masked"))
    if opening and opening.get("forced"):
        first = f"<b>{first}</b>"
    text = " ".join([first, *(esc(x) for x in _opening.later_sentences(
        opening, name_of=name_of, texts=t, names=names,
        spare_to=lambda slot: (t("letter.your_laboratory") if slot == to.lab
                               else t("letter.a_participant")))),
                     esc(_opening.sealing_sentence(opening or {}, texts=t))]).strip()
    mono = f"<font face='{_layout.MONO_REGULAR}'>{{}}</font>"
    return [
        _para(esc(t("letter.key_heading")), st["h2"]),
        _para(text, st["body"]),
        Spacer(1, 1.5 * _MM),
        _para(t.markup("letter.fingerprint_handover" if _circulating(s)
                           else "letter.fingerprint_packing", fingerprint=language.Markup(
            mono.format(esc(_layout.grouped_fingerprint(s["fingerprint"]))))), st["body"]),
        *([_para(t.markup("letter.ledger", link=s["ledger"]["link"], head=language.Markup(
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
    # The host's checks of the items found differences between units or a drift: the
    # score of those materials allows for it (evaluate.widen_of), and the letter says so.
    widened = ((s.get("homogeneity") or {}).get("widened") or {}).get(
        s.get("measurand_id", ""), {})
    for into in ("uncertainty", "sigma_pt"):
        items = [f"{m} ({n(w['sd'], 3)})" for m, w in widened.items()
                 if w["into"] == into and m in s["materials"]]
        if items:
            parts.append(t("letter.items_widened",
                           quantity="u(x_pt)" if into == "uncertainty" else "sigma_pt",
                           values=t("common.semicolon").join(items)))
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
_CHART_ROWS = 40
"""Materials to one chart of a letter: 40 rows (584 pt with the axis) and the section's
heading fit the text frame of an A4 or US-letter page (some 690 and 650 pt)."""
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
    return _render(path, statistics, rows, addressee, paper=paper, views=views,
                   seeds=_seeds(statistics, [addressee], addressee.language))


def _render(path: Path, statistics: Mapping[str, Any], rows: Sequence[Unblinded],
            addressee: Addressee, *, paper: str,
            views: Mapping[str, Mapping[str, Any]] | None,
            seeds: tuple[tuple[str, str], ...], staged: bool = False) -> Path:
    """Write the letter as ``render`` does; ``staged``: return its temporary file, for
    ``render_all`` to flush and put in place with the others (``files.settle``)."""
    s = statistics
    t = language.texts(addressee.language)
    story = [_Seed(seeds), *_story(s, rows, addressee, views or anonymous_views(s), paper, t)]
    running = _layout.Running(s["study"], s["title"], s["round"],
                              t("letter.running", lab=addressee.lab),
                              t("letter.confidential", name=addressee.name),
                              round_text=t.template("common.round"),
                              page_text=t.template("common.page"))
    return _layout.build(path, story, paper=paper, running=running,
                         title=t("letter.pdf_title", study=s["study"], round=s["round"],
                                 lab=addressee.lab), staged=staged)


# --- tables and paragraphs laid out once ----------------------------------------
#
# A round of hundreds of laboratories makes hundreds of letters of the same build. Two
# flowables of our own make them cheap. ``Grid`` draws a letter's tables as reportlab's
# Table with our style (``_layout.table_style``) draws them: the same positions, fonts,
# colours, rules and page splits with the heading repeated, worked out directly from the
# style's commands rather than through reportlab's cell styles (a sixth of a letter's time
# went there). ``Laid`` is a paragraph whose lines are broken once for every letter of a
# batch that has the same text. A fresh ``Laid`` is made for each letter, as reportlab
# marks the flowables it moves to the next page.

_GRID_OPS = frozenset({"FONT", "TEXTCOLOR", "VALIGN", "ALIGN", "BACKGROUND", "LINEBELOW",
                       "TOPPADDING", "BOTTOMPADDING", "LEFTPADDING", "RIGHTPADDING"})


def _strip_chart(rows: Sequence[tuple[str, Sequence[float | None], float | None]],
                 **options: Any) -> Any:
    """Return the chart of everyone's scores (``_charts.StripChart``) of ``rows``; within a
    batch its operators but the reader's own markers are worked out once (``Chart``)."""
    return _kinds().Chart(rows, **options)


def _grid(rows: Sequence[Sequence[Any]], widths: Sequence[float], style: Any) -> Any:
    """Return a table of ``rows`` with ``widths`` in ``style`` (a TableStyle), its first row
    repeated at the top of every page it runs onto."""
    commands = list(style.getCommands())
    if all(c[0] in _GRID_OPS and not isinstance(c[1][1], str)
           and (c[0] != "LINEBELOW" or len(c) == 5)
           and (c[0] != "ALIGN" or c[3] in ("LEFT", "RIGHT", "CENTRE", "CENTER"))
           and (c[0] != "VALIGN" or c[3] in ("TOP", "MIDDLE", "BOTTOM")) for c in commands):
        return _kinds().Grid([list(r) for r in rows], list(widths), commands)
    from planner.render import _tables  # a command Grid does not follow

    return _tables.table(rows, widths, style, repeatRows=1)


@cache
def _kinds() -> Any:
    """Return the flowable classes of letters (made on first use: reportlab loads late)."""
    from types import SimpleNamespace

    from reportlab import rl_config
    from reportlab.lib.colors import toColor
    from reportlab.lib.rl_accel import fp_str
    from reportlab.pdfbase import pdfmetrics
    from reportlab.platypus import Flowable

    class Grid(Flowable):  # type: ignore[misc]
        """A table drawn as reportlab's Table draws it with the same style commands."""

        def __init__(self, cells: list[list[Any]], widths: list[float],
                     commands: Sequence[tuple[Any, ...]]) -> None:
            super().__init__()
            self.hAlign = "LEFT"
            self.cells, self.widths = cells, widths
            self.order = list(range(len(cells)))  # the rows of this part of the table
            self.heights: list[float] | None = None
            n_rows, n_cols = len(cells), len(widths)
            self.backgrounds: list[tuple[int, int, int, int, Any]] = []
            self.rules: list[tuple[int, int, int, int, float, Any]] = []
            styling = []
            for op, (c0, r0), (c1, r1), *values in commands:
                if op not in ("BACKGROUND", "LINEBELOW"):
                    styling.append((op, (c0, r0), (c1, r1), *values))
                    continue
                c0, c1 = c0 + n_cols if c0 < 0 else c0, c1 + n_cols if c1 < 0 else c1
                r0, r1 = r0 + n_rows if r0 < 0 else r0, r1 + n_rows if r1 < 0 else r1
                if op == "BACKGROUND":
                    self.backgrounds.append((c0, r0, c1, r1, toColor(values[0])))
                else:
                    self.rules.append((c0, r0, c1, r1, values[0], toColor(values[1])))
            # The tables of a batch's letters have the same shape and styles but for their
            # band colours (backgrounds): each cell's style is worked out once.
            key = (n_rows, n_cols, repr(styling))
            styled = _GRID_STYLES.get(key)
            if styled is None:
                styled = self._styled(n_rows, n_cols, styling)
                if _SHARED:
                    if len(_GRID_STYLES) > 256:  # a long-lived process: keep it small
                        _GRID_STYLES.clear()
                    _GRID_STYLES[key] = styled
            self.font, self.colour, self.align, self.valign, self.pad = styled

        @staticmethod
        def _styled(n_rows: int, n_cols: int, commands: Sequence[tuple[Any, ...]]
                    ) -> tuple[list[list[Any]], ...]:
            """Return each cell's font, colour, alignment, vertical alignment and padding
            (left, right, top, bottom) after ``commands``, as reportlab's Table sets them."""
            # reportlab's CellStyle before any command
            font = [[(rl_config.canvas_basefontname, 10, 12)] * n_cols for _ in range(n_rows)]
            colour = [[toColor("black")] * n_cols for _ in range(n_rows)]
            align = [["LEFT"] * n_cols for _ in range(n_rows)]
            valign = [["BOTTOM"] * n_cols for _ in range(n_rows)]
            pads: dict[str, list[list[float]]] = {
                side: [[width] * n_cols for _ in range(n_rows)] for side, width in
                (("LEFTPADDING", 6), ("RIGHTPADDING", 6), ("TOPPADDING", 3),
                 ("BOTTOMPADDING", 3))}
            # what a command sets, by command: the array of every cell
            target = {"TEXTCOLOR": colour, "ALIGN": align, "VALIGN": valign, **pads}
            for op, (c0, r0), (c1, r1), *values in commands:
                c0, c1 = c0 + n_cols if c0 < 0 else c0, c1 + n_cols if c1 < 0 else c1
                r0, r1 = r0 + n_rows if r0 < 0 else r0, r1 + n_rows if r1 < 0 else r1
                span = c1 - c0 + 1
                for r in range(r0, min(r1, n_rows - 1) + 1):
                    if op == "FONT" and len(values) == 1:
                        font[r][c0:c1 + 1] = [(values[0], *f[1:]) for f in font[r][c0:c1 + 1]]
                    elif op == "FONT":
                        lead = values[2] if len(values) > 2 else values[1] * 1.2
                        font[r][c0:c1 + 1] = [(values[0], values[1], lead)] * span
                    else:
                        value = toColor(values[0]) if op == "TEXTCOLOR" else values[0]
                        target[op][r][c0:c1 + 1] = [value] * span
            pad = [list(zip(*sides)) for sides in zip(
                *(pads[side] for side in ("LEFTPADDING", "RIGHTPADDING", "TOPPADDING",
                                          "BOTTOMPADDING")))]  # per cell: left, right, top, bottom
            return font, colour, align, valign, pad

        def _part(self, order: list[int]) -> Grid:
            # A new flowable (reportlab marks the ones it moved to the next page) that
            # shares this one's cells and styles.
            part = Grid.__new__(Grid)
            Flowable.__init__(part)
            for name in ("hAlign", "cells", "widths", "heights", "all_heights", "font",
                         "colour", "align", "valign", "pad", "backgrounds", "rules"):
                if hasattr(self, name):
                    setattr(part, name, getattr(self, name))
            part.order = order
            part.heights = (None if self.heights is None else
                            [self.all_heights[i] for i in order])
            return part

        def _row_heights(self) -> list[float]:
            if self.heights is None:
                out = []
                for r in range(len(self.cells)):
                    h = 0.0
                    for c, value in enumerate(self.cells[r]):
                        left, right, top, bottom = self.pad[r][c]
                        if isinstance(value, Flowable):
                            got = value.wrap(self.widths[c] - left - right,
                                             72000 - top - bottom)[1]
                        else:
                            got = self.font[r][c][2] * len(str(value).split("\n"))
                        h = max(h, got + top + bottom)
                    out.append(h)
                self.all_heights = out
                self.heights = [out[i] for i in self.order]
            return self.heights

        def wrap(self, avail_width: float, avail_height: float) -> tuple[float, float]:
            self.width, self.height = sum(self.widths), sum(self._row_heights())
            return self.width, self.height

        def split(self, avail_width: float, avail_height: float) -> list[Any]:
            # As reportlab's Table, by rows: not before the first row after the heading.
            heights = self._row_heights()
            h, n = 0.0, 0
            for rh in heights:
                if h + rh > avail_height:
                    break
                h, n = h + rh, n + 1
            if n <= 1:
                return []
            if n == len(heights):
                return [self]
            return [self._part(self.order[:n]), self._part(self.order[:1] + self.order[n:])]

        def draw(self) -> None:
            c = self.canv
            heights = self._row_heights()
            tops = [sum(heights)]
            for h in heights:
                tops.append(tops[-1] - h)
            lefts = [0.0]
            for w in self.widths:
                lefts.append(lefts[-1] + w)
            where = {r: i for i, r in enumerate(self.order)}  # row -> its place in this part
            c.saveState()
            for c0, r0, c1, r1, colour in self.backgrounds:
                for i0, i1 in _runs([where[r] for r in range(r0, r1 + 1) if r in where]):
                    c.setFillColor(colour)
                    c.rect(lefts[c0], tops[i0], lefts[c1 + 1] - lefts[c0], tops[i1 + 1] - tops[i0],
                           stroke=0, fill=1)
            text = c.beginText()
            doc = c._doc
            font: tuple[str, float, float] | None = None
            colour_now: Any = None
            face: Any = None
            tf = ""
            subset_now = -1
            seeds = getattr(doc, "_ringplan_seeds", {})
            chars: frozenset[str] = frozenset()  # what the face sets straight (_first_subset)
            table: dict[int, str] = {}
            first = ""  # the face's subset 0 as the page names it, with its size
            widths = self.widths
            code = text._code
            for i, r in enumerate(self.order):
                bottom, height = tops[i + 1], heights[i]
                for col, value, (left, right, top, low), align, valign, style, paint in zip(
                        range(len(widths)), self.cells[r], self.pad[r], self.align[r],
                        self.valign[r], self.font[r], self.colour[r]):
                    x0, width = lefts[col], widths[col]
                    if value.__class__ is not str and isinstance(value, Flowable):
                        w, h = value.wrap(width - left - right, height - top - low)
                        if valign == "TOP":
                            y = bottom + height - top
                        elif valign == "BOTTOM":
                            y = bottom + low + h
                        else:
                            y = bottom + (height + low - top + h) / 2.0
                        x = (x0 + left if align == "LEFT" else x0 + width - right - w
                             if align == "RIGHT" else x0 + (width + left - right - w) / 2.0)
                        value.drawOn(c, x, y - h)
                        continue
                    name, size, leading = style
                    lines = (value.split("\n") if "\n" in value else (value,)
                             ) if value.__class__ is str else str(value).split("\n")
                    if valign == "BOTTOM":
                        y = bottom + low + len(lines) * leading - size
                    elif valign == "TOP":
                        y = bottom + height - top - size
                    else:
                        y = bottom + (low + height - top + len(lines) * leading) / 2.0 - size
                    if font != (name, size, leading):
                        text.setFont(name, size, leading)
                        font = (name, size, leading)
                        face = pdfmetrics.getFont(name)
                        tf = f" {fp_str(size)} Tf {fp_str(leading)} TL"
                        subset_now = -1
                        seed = seeds.get(name)
                        chars, table = ((frozenset(), {}) if seed is None or not c.bottomup
                                        else _first_subset(face, seed, doc))
                        first = ""
                    if paint is not colour_now:
                        colour_now = paint
                        text.setFillColor(colour_now)
                    for line in lines:
                        if line and chars.issuperset(line):
                            # the common case, as below with one piece in subset 0
                            if align == "LEFT":
                                x = x0 + left
                            else:
                                wide = _width(face, line, size)
                                x = (x0 + width - right - wide if align == "RIGHT"
                                     else x0 + (width + left - right) * 0.5 - 0.5 * wide)
                            if subset_now:
                                first = first or face.getSubsetInternalName(0, doc) + tf
                                code.extend((f"1 0 0 1 {fp_str(x, y)} Tm", first,
                                             f"({line.translate(table)}) Tj"))
                                subset_now = text._curSubset = 0
                            else:
                                code.append(
                                    f"1 0 0 1 {fp_str(x, y)} Tm ({line.translate(table)}) Tj")
                            y -= leading
                            continue
                        wide, pieces = _encoded(face, line, size, doc)
                        if align == "LEFT":
                            x = x0 + left
                        elif align == "RIGHT":
                            x = x0 + width - right - wide
                        else:
                            x = x0 + (width + left - right) * 0.5 - 0.5 * wide
                        if pieces is None or not c.bottomup:  # reportlab's own way
                            text.setTextOrigin(x, y)
                            text.textOut(line)
                            subset_now = text._curSubset
                        else:
                            # As reportlab's text object writes a line of a TrueType font.
                            code = text._code
                            code.append(f"1 0 0 1 {fp_str(x, y)} Tm")
                            for subset, escaped in pieces:
                                if subset != subset_now:
                                    code.append(face.getSubsetInternalName(subset, doc) + tf)
                                    subset_now = text._curSubset = subset
                                code.append(f"({escaped}) Tj")
                        y -= leading
            c.drawText(text)
            c.saveState()
            # reportlab's defaults for a rule command without them: round caps and joins
            c.setLineCap(1)
            c.setLineJoin(1)
            weight = stroke = None
            for c0, r0, c1, r1, width, colour in self.rules:
                if colour != stroke:
                    c.setStrokeColor(colour)
                    stroke = colour
                if width != weight:
                    c.setLineWidth(width)
                    weight = width
                for r in range(r0, r1 + 1):
                    if r in where:
                        y = tops[where[r] + 1]
                        c.line(lefts[c0], y, lefts[min(c1 + 1, len(self.widths))], y)
            c.restoreState()
            c.restoreState()

    class Seed(Flowable):  # type: ignore[misc]
        """Nothing to see: gives the letter's fonts their characters in a fixed order."""

        _ZEROSIZE = True

        def __init__(self, seeds: tuple[tuple[str, str], ...]) -> None:
            super().__init__()
            self.seeds = seeds

        def wrap(self, avail_width: float, avail_height: float) -> tuple[float, float]:
            return 0.0, 0.0

        def draw(self) -> None:
            from reportlab.pdfbase import pdfmetrics

            doc = self.canv._doc
            given = {}
            for name, text in self.seeds:
                font = pdfmetrics.getFont(name)
                if hasattr(font, "splitString"):  # a TrueType font: subsets of its own
                    font.splitString(text, doc)
                    given[name] = text
            doc._ringplan_seeds = given  # what ``_fixed`` reads

    class Laid(Flowable):  # type: ignore[misc]
        """A paragraph broken into lines once for every letter that has it."""

        def __init__(self, paragraph: Any, sizes: dict[Any, Any]) -> None:
            super().__init__()
            self.paragraph, self.sizes = paragraph, sizes

        def wrap(self, avail_width: float, avail_height: float) -> tuple[float, float]:
            got: tuple[float, float] | None = self.sizes.get(avail_width)
            if got is None:
                got = self.sizes[avail_width] = self.paragraph.wrap(avail_width, avail_height)
            self.avail = avail_width
            width, height = got
            self.width, self.height = width, height
            return width, height

        def draw(self) -> None:
            c = self.canv
            seeds = tuple(sorted(getattr(c._doc, "_ringplan_seeds", {}).items()))
            drawn = self.sizes.get(("drawn", self.avail, seeds))
            if drawn and all(font.getSubsetInternalName(0, c._doc) == name
                             for font, name in drawn[1]):
                # the operators it drew before, with the same codes and font names
                c._code.extend(drawn[0])
                return
            # laid out for another width since, or its lines dropped by a split that failed
            if self.paragraph.width != self.avail or not hasattr(self.paragraph, "blPara"):
                self.paragraph.wrap(self.avail, 72000)
            start = len(c._code)
            self.paragraph.canv = c  # where this flowable stands already: draw it here
            try:
                self.paragraph.draw()
            finally:
                del self.paragraph.canv
            if drawn is None:
                fonts = self._fonts(c._doc)
                ops = c._code[start:]
                self.sizes[("drawn", self.avail, seeds)] = (
                    (ops, tuple((f, f.getSubsetInternalName(0, c._doc)) for f in fonts))
                    if fonts is not None and not any(" gs" in op for op in ops) else False)

        def _fonts(self, doc: Any) -> list[Any] | None:
            """Return the fonts the paragraph draws in, if its operators read the same in
            every letter of its kind: only characters its fonts were given first (``_fixed``),
            nothing but text (no links, no underlines, no pictures)."""
            laid = self.paragraph.blPara
            if laid.kind == 0:  # one font: lines of words
                pieces = [(laid, " ".join(w for _, words in laid.lines for w in words))]
            else:  # fragments of several fonts
                pieces = [(f, getattr(f, "text", "")) for line in laid.lines for f in line.words]
            fonts: dict[str, Any] = {}
            for frag, text in pieces:
                name = getattr(frag, "fontName", None)
                if (not isinstance(name, str) or not isinstance(text, str)
                        or not _fixed(doc, name).issuperset(text)
                        or any(getattr(frag, a, None) for a in
                               ("link", "cbDefn", "us_lines", "backColor", "img"))):
                    return None
                fonts[name] = pdfmetrics.getFont(name)
            return list(fonts.values())

        def split(self, avail_width: float, avail_height: float) -> list[Any]:
            # The letters of a batch that have the paragraph at the foot of a page with the
            # same room left share its parts as well (each part a paragraph laid out once).
            parts = self.sizes.get(("split", avail_width, avail_height))
            if parts is None:
                self.paragraph.wrap(avail_width, avail_height)
                parts = self.sizes[("split", avail_width, avail_height)] = [
                    None if part is self.paragraph else (part, {})
                    for part in self.paragraph.split(avail_width, avail_height)]
            # the paragraph whole (as reportlab may answer) stays this letter's own flowable
            return [self if part is None else Laid(*part) for part in parts]

        def getSpaceBefore(self) -> float:  # noqa: N802 - reportlab's name
            return float(self.paragraph.getSpaceBefore())

        def getSpaceAfter(self) -> float:  # noqa: N802 - reportlab's name
            return float(self.paragraph.getSpaceAfter())

    from reportlab.platypus import Paragraph

    class Shaped(Paragraph):  # type: ignore[misc]
        """A paragraph that every letter of a batch has but for one word (``but``): broken
        into lines once for the letters whose word is as wide in its font. Its lines are
        those of the first such letter with the word's fragment given this letter's word.
        Line breaks depend on the widths of words only: letters have no hyphenation, and
        the word, a fragment of its own without spaces, is far shorter than a line."""

        def __init__(self, text: str, style: Any, but: str) -> None:
            super().__init__(text, style)
            self.but = but
            found = [f for f in self.frags if getattr(f, "text", None) == but]
            wide = (pdfmetrics.stringWidth(but, found[0].fontName, found[0].fontSize)
                    if len(found) == 1 else 0.0)
            self.key = ((text.replace(_layout.escape(but), "\0"), style.name,
                         found[0].fontName, found[0].fontSize, wide)
                        if wide and text.count(_layout.escape(but)) == 1 and but.strip()
                        and not any(c.isspace() for c in but) else None)

        def wrap(self, avail_width: float, avail_height: float) -> tuple[float, float]:
            if self.key is None or self.key[-1] * 4 > avail_width:
                return super().wrap(avail_width, avail_height)  # type: ignore[no-any-return]
            kept = _kept("shaped")
            key = (self.key, avail_width)
            got = kept.get(key)
            if not got:
                size = super().wrap(avail_width, avail_height)
                if got is None:
                    if len(kept) > 256:  # a long-lived process: keep it small
                        kept.clear()
                    kept[key] = self._spot()
                return size  # type: ignore[no-any-return]
            laid, at, word, height, widths = got
            lines = list(laid.lines)
            line = copy.copy(lines[at])
            line.words = list(line.words)
            line.words[word] = line.words[word].clone(text=self.but)
            lines[at] = line
            self.width, self._wrapWidths, self.height = avail_width, widths, height
            self.blPara = copy.copy(laid)
            self.blPara.lines = lines
            return avail_width, height

        def _spot(self) -> Any:
            """Return what a letter with a word as wide reuses: the lines and where the word
            is in them; False if it is not one fragment of one line."""
            laid = self.blPara
            if getattr(laid, "kind", 0) != 1:
                return False
            spots = [(i, j) for i, line in enumerate(laid.lines)
                     for j, f in enumerate(line.words) if getattr(f, "text", None) == self.but]
            if len(spots) != 1:
                return False
            return (laid, *spots[0], self.height, self._wrapWidths)

    from planner.render import _charts

    class Chart(_charts.StripChart):  # type: ignore[misc]
        """The chart of everyone's scores whose operators, all but the reader's own markers,
        are worked out once for the letters of a batch given the same characters first."""

        def draw(self) -> None:
            c = self.canv
            seeds = tuple(sorted(getattr(c._doc, "_ringplan_seeds", {}).items()))
            key = ("drawn", seeds)
            kept = self.cache if self.cache is not None and _SHARED else None
            drawn = kept.get(key) if kept is not None else None
            if drawn and all(font.getSubsetInternalName(0, c._doc) == name
                             for font, name in drawn[1]):
                c._code.extend(drawn[0])
            else:
                start = len(c._code)
                self._static(c)
                if kept is not None and drawn is None:
                    # its words: row names, the axis' numbers and name, in the text face
                    words = "".join(_layout.fit_text(label, _layout.FONT, 7, self._left - 6)
                                    for label, _, _ in self.rows) + self.score_name
                    fixed = _fixed(c._doc, _layout.FONT).issuperset(words + "+-0123456789")
                    ops = c._code[start:]
                    font = pdfmetrics.getFont(_layout.FONT)
                    kept[key] = ((ops, ((font, font.getSubsetInternalName(0, c._doc)),))
                                 if fixed and not any(" gs" in op for op in ops) else False)
            self._marks(c)

    return SimpleNamespace(Grid=Grid, Laid=Laid, Seed=Seed, Chart=Chart, Shaped=Shaped)


_GRID_STYLES: dict[tuple[int, int, str], tuple[list[list[Any]], ...]] = {}
_WIDTHS: dict[tuple[str, float, str], float] = {}
_ENCODED: dict[tuple[str, str, str], list[tuple[int, str]]] = {}


def _width(font: Any, line: str, size: float) -> float:
    """Return the width of ``line`` in ``font`` at ``size``, each measured once."""
    wide = _WIDTHS.get((font.fontName, size, line))
    if wide is None:
        if len(_WIDTHS) > 50_000:  # a long-lived process: keep it small
            _WIDTHS.clear()
        wide = _WIDTHS[(font.fontName, size, line)] = font.stringWidth(line, size)
    return wide


def _encoded(font: Any, line: str, size: float, doc: Any
             ) -> tuple[float, list[tuple[int, str]] | None]:
    """Return the width of a line in ``font`` at ``size`` and its (subset, escaped bytes)
    pieces in this document as reportlab's text object writes them (None for a font that is
    not TrueType).

    A line of characters the font was given first (``_fixed``) reads the same in every
    letter given the same characters: it is worked out once.
    """
    wide = _width(font, line, size)
    if not getattr(font, "_dynamicFont", False) or getattr(font, "shapable", False):
        return wide, None
    seed = getattr(doc, "_ringplan_seeds", {}).get(font.fontName)
    if seed is not None:
        # Most lines: characters of the seed's first subset, each its own escaped code
        chars, table = _first_subset(font, seed, doc)
        if chars.issuperset(line):
            return wide, [(0, line.translate(table))]
    got = _ENCODED.get((font.fontName, seed, line)) if seed is not None else None
    if got is None:
        from reportlab.lib.rl_accel import escapePDF

        got = [(subset, escapePDF(t)) for subset, t in font.splitString(line, doc)]
        if seed is not None and _fixed(doc, font.fontName).issuperset(line):
            if len(_ENCODED) > 50_000:
                _ENCODED.clear()
            _ENCODED[(font.fontName, seed, line)] = got
    return wide, got


_FIRST: dict[tuple[str, str], tuple[frozenset[str], dict[int, str]]] = {}


def _first_subset(font: Any, seed: str, doc: Any) -> tuple[frozenset[str], dict[int, str]]:
    """Return the characters of ``seed`` that a document given it first (``_Seed``) sets in
    subset 0 of ``font``, and a ``str.translate`` table from each to its code as reportlab
    escapes it in a string: the same in every document given the same seed."""
    got = _FIRST.get((font.fontName, seed))
    if got is None:
        from reportlab.lib.rl_accel import escapePDF

        assigned = font.state[doc].assignments
        table = {}
        for c in set(seed):
            n = assigned.get(32 if c == "\xa0" else ord(c))  # reportlab sets nbsp as a space
            if n is not None and n >> 8 == 0:
                table[ord(c)] = escapePDF(bytes([n]))
        if len(_FIRST) > 64:  # a long-lived process: keep it small
            _FIRST.clear()
        got = _FIRST[(font.fontName, seed)] = (frozenset(map(chr, table)), table)
    return got


def _fixed(doc: Any, name: str) -> frozenset[str]:
    """Return the characters a document's font ``name`` was given first (``_Seed``), in an
    order that depends on nothing else: they have the same codes in every letter given the
    same characters. Empty for a font given none."""
    seed = getattr(doc, "_ringplan_seeds", {}).get(name)
    return _characters(seed) if seed is not None else frozenset()


@cache
def _characters(text: str) -> frozenset[str]:
    return frozenset(text)


def _runs(places: Sequence[int]) -> list[tuple[int, int]]:
    """Return the runs of consecutive numbers in ``places`` as (first, last)."""
    out: list[tuple[int, int]] = []
    for p in places:
        if out and out[-1][1] == p - 1:
            out[-1] = (out[-1][0], p)
        else:
            out.append((p, p))
    return out


# --- the same font programs in every letter ------------------------------------
#
# A PDF embeds only the glyphs it uses of each font (a subset), and reportlab numbers
# them in the order the text first uses them. Letters differ in their numbers, codes
# and addresses, so each would embed its own subset, made and compressed anew (some
# 0.9 ms per font, a fifth of a letter's time). A letter therefore first gives its
# fonts every character that its kind of text may use, in a fixed order (``_Seed``):
# the letters of one batch and language then embed the same subsets, and
# ``_shared_font_files`` makes each one's font program once per process. A letter that
# uses a character no seed has (say, in its own address) embeds it as well, after the
# others; it is drawn all the same.

_CODE_CHARACTERS = "0123456789ABCDEFGHJKMNPQRSTVWXYZ abcdef-"
"""What the monospaced face sets in a letter: unit codes and the key's fingerprint."""


def _seeds(statistics: Mapping[str, Any], addressees: Sequence[Addressee], code: str
           ) -> tuple[tuple[str, str], ...]:
    """Return (font name, characters) to give a letter's fonts first, in a fixed order.

    The text face gets the characters of the language's texts, of the words and numbers of
    the round's statistics and of the addressees; the bold face what differs between
    letters (numbers, the addressee's id and name) and what letters set in bold the same
    in every letter (headings, the account of a forced opening), so that a heading's
    operators can be drawn once for all letters (``Laid``); the monospaced face the
    characters of codes.
    """
    entries = language.texts(code).entries
    found = set("".join(v for k, v in entries.items()
                        if k.startswith(("letter.", "common.", "opening."))))
    found.update(_NUMBERS)
    found.update(*_words(statistics))
    bold = set(_NUMBERS)
    bold.update(_BOLD_HEADS, *(v for k, v in entries.items() if k == "letter.title"
                               or k.startswith(("letter.col_", "letter.band."))
                               or k.endswith("_heading") and k.startswith("letter.")))
    if (statistics.get("opening") or {}).get("forced"):
        # the account of the opening, with the participant codes of its reason
        bold.update(*(v for k, v in entries.items() if k.startswith("opening.")),
                    entries["letter.reason_masked"],
                    *(statistics.get("participants") or {}).values())
    bold -= set("{}")  # placeholders' braces; their values are among the numbers and words
    for to in addressees:
        found.update(to.name + to.contact + "".join(to.address) + to.lab)
        bold.update(to.name + to.lab)
    return ((_layout.FONT, "".join(sorted(c for c in found if c.isprintable()))),
            (_layout.BOLD, "".join(sorted(c for c in bold if c.isprintable()))),
            (_layout.MONO_REGULAR, _CODE_CHARACTERS))


_BOLD_HEADS = "x_pt u(x_pt) sigma_pt D% En"
"""Column headings of a letter's tables that are no text of a language file."""

_NUMBERS = "0123456789.,+-e±='% ()[]/:;"
"""What numbers, scores and table cells add to the words: digits, signs, marks."""


def _words(value: Any) -> set[str]:
    """Return every text in the statistics (values, not keys: keys are never printed, and a
    material's id, say, is a value in its list as well)."""
    found: set[str] = set()
    stack = [value]
    plain = (float, int, bool, type(None))
    while stack:  # a round of hundreds of laboratories holds some 10^5 values
        item = stack.pop()
        kind = type(item)
        # JSON's own types first: an isinstance of Mapping costs as much as the rest
        if kind in plain:
            continue
        if kind is str:
            found.add(item)
        elif kind is dict:
            stack.extend(item.values())
        elif kind is list or kind is tuple:
            stack.extend(item)
        elif isinstance(item, str):
            found.add(item)
        elif isinstance(item, Mapping):
            stack.extend(item.values())
        elif isinstance(item, (list, tuple)):
            stack.extend(item)
    return found


def _Seed(seeds: tuple[tuple[str, str], ...]) -> Any:  # noqa: N802 - a flowable's name
    return _kinds().Seed(seeds)


_FONT_FILES: dict[tuple[str, tuple[int, ...]], tuple[bytes, bytes]] = {}


def _shared_font_files(names: Sequence[str]) -> Any:
    """Make each embedded font program of the faces of ``names`` once per subset: the subset
    (reportlab's ``makeSubset``) and its Flate stream are kept and given to every letter
    that embeds the same subset. The PDF bytes are those reportlab writes. Returns a
    function that takes the sharing back."""
    from reportlab.pdfbase import pdfdoc, pdfmetrics

    faces = []
    for name in dict.fromkeys(names):
        face = getattr(pdfmetrics.getFont(name), "face", None)
        if face is None or not hasattr(face, "makeSubset") or "makeSubset" in vars(face):
            continue
        make, add = face.makeSubset, face.addSubsetObjects
        key_of = str(getattr(face, "filename", name))

        def made(subset: Sequence[int], make: Any = make, key_of: str = key_of) -> bytes:
            key = (key_of, tuple(subset))
            if key not in _FONT_FILES:
                if len(_FONT_FILES) > 64:  # a long-lived process: keep it small
                    _FONT_FILES.clear()
                raw = make(subset)
                _FONT_FILES[key] = (raw, _layout.deflate(raw))  # as reportlab would
            return _FONT_FILES[key][0]

        def added(doc: Any, fontname: str, subset: Sequence[int], add: Any = add,
                  key_of: str = key_of, face: Any = face) -> Any:
            ref = add(doc, fontname, subset)
            stream = doc.idToObject.get(f"fontFile:{face.filename}({fontname})")
            packed = _FONT_FILES.get((key_of, tuple(subset)))
            if (doc.compression and packed is not None and isinstance(stream, pdfdoc.PDFStream)
                    and stream.content is packed[0] and "Filter" not in stream.dictionary.dict):
                # already compressed: reportlab writes it as it is
                stream.content = packed[1]
                stream.dictionary["Filter"] = pdfdoc.PDFArray([pdfdoc.PDFName("FlateDecode")])
            return ref

        face.makeSubset, face.addSubsetObjects = made, added
        faces.append(face)
    fonts = []
    for name in dict.fromkeys(names):
        font = pdfmetrics.getFont(name)
        if not hasattr(font, "state") or "addObjects" in vars(font):
            continue
        font.addObjects = _font_objects(font, font.addObjects)
        fonts.append(font)

    def restore() -> None:
        for face in faces:
            del face.makeSubset, face.addSubsetObjects
        for font in fonts:
            del font.addObjects

    return restore


_FONT_OBJECTS: dict[tuple[str, int, tuple[int, ...]], tuple[bytes, bytes]] = {}


def _font_objects(font: Any, add: Any) -> Any:
    """Return ``font.addObjects`` that gives each subset's widths and ToUnicode map, the same
    in every letter that embeds the subset, as made once (reportlab's own bytes)."""
    from reportlab.pdfbase import pdfdoc

    def objects(doc: Any) -> None:
        state = font.state.get(doc)
        subsets = [list(x) for x in state.subsets] if state is not None else []
        names = [font.getSubsetInternalName(n, doc)[1:] for n in range(len(subsets))]
        add(doc)
        made = getattr(doc.idToObject.get("BasicFonts"), "dict", {})
        for n, (subset, name) in enumerate(zip(subsets, names, strict=True)):
            pdf_font = made.get(name)
            if pdf_font is None:
                continue
            widths = getattr(pdf_font, "Widths", None)
            cmap = getattr(pdf_font, "ToUnicode", None)
            stream = doc.idToObject.get(getattr(cmap, "name", None))
            if (not isinstance(widths, pdfdoc.PDFArray) or not isinstance(stream, pdfdoc.PDFStream)
                    or not doc.compression or "Filter" in stream.dictionary.dict
                    or not isinstance(stream.content, str)):
                continue
            key = (str(getattr(font.face, "filename", font.fontName)), n, tuple(subset))
            if key not in _FONT_OBJECTS:
                if len(_FONT_OBJECTS) > 256:  # a long-lived process: keep it small
                    _FONT_OBJECTS.clear()
                _FONT_OBJECTS[key] = (widths.format(doc),
                                      _layout.deflate(stream.content.encode("utf8")))
            pdf_font.Widths, stream.content = _FONT_OBJECTS[key]
            stream.dictionary["Filter"] = pdfdoc.PDFArray([pdfdoc.PDFName("FlateDecode")])

    return objects


# --- many letters in parallel --------------------------------------------------

_SHARED: dict[str, Any] = {}


def _init(statistics: Mapping[str, Any], rows_by_lab: Mapping[str, Sequence[Unblinded]],
          paper: str, addressees: Sequence[Addressee], worker: bool = False) -> None:
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
                   views=anonymous_views(statistics), widths={},
                   seeds={code: _seeds(statistics, [a for a in addressees if a.language == code],
                                       code)
                          for code in {a.language for a in addressees}},
                   restore=_shared_font_files(_faces()))


def _faces() -> list[str]:
    """Return the names of the fonts letters are set in, the italic of <i> included."""
    from reportlab.lib.fonts import tt2ps

    _layout.fonts_ready()
    return [_layout.FONT, _layout.BOLD, _layout.MONO_REGULAR, _layout.MONO,
            tt2ps(_layout.FONT, 0, 1), tt2ps(_layout.FONT, 1, 1)]


def _one(job: tuple[Path, Addressee]) -> tuple[Path, Path]:
    """Make one letter of a batch; return (its path, its temporary file, not yet in place)."""
    path, to = job
    return path, _render(path, _SHARED["statistics"], _SHARED["rows"].get(to.lab, ()), to,
                         paper=_SHARED["paper"], views=_SHARED["views"],
                         seeds=_SHARED["seeds"][to.language], staged=True)


def render_all(folder: Path, statistics: Mapping[str, Any], rows: Sequence[Unblinded],
               addressees: Sequence[Addressee], *, paper: str, workers: int = 1) -> list[Path]:
    """Write ``letter-<lab>.pdf`` for every addressee into ``folder``; return the paths.

    With ``workers`` > 1 the letters are made in that many processes; each process
    receives the statistics once, not once per letter. Each letter is written to a
    temporary file; when all are made, they are flushed to disk together and renamed into
    place (``files.settle``): a letter is the new one or the one before, never half, and
    a batch that fails leaves the letters before it as they were.
    """
    from planner import files

    by_lab: dict[str, list[Unblinded]] = {}
    for r in rows:
        by_lab.setdefault(r.lab, []).append(r)
    jobs = [(Path(folder) / f"letter-{to.lab}.pdf", to) for to in addressees]
    if not jobs:
        return []
    staged: list[tuple[Path, Path]] = []
    try:
        if workers <= 1 or len(jobs) < 2:
            _init(statistics, by_lab, paper, addressees)
            try:
                for job in jobs:
                    staged.append(_one(job))
            finally:
                _SHARED.pop("restore", lambda: None)()
                _SHARED.clear()
        else:
            from planner.render import _workers

            # fork shares the parent's memory (no pickling of the statistics) where it exists.
            chunk = max(1, len(jobs) // (workers * 4))
            with _workers.pool(workers, initializer=_init,
                               initargs=(statistics, by_lab, paper, addressees, True),
                               fork=True) as pool:
                for made in pool.map(_one, jobs, chunksize=chunk):
                    staged.append(made)
    except BaseException:
        for _, temp in staged:  # those of letters after a failed one are their worker's
            temp.unlink(missing_ok=True)  # leftovers (files.remove_stale)
        raise
    root, _ = files.placement(jobs[0][0])
    return files.settle(staged, root=root)
