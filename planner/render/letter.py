"""The performance letter of one laboratory: its own results and scores, the others anonymous.

A letter names only the laboratory it is addressed to. Every other
participant appears under its participant code of this round (``P-07``),
drawn from the round secret, so the codes change from round to round and a
laboratory cannot follow another through the rounds. The host is not marked
among the others (everyone knows who shipped the parcels, so marking it would
name it), and only the host's own letter gives the consensus without the host:
with it any participant could leave out each code in turn, recompute, and find
the host's code. The host's letter says that its results were prepared in-house.
Numbers are written with the laboratory's decimal sign.

Contents: the round, how the decoding key was opened as the ledger shows it
(forced before every result was in, or not; when it was decrypted while sealed)
with its full fingerprint, the assigned values, the laboratory's scores with
their bands, its results unit by unit, a chart of everyone's scores with its
own marked, and for rounds of up to ``TABLE_LABS`` participants a table of the
others' scores by participant code.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from planner import codes
from planner.render import _layout

if TYPE_CHECKING:
    from planner.results import Unblinded

__all__ = ["Addressee", "render", "render_all", "TABLE_LABS", "anonymous_view"]

TABLE_LABS = 40
"""Largest round whose letters list every other participant's scores in a table."""

_MM = 72.0 / 25.4


@dataclass(frozen=True, slots=True)
class Addressee:
    """Who a letter goes to: laboratory id, name, address lines, contact, decimal sign."""

    lab: str
    name: str
    address: tuple[str, ...] = ()
    contact: str = ""
    decimal: str = "point"


def _num(v: Any, digits: int = 4, comma: bool = False) -> str:
    if v is None:
        return "-"
    text = f"{v:.{digits}g}" if isinstance(v, float) else str(v)
    return text.replace(".", ",") if comma else text


def anonymous_view(statistics: Mapping[str, Any]) -> dict[str, Any]:
    """Return what every letter shares: per material the scores under participant codes.

    ``{"codes": [participant codes sorted], "materials": {m: {"name": "z" or "z'",
    "scores": {code: score}}}}``; no laboratory id appears in it.
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
           view: Mapping[str, Any], paper: str) -> list[Any]:
    from reportlab.platypus import KeepTogether, Paragraph, Spacer

    from planner.render import _charts

    s = statistics
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
        total = sum(widths)
        scale = width / total if total > width else 1.0
        style = _layout.table_style(extra=[
            ("FONT", (0, 1), (-1, -1), _layout.FONT, 8),
            ("ALIGN", (right_from, 0), (-1, -1), "RIGHT"),
            ("TOPPADDING", (0, 0), (-1, -1), 2.2), ("BOTTOMPADDING", (0, 0), (-1, -1), 2.2),
            *extra])
        return _layout.table(data, [w * scale for w in widths], style, repeatRows=1)

    def bands(cells: Sequence[tuple[int, int, str | None]]) -> list[tuple[Any, ...]]:
        from reportlab.lib.colors import HexColor

        out = []
        for col, row, band in cells:
            colour = _charts.band_colour(band)
            if colour and band != "satisfactory":
                out.append(("BACKGROUND", (col, row), (col, row), HexColor(colour)))
        return out

    address = "<br/>".join(esc(line) for line in (to.name, *to.address))
    story: list[Any] = [
        Paragraph("Your results in this round", st["title"]),
        Paragraph(address + (f"<br/>attn. {esc(to.contact)}" if to.contact else ""), st["body"]),
        Spacer(1, 4 * _MM),
        Paragraph(
            f"<b>{esc(s['title'])}</b>, round {esc(s['round'])}: {n_labs} participants, "
            f"{len(s['materials'])} materials, {s['trials']} trials each. Measurand: "
            f"{esc(s['measurand'])}, in {esc(s['unit'])}. Your laboratory is <b>{esc(to.lab)}</b>; "
            "in the charts and tables of this letter it is marked <i>you</i>. The other "
            "participants appear only under codes P-nn drawn at random for this round, "
            "which change every round.", st["lead"]),
    ]
    if in_house:
        story.append(Paragraph(
            "Your laboratory hosted this round: it prepared the material, so your results are "
            "marked <b>prepared in-house</b>. The assigned values are also given without your "
            "results.", st["body"]))
    story += _key_section(s, to)
    mine = {m: s["scores"].get(m, {}).get("labs", {}).get(to.lab) for m in s["materials"]}
    own_rows = [r for r in rows if r.lab == to.lab]
    scored = any(r.value is not None for r in own_rows)
    if not scored:
        # Nothing to score: say so in words, not with a table of dashes or "0 of 0".
        text = ("The result form of your laboratory was recorded, but none of its results has "
                "a value, so it has no scores in this round." if own_rows else
                "No results of your laboratory were recorded for this round, so it has no "
                "scores.")
        story += [Paragraph("Your scores", st["h2"]), Paragraph(f"<b>{esc(text)}</b>", st["body"])]
    else:
        story += [Paragraph("Your scores", st["h2"]),
                  Paragraph(esc(_verdict(s, mine)), st["body"]), Spacer(1, 2 * _MM)]
    has_en = any(e and e.get("En") is not None for e in mine.values())
    head = ["material", "x_pt", "u(x_pt)", "sigma_pt", "your mean", "D%", "score"] + (
        ["En"] if has_en else []) + ["band"]
    data: list[list[Any]] = [head]
    cells = []
    for m in s["materials"]:
        sc = s["scores"].get(m, {})
        e = mine.get(m)
        if not e:
            data.append([m, n(sc.get("assigned_value")), "-", "-", "no result", "-", "-"]
                        + (["-"] if has_en else []) + ["-"])
            continue
        zp = bool(sc.get("use_z_prime"))
        score = e.get("z_prime") if zp else e.get("z")
        dp = e.get("D_percent")
        if e.get("reference"):
            shown, band = "reference", "reference"
        elif sc.get("banded"):
            shown, band = f"{'z' + chr(39) if zp else 'z'} = {n(score, 3)}", e.get("band") or "-"
        else:
            shown, band = "-", "no band"
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
        story.append(Paragraph(esc(_method_note(s, in_house, n)), st["small"]))

    # The laboratory's own results, unit by unit.
    trials = int(s["trials"])
    own: dict[str, dict[int, Unblinded]] = {}
    for r in rows:
        if r.lab == to.lab:
            own.setdefault(r.material, {})[r.trial] = r
    data = [["material"] + [h for t in range(1, trials + 1) for h in (f"trial {t}", "unit")]]
    notes: list[str] = []
    for m in s["materials"]:
        cells_m = own.get(m, {})
        row = [m]
        for t in range(1, trials + 1):
            r = cells_m.get(t)
            if r is None:
                row += ["-", ""]
                continue
            value = n(r.value) if r.value is not None else "no value"
            if r.uncertainty is not None:
                value += f" ± {n(r.uncertainty, 3)}"
            # Plain strings, not Paragraphs: a big round makes hundreds of these letters.
            row += [value, codes.format(r.code)]
            extra = [f for f in r.flags if f != "in-house"]
            if extra:
                notes.append(f"{m} trial {t}: {', '.join(extra)}")
        data.append(row)
    tw = min(62.0, (width - 70) / max(trials, 1) - 58)
    mono = [("FONT", (c, 1), (c, -1), _layout.MONO_REGULAR, 7) for c in range(2, 2 * trials + 1, 2)]
    align = [("ALIGN", (c, 0), (c, -1), "LEFT") for c in range(2, 2 * trials + 1, 2)]
    if own_rows:
        story += [Paragraph("Your results", st["h2"]),
                  table(data, [70] + [tw, 58] * trials, mono + align)]
    if notes:
        story.append(Paragraph("Flags: " + esc("; ".join(notes)), st["small"]))

    # Everyone's scores, the own marked; then the others by participant code.
    strip_rows = []
    for m in s["materials"]:
        mv = view["materials"].get(m)
        if not mv:
            continue
        strip_rows.append((m, mv["all"], mv["scores"].get(me)))
    if strip_rows and scored:
        name = "z / z'" if any(mv["name"] == "z'" for mv in view["materials"].values()) else "z"
        story.append(KeepTogether([
            Paragraph("Where you stand", st["h2"]),
            Paragraph("Each tick is one participant's score on the material, yours included"
                      + (" (bars: how many scores fall in each step of 0.25)"
                         if n_labs > _charts.MAX_LABELS else "")
                      + "; the diamond is yours. Green: satisfactory, amber: questionable, "
                        "red: unsatisfactory; scores beyond ±4 are drawn at the edge.",
                      st["small"]),
            _charts.StripChart(strip_rows, width=width, score_name=name,
                               cache=view.get("cache")),
        ]))
    if n_labs <= TABLE_LABS and view["materials"]:
        mats = [m for m in s["materials"] if m in view["materials"]]
        for start in range(0, len(mats), 8):
            part = mats[start:start + 8]
            data = [["participant"] + [m + ("'" if view["materials"][m]["name"] == "z'" else "")
                                       for m in part]]
            cells = []
            for i, code in enumerate(view["codes"], start=1):
                row = ["you" if code == me else code]
                for j, m in enumerate(part, start=1):
                    v = view["materials"][m]["scores"].get(code)
                    row.append("-" if v is None else n(round(v, 2), 3))
                    cells.append((j, i, view["materials"][m]["bands"].get(code)))
                data.append(row)
            extra = bands(cells)
            if me in view["codes"]:
                r_me = view["codes"].index(me) + 1
                extra.append(("FONT", (0, r_me), (-1, r_me), _layout.BOLD, 8))
            block = [table(data, [70] + [min(52.0, (width - 70) / len(part))] * len(part), extra)]
            if start == 0:
                block = [Paragraph("All participants", st["h2"]),
                         Paragraph("Deciding score of each participant on each material "
                                   "(' marks z').", st["small"])] + block
            story.append(KeepTogether(block))
    story.append(Spacer(1, 4 * _MM))
    story.append(Paragraph(f"Issued by {esc(s.get('organiser') or 'the coordinator')}.",
                           st["small"]))
    return story


def _key_section(s: Mapping[str, Any], to: Addressee) -> list[Any]:
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
            return f"your {visit} stop" if lab == to.lab else f"the host's {visit} stop"
        return "your laboratory" if lab == to.lab else codes_of.get(lab, "another participant")

    def reason(text: str) -> str:
        nonlocal hidden
        out, hidden = _opening.masked(text, codes_of, keep=to.lab)
        return out

    first = esc(_opening.opening_sentence(opening, name_of=name_of, reason=reason))
    if hidden:
        first += (" In the coordinator's reason the ids of other laboratories are given as "
                  "their participant codes.")
    if opening and opening.get("forced"):
        first = f"<b>{first}</b>"
    from planner import status

    text = " ".join([first, *(esc(t) for t in _opening.later_sentences(
        opening, name_of=name_of,
        spare_to=lambda slot: "your laboratory" if slot == to.lab else "a participant")),
                     esc(status.sealing_sentence(opening or {}))]).strip()
    sheet = "hand-over sheet" if "drift" in s else "packing list"
    return [
        Paragraph("The decoding key", st["h2"]),
        Paragraph(text, st["body"]),
        Spacer(1, 1.5 * _MM),
        Paragraph(f"The key's SHA-256 fingerprint, equal to the fingerprint printed on your "
                  f"{sheet} and run sheet before the units were shipped: <font "
                  f"face='{_layout.MONO_REGULAR}'>"
                  f"{esc(_layout.grouped_fingerprint(s['fingerprint']))}</font>", st["body"]),
        *([Paragraph(
            f"The study's ledger as this letter was written: chain link {s['ledger']['link']}, "
            f"head <font face='{_layout.MONO_REGULAR}'>"
            f"{esc(_layout.grouped_fingerprint(s['ledger']['head']))}</font>. Keep it with your "
            "receipts: the ledger must still pass through this link and head "
            "('ringplan chain --link N'), or it was rewritten after this letter.", st["small"])]
          if s.get("ledger") else []),
    ]


def _verdict(s: Mapping[str, Any], mine: Mapping[str, Any]) -> str:
    """Return the sentences that sum up a laboratory's scores, saying why a band is missing."""
    scored = {m: e for m, e in mine.items() if e and not e.get("reference")}
    banded = {m: e for m, e in scored.items() if s["scores"][m].get("banded")}
    unbanded = [m for m in scored if m not in banded]
    parts = []
    if any(e and e.get("reference") for e in mine.values()):
        refs = [m for m, e in mine.items() if e and e.get("reference")]
        parts.append("Your laboratory is the reference: its results are the assigned values "
                     f"({', '.join(refs)}), so it is not scored against them.")
    if banded:
        bands = [e.get("band") for e in banded.values()]
        outside = [m for m, e in banded.items()
                   if e.get("band") in ("questionable", "unsatisfactory")]
        parts.append(f"{bands.count('satisfactory')} of {len(banded)} scores satisfactory"
                     + (f"; outside the satisfactory band: {', '.join(outside)}" if outside
                        else "") + ".")
    if unbanded:
        reasons = list(dict.fromkeys(str(s["scores"][m].get("no_band")) for m in unbanded))
        lead = ("No z score of this round carries a band" if not banded
                else f"No z score band for {', '.join(unbanded)}")
        parts.append(f"{lead}: {'; '.join(reasons)}. Your difference from the assigned value "
                     "(D%) is given instead; read it against the precision of your method."
                     + (" En, which rests on the uncertainties stated, keeps its band."
                        if any(e.get("En") is not None for e in scored.values()) else ""))
    if not scored and not parts:
        parts.append("No result of your laboratory was evaluated in this round.")
    return " ".join(parts)


def _method_note(s: Mapping[str, Any], in_house: bool, n: Any) -> str:
    st = s["settings"]
    if st["assigned_value"] == "reference":
        text = ("x_pt is the mean result of the reference laboratory, which is not scored "
                "against itself.")
    else:
        text = "x_pt is the robust mean of all participants' means (Algorithm A, ISO 13528)."
    policies = st.get("sigma_pt") or {}
    kinds = list(dict.fromkeys(policies.values()))
    if len(kinds) == 1:
        text += f" sigma_pt: {kinds[0]}."
    elif kinds:
        text += " sigma_pt: " + "; ".join(f"{m}: {v}" for m, v in policies.items()) + "."
    text += (" D% = 100 (your mean - x_pt) / x_pt. z' is used where u(x_pt) > 0.3 sigma_pt. "
             "|score| <= 2 satisfactory, 2 to 3 questionable, >= 3 unsatisfactory; |En| <= 1 "
             "satisfactory (U with k = 2).")
    # Only the host's own letter gives the consensus without the host: in anyone else's,
    # leaving out each participant code in turn and recomputing would single the host out.
    diffs = []
    for m in s["materials"] if in_house else ():
        wh = s["scores"].get(m, {}).get("without_host") or {}
        if wh.get("assigned_value") is not None:
            diffs.append(f"{m} {n(wh['assigned_value'])} ({n(wh['difference'], 2)})")
    if diffs:
        text += (" Without your results the consensus would be (difference in brackets): "
                 + "; ".join(diffs) + ".")
    return text


def render(path: Path, statistics: Mapping[str, Any], rows: Sequence[Unblinded],
           addressee: Addressee, *, paper: str, view: Mapping[str, Any] | None = None) -> Path:
    """Write the letter to ``addressee`` to ``path`` on ``paper``; return ``path``.

    ``view`` is ``anonymous_view(statistics)``, computed once when many letters are made.
    """
    s = statistics
    story = _story(s, rows, addressee, view or anonymous_view(s), paper)
    running = _layout.Running(s["study"], s["title"], s["round"],
                              f"letter to {addressee.lab}",
                              f"for {addressee.name} only")
    return _layout.build(path, story, paper=paper, running=running,
                         title=f"{s['study']} round {s['round']}: letter to {addressee.lab}")


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
    _SHARED.update(statistics=statistics, rows=rows_by_lab, paper=paper,
                   view=anonymous_view(statistics))


def _one(job: tuple[Path, Addressee]) -> Path:
    path, to = job
    return render(path, _SHARED["statistics"], _SHARED["rows"].get(to.lab, ()), to,
                  paper=_SHARED["paper"], view=_SHARED["view"])


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
