"""The round report for the coordinator: summary first, then tables and charts.

Built from the statistics of ``planner.evaluate.round_statistics`` and the
unblinded results; it computes nothing itself, it only arranges. Sections:

1. summary: who took part, how the decoding key was opened (as the ledger
   shows it: forced before every result was in, or not, and each decryption
   while sealed), laboratories without results, what stands out (scores
   outside the satisfactory band, stragglers and outliers, the size of the
   measurement variation), a
   table per material, and the consensus without the host
   (a circulating set: the drift check of the artefacts from the host's
   re-measurements, a table and a chart of the host's means by stop)
2. scores: a laboratory x material matrix of z (or z') scores in their bands
3. per material: laboratory means with the spread of their results and the
   assigned value, z-score bars with the bands, and (for rounds of up to
   ``DETAIL_LABS`` laboratories) every laboratory's figures
4. precision (ISO 5725-2): the estimates, Cochran and Grubbs, Mandel h and k
5. gauge R&R: the variance budget (a bar chart of the shares of the variance and,
   with a tolerance, the measurement spread against it), its table, the analysis of
   variance, the average-and-range method
6. the results as reported (up to ``DETAIL_LABS`` laboratories) and methods

A study with several measurands (``measurands:`` in the spec) gets, after the
round's facts, a summary table across the measurands and what stands out in
each, then sections 1 to 6 once per measurand under its own heading (each
section title starts with the measurand's id), and the methods at the end. A
study in the single-measurand form reads as it always has: no measurand headings.

This report names the laboratories; what goes to a participant is its letter.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

from planner import codes
from planner.render import _layout
from planner.results import SHORTHAND_ID, is_shorthand, measurand_ids, measurand_view

if TYPE_CHECKING:
    from planner.results import Unblinded

__all__ = ["render", "DETAIL_LABS", "fmt", "score_of", "spread", "summary_lines",
           "largest_differences", "sigma_pt_text"]

DETAIL_LABS = 60
"""Largest round whose per-laboratory tables are printed; bigger rounds show the matrix."""

_MM = 72.0 / 25.4


def fmt(v: Any, digits: int = 4) -> str:
    """Return a number with ``digits`` significant figures, '-' for None."""
    if v is None:
        return "-"
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        return f"{v + 0.0:.{digits}g}"  # + 0.0: a negative zero prints as 0, not '-0'
    return str(v)


def score_of(sc: Mapping[str, Any], lab: str) -> tuple[float | None, str]:
    """Return the score that decides a laboratory's band on a material, and its name (z or z')."""
    entry = sc.get("labs", {}).get(lab)
    if entry is None:
        return None, "z"
    if sc.get("use_z_prime"):
        return entry.get("z_prime"), "z'"
    return entry.get("z"), "z"


def spread(rows: Sequence[Unblinded]) -> dict[tuple[str, str], tuple[float, float]]:
    """Return, per (material, lab), the lowest and highest result (or mean ± U for one result)."""
    acc: dict[tuple[str, str], list[float]] = {}
    first_u: dict[tuple[str, str], float | None] = {}
    for r in rows:
        if r.value is not None:
            key = (r.material, r.lab)
            vals = acc.get(key)
            if vals is None:
                acc[key] = [r.value]
                first_u[key] = r.uncertainty
            else:
                vals.append(r.value)
    out = {}
    for key, vals in acc.items():
        u = first_u[key]
        if len(vals) == 1 and u is not None:
            out[key] = (vals[0] - u, vals[0] + u)
        else:
            out[key] = (min(vals), max(vals))
    return out


def summary_lines(statistics: Mapping[str, Any]) -> list[str]:
    """Return the sentences of the summary: laboratories without results, scores outside the
    band, tests, gauge R&R."""
    out: list[str] = []
    host = statistics["host"]
    silent = [lab for lab, n in statistics["results"].get("per_lab", {}).items() if not n]
    sent = {d["lab"] for d in statistics["results"]["missing"]
            if d.get("why") == "reported without a value"}
    for labs, what in (([lab for lab in silent if lab not in sent], "no results recorded from"),
                       ([lab for lab in silent if lab in sent], "no result with a value from")):
        if labs:
            out.append(f"{what} {', '.join(labs)}: "
                       f"{'it has' if len(labs) == 1 else 'they have'} no scores in this round")
    bad: dict[str, dict[str, list[str]]] = {}
    for m in statistics["materials"]:
        sc = statistics["scores"].get(m, {})
        for lab, e in sc.get("labs", {}).items():
            items = []
            if e.get("band") in ("questionable", "unsatisfactory"):
                z, name = score_of(sc, lab)
                items.append(f"{name} = {fmt(z, 3)}, {e['band']}")
            if e.get("en_band") == "unsatisfactory":
                items.append(f"En = {fmt(e['En'], 3)}")
            if items:
                bad.setdefault(lab, {})[m] = items
    banded = [m for m in statistics["materials"]
              if statistics["scores"].get(m, {}).get("banded")]
    reasons: dict[str, list[str]] = {}
    for m in statistics["materials"]:
        why = statistics["scores"].get(m, {}).get("no_band")
        if why:
            reasons.setdefault(why, []).append(m)
    for why, mats in reasons.items():
        which = ("any material" if len(mats) == len(statistics["materials"])
                 else ", ".join(mats))
        out.append(f"no z-score bands for {which}: {why}")
    largest = largest_differences(statistics, [m for ms in reasons.values() for m in ms])
    if largest:
        out.append("largest difference from the assigned value of each laboratory (no band): "
                   + "; ".join(largest))
    if bad:
        for lab, by_m in bad.items():
            mark = " (host, in-house)" if lab == host else ""
            out.append(f"{lab}{mark}: outside the satisfactory band on {len(by_m)} of "
                       f"{len(statistics['materials'])} materials: "
                       + "; ".join(f"{m} ({', '.join(items)})" for m, items in by_m.items()))
    elif banded:
        scope = ("every material" if len(banded) == len(statistics["materials"])
                 else "every material with bands (" + ", ".join(banded) + ")")
        out.append(f"every laboratory is in the satisfactory band on {scope}")
    tests = []
    for m in statistics["materials"]:
        pr = statistics["precision"].get(m, {})
        if "skipped" in pr:
            continue
        c = pr.get("cochran", {})
        if c.get("result") in ("straggler", "outlier"):
            tests.append(f"{m}: Cochran {c['result']} {c['lab']} (C = {fmt(c['statistic'], 3)})")
        for end in ("high", "low"):
            g = pr.get("grubbs", {}).get(end) or {}
            if g.get("result") in ("straggler", "outlier"):
                tests.append(f"{m}: Grubbs {g['result']} {g['lab']} ({end}, G = "
                             f"{fmt(g['statistic'], 3)})")
    if tests:
        out.append("ISO 5725-2 tests: " + "; ".join(tests))
    ga = statistics.get("grr_anova") or {}
    if "skipped" not in ga and ga:
        text = (f"gauge R&R (ANOVA): the SD a result owes to the measurement, GRR = "
                f"{fmt(ga['grr_sd'], 3)}, is {fmt(ga['pct_tv']['grr'], 3)} % of the SD of all "
                f"results, TV (%GRR)")
        if ga.get("pct_tolerance"):
            text += (f"; {fmt(ga['multiplier'])} GRR is {fmt(ga['pct_tolerance']['grr'], 3)} % "
                     f"of the tolerance {fmt(ga['tolerance'])}")
        text += f"; number of distinct categories {fmt(ga.get('ndc'))}"
        out.append(text)
    worst = None
    for m in statistics["materials"]:
        wh = statistics["scores"].get(m, {}).get("without_host") or {}
        d = wh.get("difference_in_sigma_pt")
        if d is not None and (worst is None or abs(d) > abs(worst[1])):
            worst = (m, d)
    if worst is not None:
        out.append(f"leaving the host {host} out of the consensus moves the assigned value by at "
                   f"most {fmt(abs(worst[1]), 2)} sigma_pt ({worst[0]})")
    drift = (statistics.get("drift") or {}).get("materials", {})
    if drift:
        verdicts = {m: e.get("verdict") for m, e in drift.items()}
        failed = [m for m, v in verdicts.items() if v == "fail"]
        widened = [m for m, v in verdicts.items() if v == "pass (widened limit)"]
        text = (f"drift check of the circulating artefacts (host {host}): "
                f"{sum(1 for v in verdicts.values() if v == 'pass')} of {len(verdicts)} within "
                "0.3 sigma_pt")
        if widened:
            text += f"; within the widened limit only: {', '.join(widened)}"
        if failed:
            text += "; DRIFT beyond the widened limit: " + ", ".join(
                f"{m} ({_worst_drift(drift[m])})" for m in failed)
        out.append(text)
    missing = statistics["results"]["missing"]
    if missing:
        labs = sorted({d["lab"] for d in missing})
        out.append(f"{len(missing)} test result(s) missing, from {', '.join(labs)}")
    return out


def largest_differences(statistics: Mapping[str, Any], materials: Sequence[str]) -> list[str]:
    """Return, per laboratory, its largest relative difference D% over ``materials``, as text."""
    worst: dict[str, tuple[float, str]] = {}
    for m in materials:
        for lab, e in statistics["scores"].get(m, {}).get("labs", {}).items():
            d = e.get("D_percent")
            if d is not None and not e.get("reference") and (
                    lab not in worst or abs(d) > abs(worst[lab][0])):
                worst[lab] = (d, m)
    ordered = sorted(worst.items(), key=lambda kv: -abs(kv[1][0]))
    return [f"{lab} {d:+.1f} % ({m})" for lab, (d, m) in ordered]


def _worst_drift(entry: Mapping[str, Any]) -> str:
    """Return the largest difference of an artefact's later stops as text."""
    checks = entry.get("checks", {})
    if not checks:
        return "-"
    visit, c = max(checks.items(), key=lambda kv: abs(kv[1]["difference"]))
    return (f"{visit} - start = {fmt(c['difference'], 3)}, "
            f"{fmt(c['difference_in_sigma_pt'], 2)} sigma_pt")


class _Doc:
    """Helpers bound to one document: styles, widths, table builder."""

    def __init__(self, paper: str) -> None:
        from reportlab.lib.colors import HexColor

        self.st = _layout.styles()
        self.width = _layout.content_width(paper)
        self.hex = HexColor

    def p(self, text: str, style: str = "body") -> Any:
        from reportlab.platypus import Paragraph

        return Paragraph(text, self.st[style])

    def table(self, rows: Sequence[Sequence[Any]], widths: Sequence[float], *,
              extra: Sequence[tuple[Any, ...]] = (), right_from: int = 1, size: float = 8.0,
              repeat: int = 1) -> Any:
        total = sum(widths)
        scale = self.width / total if total > self.width else 1.0
        style = _layout.table_style(extra=[
            ("FONT", (0, 1), (-1, -1), _layout.FONT, size),
            ("ALIGN", (right_from, 0), (-1, -1), "RIGHT"),
            ("TOPPADDING", (0, 0), (-1, -1), 2.2), ("BOTTOMPADDING", (0, 0), (-1, -1), 2.2),
            *extra])
        from planner.render import _tables

        return _tables.table(rows, [w * scale for w in widths], style, repeatRows=repeat)


def _band_cells(cells: Sequence[tuple[int, int, str | None]]) -> list[tuple[Any, ...]]:
    from reportlab.lib.colors import HexColor

    from planner.render import _charts

    out: list[tuple[Any, ...]] = []
    for col, row, band in cells:
        colour = _charts.band_colour(band)
        if colour and band != "satisfactory":
            out.append(("BACKGROUND", (col, row), (col, row), HexColor(colour)))
    return out


def _front(d: _Doc, s: Mapping[str, Any], lead: str) -> list[Any]:
    """The title, the lead paragraph, how the key was opened, its fingerprint, the ledger."""
    from reportlab.platypus import Spacer

    return [
        d.p("Round report", "title"),
        d.p(lead, "lead"),
        d.p(_opening_text(s)),
        d.p(_layout.escape(" ".join(items_lines(s))), "small"),
        Spacer(1, 1.5 * _MM),
        d.p(f"Decoding key SHA-256 (equal to the fingerprint printed before shipping): "
            f"<font face='{_layout.MONO_REGULAR}' size='7.5'>"
            f"{_layout.grouped_fingerprint(s['fingerprint'])}</font>", "small"),
        *([d.p(f"Ledger at evaluation: chain link {s['ledger']['link']}, head "
               f"<font face='{_layout.MONO_REGULAR}' size='7.5'>"
               f"{_layout.grouped_fingerprint(s['ledger']['head'])}</font>", "small")]
          if s.get("ledger") else []),
    ]


def _lead(s: Mapping[str, Any]) -> str:
    """The lead paragraph of a study of one measurand (mark-up)."""
    esc = _layout.escape
    # Every laboratory of the round, those without results too (they are named below).
    n_labs, n_mat = len(s["results"]["per_lab"]) or len(s["labs"]), len(s["materials"])
    return (f"<b>{esc(s['title'])}</b>. Round {esc(s['round'])}, {n_labs} laboratories, "
            f"{n_mat} materials, {s['trials']} trials each; {s['results']['count']} results "
            f"evaluated. Measurand: {esc(s['measurand'])}, in {esc(s['unit'])}. Host: "
            f"<b>{esc(s['host'])}</b>; its results are marked <i>in-house</i> because it "
            "prepared the material.")


def _summary(d: _Doc, s: Mapping[str, Any]) -> list[Any]:
    from reportlab.platypus import Spacer

    esc = _layout.escape
    story: list[Any] = [d.p(_title(s, "Summary"), "h2")]
    story += [d.p(esc(line), "bullet") for line in summary_lines(s)]
    for text in (_flag_line(s),):
        if text:
            story.append(d.p(esc(text), "bullet"))
    story.append(Spacer(1, 3 * _MM))
    head = ["material", "labs", "x_pt", "u(x_pt)", "sigma_pt", "score", "s_r", "s_R",
            "satisf.", "quest.", "unsatisf."]
    rows: list[list[Any]] = [head]
    for m in s["materials"]:
        sc = s["scores"].get(m, {})
        pr = s["precision"].get(m, {})
        bands = [v.get("band") for v in sc.get("labs", {}).values()]
        counts = ([bands.count(b) for b in ("satisfactory", "questionable", "unsatisfactory")]
                  if sc.get("banded") else ["-", "-", "-"])
        score = ((("z'" if sc.get("use_z_prime") else "z") if sc.get("banded") else "D only")
                 if "labs" in sc else "-")
        rows.append([m, len(sc.get("labs", {})) or "-", fmt(sc.get("assigned_value")),
                     fmt(sc.get("u_assigned_value"), 3), fmt(sc.get("sigma_pt"), 3), score,
                     fmt(pr.get("s_r"), 3), fmt(pr.get("s_R"), 3), *counts])
    story.append(d.table(rows, [62, 26, 46, 44, 46, 36, 42, 42, 36, 36, 44]))
    story.append(d.p(_assigned_text(s), "small"))
    story += _tolerance_table(d, s)
    story += _without_host_table(d, s)
    return story


def _title(s: Mapping[str, Any], text: str) -> str:
    """Return a section title, led by the measurand's id in a study of several (mark-up)."""
    prefix = s.get("section_prefix") or ""
    return _layout.escape(f"{prefix}{text}")


def _measurand_lead(statistics: Mapping[str, Any]) -> str:
    """The lead paragraph of a study of several measurands (mark-up)."""
    esc = _layout.escape
    s = statistics
    n_labs = len(s["results"]["per_lab"]) or len(s["labs"])
    mats = {m for b in s["measurands"].values() for m in b.get("measured_on", ())}
    listed = "; ".join(f"<b>{esc(mid)}</b> {esc(b['name'])} [{esc(b['unit'])}]"
                       for mid, b in s["measurands"].items())
    return (f"<b>{esc(s['title'])}</b>. Round {esc(s['round'])}, {n_labs} laboratories, "
            f"{len(mats)} materials, {s['trials']} trials each; {s['results']['count']} "
            f"results evaluated of {len(s['measurands'])} measurands: {listed}. Host: "
            f"<b>{esc(s['host'])}</b>; its results are marked <i>in-house</i> because it "
            "prepared the material.")


def across_lines(statistics: Mapping[str, Any]) -> list[str]:
    """Return the sentences of the summary across measurands: laboratories without results,
    laboratories outside the satisfactory band on any measurand, measurands not computed."""
    out: list[str] = []
    s = statistics
    host = s["host"]
    silent = [lab for lab, n in s["results"].get("per_lab", {}).items() if not n]
    if silent:
        out.append(f"no results recorded from {', '.join(silent)}: "
                   f"{'it has' if len(silent) == 1 else 'they have'} no scores in this round")
    outside: dict[str, list[str]] = {}
    for mid in measurand_ids(s):
        view = measurand_view(s, mid)
        for lab in view["labs"]:
            n_out = n_all = 0
            for m in view["materials"]:
                e = view["scores"].get(m, {}).get("labs", {}).get(lab)
                if not e or e.get("reference") or not view["scores"][m].get("banded"):
                    continue
                n_all += 1
                n_out += (e.get("band") in ("questionable", "unsatisfactory")
                          or e.get("en_band") == "unsatisfactory")
            if n_out:
                outside.setdefault(lab, []).append(f"{mid} ({n_out} of {n_all} materials)")
    for lab, items in outside.items():
        mark = " (host, in-house)" if lab == host else ""
        out.append(f"{lab}{mark}: outside the satisfactory band on " + ", ".join(items))
    for mid, block in s["measurands"].items():
        if "skipped" in block:
            out.append(f"{mid}: not evaluated: {block['skipped']}")
    missing = s["results"]["missing"]
    if missing:
        labs = sorted({d["lab"] for d in missing})
        out.append(f"{len(missing)} test result(s) missing, from {', '.join(labs)} "
                   "(each measurand's summary says which)")
    return out


def _across(d: _Doc, statistics: Mapping[str, Any]) -> list[Any]:
    """The summary across measurands: one row per measurand, then what stands out."""
    from reportlab.platypus import Spacer

    esc = _layout.escape
    s = statistics
    story: list[Any] = [d.p("Summary across measurands", "h2")]
    head = ["measurand", "unit", "mat.", "results", "x_pt from", "banded", "satisf.",
            "quest.", "unsatisf.", "%GRR", "ndc"]
    rows: list[list[Any]] = [head]
    shade: list[tuple[int, int, str | None]] = []
    for mid in measurand_ids(s):
        view = measurand_view(s, mid)
        block = s["measurands"][mid]
        st = view.get("settings") or {}
        sources = {m: (st.get("assigned_by_material") or {}).get(m, st.get("assigned_value"))
                   for m in block.get("measured_on", ())}
        kinds = list(dict.fromkeys(sources.values()))
        where = (", ".join(f"{k} ({sum(v == k for v in sources.values())})" for k in kinds)
                 if len(kinds) > 1 else kinds[0] if kinds else "-")
        banded = [m for m in view["materials"] if view["scores"].get(m, {}).get("banded")]
        bands = [e.get("band") for m in banded
                 for e in view["scores"][m].get("labs", {}).values() if not e.get("reference")]
        counts = [bands.count(b) for b in ("satisfactory", "questionable", "unsatisfactory")]
        ga = view.get("grr_anova") or {}
        ok = bool(ga) and "skipped" not in ga
        rows.append([_cell(d, f"<b>{esc(mid)}</b> {esc(block['name'])}"),
                     _cell(d, esc(block["unit"])), len(block.get("measured_on", ())),
                     view["results"]["count"], _cell(d, esc(where)),
                     f"{len(banded)} of {len(view['materials'])}",
                     *(counts if banded else ["-", "-", "-"]),
                     fmt(ga["pct_tv"]["grr"], 3) if ok else "-",
                     fmt(ga.get("ndc")) if ok else "-"])
        if banded:
            r = len(rows) - 1
            shade += [(7, r, "questionable" if counts[1] else None),
                      (8, r, "unsatisfactory" if counts[2] else None)]
    story.append(d.table(rows, [96, 44, 28, 36, 70, 38, 36, 34, 42, 32, 24], right_from=5,
                         extra=[("VALIGN", (0, 0), (-1, -1), "TOP"),
                                ("ALIGN", (2, 0), (3, -1), "RIGHT"),
                                *_band_cells([c for c in shade if c[2]])]))
    story.append(d.p(esc("mat.: materials the measurand is measured on. "
                         "x_pt from: where the assigned values come from (consensus of the "
                         "participants, a reference laboratory, or a known value from outside "
                         "the round). banded: materials whose z scores carry bands; the counts "
                         "are laboratory-material scores in each band. %GRR: 100 GRR / TV of the "
                         "gauge study (ANOVA) of the measurand."), "small"))
    story += [d.p(esc(line), "bullet") for line in across_lines(s)]
    story.append(Spacer(1, 2 * _MM))
    return story


def _cell(d: _Doc, markup: str) -> Any:
    """A table cell that wraps its text, in the tables' 8 point."""
    from reportlab.lib.styles import ParagraphStyle
    from reportlab.platypus import Paragraph

    return Paragraph(markup, ParagraphStyle("cell8", parent=d.st["cell"], fontSize=8,
                                            leading=9.6))


def _opening_text(s: Mapping[str, Any]) -> str:
    """Return the paragraph (mark-up) on how the key was opened, the forced case in bold."""
    from planner import status
    from planner.render import _opening

    esc = _layout.escape
    opening = s.get("opening")
    first = esc(_opening.opening_sentence(opening, name_of=_opening.slot_name))
    if opening and opening.get("forced"):
        first = f"<b>{first}</b>"
    return " ".join([first, *(esc(t) for t in _opening.later_sentences(
        opening, name_of=_opening.slot_name)),
                     esc(status.sealing_sentence(opening or {}))]).strip()


def _flag_line(s: Mapping[str, Any]) -> str:
    flags = s["results"].get("flags", {})
    parts = [f"{name}: {', '.join(labs)}" for name, labs in flags.items()
             if name != "in-house" and labs]
    return ("flagged results - " + "; ".join(parts)) if parts else ""


def _assigned_text(s: Mapping[str, Any]) -> str:
    st = s["settings"]
    known = st.get("known_values") or {}
    if st["assigned_value"] == "known":
        text = ""
    elif st["assigned_value"] == "reference":
        text = (f"x_pt is the mean result of the reference laboratory {st['reference_lab']}, "
                "which is not scored against itself; u(x_pt) from its stated uncertainty or the "
                "scatter of its results.")
    else:
        text = ("x_pt is the robust mean of the laboratory means (Algorithm A, ISO 13528 "
                "Annex C); u(x_pt) = 1.25 s*/sqrt(p).")
    if known:
        which = ("For every material" if st["assigned_value"] == "known"
                 else "For " + ", ".join(known))
        text += (f" {which} x_pt is a value known from outside the round (ISO 13528 §7.3-7.5), "
                 "with its standard uncertainty u(x_pt); En uses U(x_pt) = 2 u(x_pt): "
                 + "; ".join(f"{m} {fmt(k['value'])} (u = {fmt(k['u'], 3)}"
                             + (f", {k['source']}" if k.get("source") else "") + ")"
                             for m, k in known.items()) + ".")
    text = text.strip()
    text += " " + sigma_pt_text(st.get("sigma_pt") or {})
    text += (" z' replaces z where u(x_pt) > 0.3 sigma_pt. Bands: |score| <= 2 satisfactory, "
             "2 < |score| < 3 questionable, |score| >= 3 unsatisfactory; |En| <= 1 "
             "satisfactory. D = mean - x_pt, D% = 100 D / x_pt.")
    return _layout.escape(text)


def sigma_pt_text(policies: Mapping[str, str]) -> str:
    """Return one sentence saying where sigma_pt comes from, per material where they differ."""
    kinds = list(dict.fromkeys(policies.values()))
    if not kinds:
        return ""
    if len(kinds) == 1:
        return f"sigma_pt: {kinds[0]}."
    return "sigma_pt: " + "; ".join(f"{m}: {v}" for m, v in policies.items()) + "."


def _tolerance_table(d: _Doc, s: Mapping[str, Any]) -> list[Any]:
    """Materials with a tolerance of their own: k GRR (pooled) and k s_R against it."""
    own = s.get("tolerance_by_material") or {}
    if not own:
        return []
    k = next(iter(own.values()))["multiplier"]
    rows: list[list[Any]] = [["material", "tolerance", f"{k:g} GRR in % of it",
                              f"{k:g} s_R in % of it"]]
    for m, e in own.items():
        rows.append([m, fmt(e["tolerance"]), fmt(e["pct_grr"], 3), fmt(e["pct_s_R"], 3)])
    return [d.p(_title(s, "Tolerances of single materials"), "h2"),
            d.table(rows, [80, 60, 90, 90]),
            d.p(_layout.escape("GRR is the gauge study's, pooled over the materials; s_R is the "
                               "material's own (ISO 5725-2)."), "small")]


def _without_host_table(d: _Doc, s: Mapping[str, Any]) -> list[Any]:
    rows: list[list[Any]] = [["material", "x_pt (all)", "x_pt (without host)", "difference",
                              "in sigma_pt", f"z of {s['host']} against it"]]
    notes = []
    for m in s["materials"]:
        sc = s["scores"].get(m, {})
        wh = sc.get("without_host")
        if not wh:
            continue
        if "skipped" in wh:
            notes.append(f"{m}: {wh['skipped']}")
            continue
        rows.append([m, fmt(sc.get("assigned_value")), fmt(wh["assigned_value"]),
                     fmt(wh["difference"], 3), fmt(wh["difference_in_sigma_pt"], 2),
                     fmt(wh["host_z"], 3)])
    out: list[Any] = [d.p(_title(s, "Consensus without the host"), "h2")]
    if len(rows) > 1:
        out.append(d.table(rows, [70, 70, 90, 64, 60, 110]))
    if notes:
        out += [d.p(_layout.escape(n), "small") for n in sorted(set(notes))[:5]]
    return out if len(out) > 1 else []


def _drift(d: _Doc, s: Mapping[str, Any]) -> list[Any]:
    """The drift check of a circulating set: the host's means by stop, table and chart."""
    from reportlab.platypus import CondPageBreak, KeepTogether, Table

    from planner.render import _charts

    drift = s.get("drift")
    if not drift:
        return []
    esc = _layout.escape
    head = ["material", "artefact", "stop", "n", "mean", "s", "diff.", "limit", "widened",
            "check", "verdict"]
    rows: list[list[Any]] = [head]
    shade: list[tuple[Any, ...]] = []
    charts: list[Any] = []
    half = (d.width - 6) / 2
    for m, e in drift["materials"].items():
        first = True
        for visit in drift["visits"]:
            v = e["visits"].get(visit)
            if v is None:
                continue
            c = e["checks"].get(visit)
            if c is None:
                check = ""
            elif c["within_limit"]:
                check = "within"
            elif c["within_widened_limit"]:
                check = "within widened"
            else:
                check = "beyond"
            # A difference below the rounding of the means is shown as 0, not as 1e-14.
            diff = c["difference"] if c else None
            if diff is not None and abs(diff) < 1e-9 * max(1.0, abs(v["mean"])):
                diff = 0
            rows.append([m if first else "", (e.get("code") or "") if first else "", visit,
                         v["n"], fmt(v["mean"]), fmt(v["sd"], 3),
                         fmt(diff, 3) if c else "", fmt(c["limit"], 3) if c else "",
                         fmt(c["widened_limit"], 3) if c else "", check,
                         e["verdict"] if first else ""])
            if check == "beyond":
                shade.append(("BACKGROUND", (9, len(rows) - 1), (9, len(rows) - 1),
                              d.hex(_charts.band_colour("unsatisfactory") or "#ffffff")))
            if first and e["verdict"] == "fail":
                shade.append(("FONT", (10, len(rows) - 1), (10, len(rows) - 1), _layout.BOLD, 8))
            first = False
        if not e["visits"]:
            rows.append([m, e.get("code") or "", "-", "", "", "", "", "", "", "",
                         e["verdict"]])
        if e.get("why"):
            rows[-1][9] = e["why"]
        shown = [visit for visit in drift["visits"] if visit in e["visits"]]
        if len(shown) >= 2 and e.get("limit"):
            means = [e["visits"][v]["mean"] for v in shown]
            us = [e["visits"][v]["u"] for v in shown]
            start = e["visits"]["start"]["mean"] if "start" in e["visits"] else None
            charts.append(_charts.MeansChart(
                shown, means, [mu - 2 * u if u is not None else None for mu, u in zip(means, us)],
                [mu + 2 * u if u is not None else None for mu, u in zip(means, us)],
                centre=start, band=(start - e["limit"], start + e["limit"])
                if start is not None else None,
                highlight=[e["checks"].get(v, {}).get("within_limit") is False for v in shown],
                width=half, height=92, centre_label="start", band_label="0.3 sigma_pt",
                title=f"{m} ({e.get('code') or ''}): host means ± 2u [{s['unit']}]"))
    out: list[Any] = [
        CondPageBreak((len(rows) * 5.2 + 30) * _MM),
        d.p(_title(s, "Drift of the circulating artefacts"), "h2"),
        d.p(esc(f"The host {drift['host']} measured the set at its stops "
                f"{', '.join(drift['visits'])}; each later mean is compared with the first. "
                "diff.: the stop's mean minus the start mean; limit: 0.3 sigma_pt; widened: "
                "0.3 sigma_pt + 2 sqrt(u1^2 + u2^2), u = s/sqrt(n) of each mean."), "small"),
        d.table(rows, [50, 60, 38, 18, 42, 38, 42, 40, 44, 56, 54], size=7.2, right_from=3,
                extra=[("ALIGN", (9, 0), (10, -1), "LEFT"), *shade])]
    out.append(d.p(esc(drift.get("method", "")), "small"))
    if charts:
        grid = [charts[i:i + 2] + [""] * (2 - len(charts[i:i + 2]))
                for i in range(0, len(charts), 2)]
        t = Table(grid, colWidths=[half + 3, half + 3], hAlign="LEFT")
        # FONT: an empty cell still sets a font, reportlab's Helvetica unless told
        t.setStyle([("LEFTPADDING", (0, 0), (-1, -1), 0), ("RIGHTPADDING", (0, 0), (-1, -1), 0),
                    ("TOPPADDING", (0, 0), (-1, -1), 2), ("BOTTOMPADDING", (0, 0), (-1, -1), 4),
                    ("VALIGN", (0, 0), (-1, -1), "TOP"), ("FONT", (0, 0), (-1, -1), _layout.FONT)])
        out.append(KeepTogether([t]))
    return out


def _matrix(d: _Doc, s: Mapping[str, Any]) -> list[Any]:
    """The laboratory x material table of deciding scores, coloured by band."""
    mats = s["materials"]
    host = s["host"]
    from reportlab.platypus import CondPageBreak

    rows_high = min(len(s["labs"]), 12) * 5.2 * _MM
    out: list[Any] = [CondPageBreak(30 * _MM + rows_high),
                      d.p(_title(s, "Scores by laboratory"), "h2"),
                      d.p("The score that decides the band of each material (z, or z' where "
                          "marked in the heading); shaded sand: questionable, brick: unsatisfactory."
                          + (" A material marked D% has no band (see the summary): its "
                             "column gives the difference from the assigned value in per cent."
                             if any(not s["scores"].get(m, {}).get("banded") for m in mats)
                             else ""), "small")]
    chunk = 10  # materials per table, so that the columns stay readable
    for start in range(0, len(mats), chunk):
        part = mats[start:start + chunk]
        head = ["laboratory"] + [m + ("'" if s["scores"].get(m, {}).get("use_z_prime") else "")
                                 + ("" if s["scores"].get(m, {}).get("banded") else " D%")
                                 for m in part]
        rows: list[list[Any]] = [head]
        cells = []
        for i, lab in enumerate(s["labs"], start=1):
            row: list[Any] = [lab + (" (in-house)" if lab == host else "")]
            for j, m in enumerate(part, start=1):
                sc = s["scores"].get(m, {})
                entry = sc.get("labs", {}).get(lab, {})
                if entry.get("reference"):
                    row.append("ref.")
                    continue
                if sc.get("banded"):
                    z, _ = score_of(sc, lab)
                    row.append(f"{z:.2f}" if z is not None else "-")
                    cells.append((j, i, entry.get("band")))
                else:
                    dp = entry.get("D_percent")
                    row.append(f"{dp:+.1f} %" if dp is not None else "-")
            rows.append(row)
        lab_w = 80.0
        out.append(d.table(rows, [lab_w] + [min(46.0, (d.width - lab_w) / len(part))] * len(part),
                           extra=_band_cells(cells), size=7.5))
    return out


def _material_section(d: _Doc, s: Mapping[str, Any], m: str,
                      spreads: Mapping[tuple[str, str], tuple[float, float]]) -> list[Any]:
    from reportlab.platypus import CondPageBreak, KeepTogether

    from planner.render import _charts

    sc = s["scores"].get(m, {})
    pr = s["precision"].get(m, {})
    host = s["host"]
    out: list[Any] = [CondPageBreak(90 * _MM), d.p(_title(s, f"Material {m}"), "h2")]
    if "skipped" in sc:
        out.append(d.p(f"Scores not computed: {_layout.escape(sc['skipped'])}", "small"))
        return out
    labs = list(sc["labs"])
    means = [sc["labs"][lab]["mean"] for lab in labs]
    lows = [spreads.get((m, lab), (None, None))[0] for lab in labs]
    highs = [spreads.get((m, lab), (None, None))[1] for lab in labs]
    x_pt, sig = sc.get("assigned_value"), sc.get("sigma_pt")
    banded = bool(sc.get("banded"))
    band = (x_pt - 2 * sig, x_pt + 2 * sig) if banded and x_pt is not None and sig else None
    hl = [lab == host for lab in labs]
    facts = (f"x_pt = {fmt(x_pt)} {s['unit']}, u(x_pt) = {fmt(sc.get('u_assigned_value'), 3)}, "
             f"sigma_pt = {fmt(sig, 3)} ({sc.get('sigma_pt_source', '')}); {sc.get('method', '')}; "
             f"p = {sc.get('p')}.")
    if "skipped" not in pr:
        facts += (f" s_r = {fmt(pr['s_r'], 3)}, s_R = {fmt(pr['s_R'], 3)}, r = {fmt(pr['r'], 3)},"
                  f" R = {fmt(pr['R'], 3)}.")
    notes = list(sc.get("notes", ()))
    if not banded:
        notes.insert(0, f"no band: {sc.get('no_band')}")
    out.append(d.p(_layout.escape(facts + (" " + "; ".join(notes) if notes else "")), "small"))
    single = all(v is not None and spreads.get((m, lab), (0, 0))[0] == spreads.get((m, lab),
                 (0, 0))[1] for lab, v in zip(labs, means))
    whisker = "mean ± U" if single else "lowest to highest result"
    chart_w = d.width
    means_title = (f"Means ({whisker}), x_pt" + (" ± 2 sigma_pt" if band else "")
                   + f" [{s['unit']}]; the host in colour")
    charts = [_charts.MeansChart(labs, means, lows, highs, centre=x_pt, band=band, highlight=hl,
                                 width=chart_w, height=120, title=means_title)]
    if banded:
        charts.append(_z_chart(sc, labs, hl, chart_w, 105))
    out.append(KeepTogether(charts))
    if len(labs) <= DETAIL_LABS:
        out.append(_detail_table(d, sc, pr, labs, host))
    return out


def _z_chart(sc: Mapping[str, Any], labs: Sequence[str], hl: Sequence[bool], width: float,
             height: float, names: Sequence[str] | None = None) -> Any:
    from planner.render import _charts

    values = [score_of(sc, lab)[0] for lab in labs]
    name = "z'" if sc.get("use_z_prime") else "z"
    lines = [_charts.Line(v, f"{v:+g}", "#b03a2e" if abs(v) == 3 else "#c98a12", True)
             for v in (-3.0, -2.0, 2.0, 3.0)]
    shade = [(-2.0, 2.0, _charts.SAT), (2.0, 3.0, _charts.QUEST), (-3.0, -2.0, _charts.QUEST),
             (3.0, 99.0, _charts.UNSAT), (-99.0, -3.0, _charts.UNSAT)]
    return _charts.BarsChart(list(names or labs), values, lines=lines, shade=shade,
                             flag_at=(2.0, 3.0), highlight=hl, limit=6.0, width=width,
                             height=height, title=f"{name} scores with the bands")


def _detail_table(d: _Doc, sc: Mapping[str, Any], pr: Mapping[str, Any], labs: Sequence[str],
                  host: str) -> Any:
    has_en = any(sc["labs"][lab].get("En") is not None for lab in labs)
    head = ["laboratory", "n", "mean", "sd", "h", "k", "D", "D%", "z", "z'"] + (
        ["En"] if has_en else []) + ["band"]
    rows: list[list[Any]] = [head]
    cells = []
    cellinfo = pr.get("cells", {}) if "skipped" not in pr else {}
    for i, lab in enumerate(labs, start=1):
        e = sc["labs"][lab]
        row = [lab + (" (in-house)" if lab == host else ""), e.get("n"), fmt(e.get("mean")),
               fmt(cellinfo.get(lab, {}).get("sd"), 3),
               fmt(pr.get("mandel_h", {}).get(lab), 3) if cellinfo else "-",
               fmt(pr.get("mandel_k", {}).get(lab), 3) if cellinfo else "-",
               fmt(e.get("D"), 3),
               f"{e['D_percent']:+.1f}" if e.get("D_percent") is not None else "-",
               fmt(e.get("z"), 3), fmt(e.get("z_prime"), 3)]
        if has_en:
            row.append(fmt(e.get("En"), 3))
        row.append("reference" if e.get("reference") else (e.get("band") or "-"))
        rows.append(row)
        cells.append((len(head) - 1, i, e.get("band")))
        if has_en and e.get("en_band") == "unsatisfactory":
            cells.append((len(head) - 2, i, "unsatisfactory"))
    widths = [76, 18, 48, 44, 38, 38, 48, 34, 40, 40] + ([40] if has_en else []) + [64]
    return d.table(rows, widths, extra=_band_cells(cells), size=7.5)


def _precision(d: _Doc, s: Mapping[str, Any]) -> list[Any]:
    from reportlab.platypus import CondPageBreak

    from planner.render import _charts

    out: list[Any] = [CondPageBreak(80 * _MM), d.p(_title(s, "Precision (ISO 5725-2)"), "h2")]
    rows: list[list[Any]] = [["material", "p", "mean", "s_r", "s_L", "s_R", "r", "R",
                              "Cochran C", "Grubbs high", "Grubbs low"]]
    skipped = []
    for m in s["materials"]:
        pr = s["precision"].get(m, {})
        if "skipped" in pr:
            skipped.append(f"{m}: {pr['skipped']}")
            continue
        c = pr.get("cochran", {})
        g = pr.get("grubbs", {})

        def test(t: Mapping[str, Any] | None) -> str:
            if not t or t.get("statistic") is None:
                return "-"
            mark = {"straggler": " *", "outlier": " **"}.get(t.get("result") or "", "")
            return f"{t['lab']} {t['statistic']:.3f}{mark}"

        rows.append([m, pr["p"], fmt(pr["mean"]), fmt(pr["s_r"], 3), fmt(pr["s_L"], 3),
                     fmt(pr["s_R"], 3), fmt(pr["r"], 3), fmt(pr["R"], 3), test(c),
                     test(g.get("high")), test(g.get("low"))])
    if len(rows) > 1:
        out.append(d.table(rows, [54, 20, 42, 36, 36, 36, 36, 36, 62, 62, 62], size=7.2))
        out.append(d.p("r = 2.8 s_r and R = 2.8 s_R. * straggler (beyond the 5 % critical "
                       "value), ** outlier (beyond the 1 %); nothing is removed automatically.",
                       "small"))
    out += [d.p(_layout.escape(t), "small") for t in skipped]
    host = s["host"]
    half = (d.width - 6) / 2
    grid: list[list[Any]] = []
    for m in s["materials"]:
        pr = s["precision"].get(m, {})
        if "skipped" in pr:
            continue
        labs = list(pr["mandel_h"])
        ind = pr.get("indicators", {})
        hl = [lab == host for lab in labs]
        h_lines = [_charts.Line(sign * ind[k], f"{sign * ind[k]:+.2f} ({pct})", colour, True)
                   for k, pct, colour in (("h_5", "5 %", "#c98a12"), ("h_1", "1 %", "#b03a2e"))
                   if ind.get(k) for sign in (-1, 1)]
        k_lines = [_charts.Line(ind[k], f"{ind[k]:.2f} ({pct})", colour, True)
                   for k, pct, colour in (("k_5", "5 %", "#c98a12"), ("k_1", "1 %", "#b03a2e"))
                   if ind.get(k)]
        grid.append([
            _charts.BarsChart(labs, [pr["mandel_h"][lab] for lab in labs], lines=h_lines,
                              flag_at=(ind.get("h_5") or 9e9, ind.get("h_1") or 9e9),
                              highlight=hl, width=half, height=100,
                              title=f"{m}: Mandel h (between laboratories)"),
            _charts.BarsChart(labs, [pr["mandel_k"][lab] for lab in labs], lines=k_lines,
                              flag_at=(ind.get("k_5") or 9e9, ind.get("k_1") or 9e9),
                              highlight=hl, symmetric=False, width=half, height=100,
                              title=f"{m}: Mandel k (within laboratories)"),
        ])
    if grid:
        from reportlab.platypus import Table

        out.append(d.p(_title(s, "Mandel's h and k with the 5 % and 1 % indicator lines"),
                       "h2"))
        t = Table(grid, colWidths=[half + 3, half + 3], hAlign="LEFT")
        # FONT: an empty cell still sets a font, reportlab's Helvetica unless told
        t.setStyle([("LEFTPADDING", (0, 0), (-1, -1), 0), ("RIGHTPADDING", (0, 0), (-1, -1), 0),
                    ("TOPPADDING", (0, 0), (-1, -1), 2), ("BOTTOMPADDING", (0, 0), (-1, -1), 4),
                    ("VALIGN", (0, 0), (-1, -1), "TOP"), ("FONT", (0, 0), (-1, -1), _layout.FONT)])
        out.append(t)
    return out


# The parts of the variance of all results in the gauge study, in the order of the
# budget: the measurement's own parts first (they make up GRR^2), then the materials.
_BUDGET = (("repeatability", "within laboratories (repeatability)", "EV = s_r"),
           ("laboratory", "between laboratories", ""),
           ("material_x_laboratory", "material × laboratory", ""),
           ("reproducibility", "reproducibility (the two above)", "AV"),
           ("grr", "measurement: EV and AV", "GRR = s_R"),
           ("material", "between materials", "PV"))
_ANOVA_ROWS = {"material": "materials", "laboratory": "laboratories",
               "material_x_laboratory": "materials × laboratories",
               "repeatability": "within laboratories (repeatability)", "total": "total"}
# Common practice (AIAG MSA 4th ed.): %GRR under 10 % acceptable, 10-30 % may be, over 30 % not.
_GRR_MARKS = ((0.10, "10 %"), (0.30, "30 %"))


def _gauge(d: _Doc, s: Mapping[str, Any]) -> list[Any]:
    from reportlab.platypus import CondPageBreak

    out: list[Any] = [CondPageBreak(100 * _MM),
                      d.p(_title(s, "Repeatability and reproducibility across laboratories "
                                    "(gauge R&R)"), "h2")]
    ga = s.get("grr_anova") or {"skipped": "not computed"}
    if "skipped" in ga:
        out.append(d.p(_layout.escape(f"ANOVA method not computed: {ga['skipped']}"), "body"))
    else:
        out += _gauge_anova(d, ga, str(s.get("unit") or ""))
    gr = s.get("grr_range") or {"skipped": "not computed"}
    if "skipped" in gr:
        out.append(d.p(_layout.escape(f"Average-and-range method not computed: "
                                      f"{gr['skipped']}"), "small"))
    else:
        rows: list[list[Any]] = [["", "symbol", "SD", "SD / TV in %"]]
        for name, key, symbol in (("within laboratories (repeatability)", "ev", "EV"),
                                  ("added by the laboratories (reproducibility)", "av", "AV"),
                                  ("measurement", "grr", "GRR"),
                                  ("between materials", "pv", "PV"),
                                  ("all results", "tv", "TV")):
            pct = 100.0 if key == "tv" else gr.get(f"pct_{key}")
            rows.append([name, symbol, fmt(gr[key]), fmt(pct, 3)])
        out += [d.p(_title(s, "Average-and-range method (AIAG MSA)"), "h2"),
                d.table(rows, [200, 52, 70, 70], right_from=2),
                d.p(f"Number of distinct categories ndc = {fmt(gr.get('ndc'))}.", "small")]
    return out


def _gauge_anova(d: _Doc, ga: Mapping[str, Any], unit: str) -> list[Any]:
    from reportlab.platypus import KeepTogether, Spacer

    from planner.render import _charts

    k = ga["multiplier"]
    tol = ga.get("pct_tolerance") or {}
    n = ga["materials"] * ga["laboratories"] * ga["trials"]
    share = ga["pct_variance"]
    out: list[Any] = [d.p(
        f"Every laboratory tested every material {ga['trials']} times: {ga['materials']} "
        f"materials × {ga['laboratories']} laboratories × {ga['trials']} trials, {n} results. "
        "The variance of all results splits into what the measurement adds (within "
        "laboratories, between laboratories, and laboratories that differ from material to "
        "material) and the differences between the materials themselves.", "small"),
        Spacer(1, 2 * _MM)]
    colours = {"repeatability": _layout.ACCENT, "laboratory": "#c98a12",
               "material_x_laboratory": "#8fa9ad", "material": "#dde3e5"}
    shares = [_charts.Share(name, share.get(key), colours[key])
              for key, name, _ in _BUDGET if key in colours]
    charts: list[Any] = [_charts.BudgetChart(
        shares, zoom=3, names=("all results", "the measurement"),
        zoom_note="= 100 %, GRR²", width=d.width, height=108,
        title="Variance budget: where the spread of all results comes from")]
    if tol and ga.get("tolerance"):
        spreads = [_charts.Spread(f"{k:g} EV (repeatability)", k * ga["repeatability_sd"]),
                   _charts.Spread(f"{k:g} GRR (measurement)", k * ga["grr_sd"])]
        charts += [Spacer(1, 2 * _MM), _charts.ToleranceChart(
            spreads, tolerance=ga["tolerance"], marks=_GRR_MARKS, width=d.width, height=80,
            title=f"Spread against the tolerance: k SD, k = {k:g}" + (f" [{unit}]" if unit else "")
                  + "; dashed at 10 % and 30 % of it")]
    out.append(KeepTogether(charts))
    budget: list[list[Any]] = [["part of the variation", "symbol", "variance", "SD",
                                "% of all\nvariance", "SD / TV\nin %"]
                               + ([f"{k:g} SD in %\nof tolerance"] if tol else [])]
    for key, name, symbol in (*_BUDGET, ("total", "all results", "TV")):
        var = ga["variance"].get(key)
        row = [name, symbol, fmt(var, 4), fmt(ga["total_sd"] if key == "total" else
                                              ga.get(f"{key}_sd"), 4),
               fmt(100.0 if key == "total" else share.get(key), 3),
               fmt(100.0 if key == "total" else ga["pct_tv"].get(key), 3)]
        if tol:
            row.append(fmt(tol.get(key), 3))
        budget.append(row)
    sub = [("LEFTPADDING", (0, r), (0, r), 14) for r in (2, 3)]
    bold = [("FONT", (0, r), (-1, r), _layout.BOLD, 8) for r in (5, 7)]
    out += [Spacer(1, 2 * _MM),
            d.table(budget, [150, 52, 50, 46, 58, 46] + ([66] if tol else []), right_from=2,
                    extra=sub + bold),
            d.p(_layout.escape(
                (f"Spreads are set against the tolerance as k SD with k = {k:g}: ±3 SD holds "
                 "99.73 % of a normal distribution, and AIAG MSA (4th ed.) uses 6. "
                 if tol else "") +
                "The ratio SD / TV (AIAG's %EV, %AV, %GRR, %PV) needs no multiplier: one would "
                "multiply both SDs and cancel. Shares of the variance add up to 100 %; SD "
                "ratios do not. s_r and s_R here are pooled over the materials (the model "
                "assumes the same spread on each); the precision section gives them per "
                "material (ISO 5725-2)."), "small"),
            d.p(_layout.escape(
                f"Number of distinct categories ndc = 1.41 PV / GRR, truncated: "
                f"{fmt(ga.get('ndc'))}. Common practice (AIAG MSA): %GRR below 10 % "
                "acceptable, 10 to 30 % may be acceptable, above 30 % not acceptable."),
                "small")]
    pooled = bool(ga.get("pooled_table"))
    table = ga["pooled_table"] if pooled else ga["table"]
    p_mxl = ga["table"].get("material_x_laboratory", {}).get("p")
    model = (f"materials × laboratories is pooled into repeatability (its p = {fmt(p_mxl, 3)}"
             f" > {ga['pool_alpha']:g})" if pooled
             else "the model keeps the materials × laboratories term")
    rows: list[list[Any]] = [["source of variation", "degrees of\nfreedom", "sum of\nsquares",
                              "mean\nsquare", "F", "p"]]
    for key, r in table.items():
        name = _ANOVA_ROWS.get(key, key)
        if pooled and key == "repeatability":
            name += "\n  and materials × laboratories, pooled"
        rows.append([name, fmt(r.get("df")), fmt(r.get("ss"), 5), fmt(r.get("ms"), 5),
                     fmt(r.get("f"), 4), fmt(r.get("p"), 3)])
    out.append(KeepTogether([
        Spacer(1, 2 * _MM),
        d.p(f"Analysis of variance: materials crossed with laboratories, both random; "
            f"{model}.", "small"),
        d.table(rows, [190, 60, 66, 66, 50, 50])]))
    return out


def _results(d: _Doc, s: Mapping[str, Any], rows: Sequence[Unblinded]) -> list[Any]:
    from reportlab.platypus import CondPageBreak

    trials = int(s["trials"])
    out: list[Any] = [CondPageBreak(60 * _MM), d.p(_title(s, "Results as reported"), "h2"),
                      d.p("Values per trial with the unit's code; flags: late, after-unseal, "
                          "in-house (the host), spare-used.", "small")]
    by: dict[tuple[str, str], dict[int, Unblinded]] = {}
    for r in rows:
        by.setdefault((r.material, r.lab), {})[r.trial] = r
    head = ["material", "laboratory"] + [f"trial {t}" for t in range(1, trials + 1)] + ["flags"]
    table: list[list[Any]] = [head]
    for (m, lab), cells in by.items():
        flags = sorted({f for r in cells.values() for f in r.flags})
        row: list[Any] = [m, lab]
        for t in range(1, trials + 1):
            r = cells.get(t)
            row.append("-" if r is None else
                       f"{fmt(r.value)}  {codes.format(r.code)}" if r.value is not None else
                       f"no value  {codes.format(r.code)}")
        row.append(", ".join(flags))
        table.append(row)
    tw = min(112.0, (d.width - 150) / max(trials, 1))
    out.append(d.table(table, [60, 40] + [tw] * trials + [80], right_from=2, size=7))
    return out


_VERDICT_SHORT = {"sufficiently homogeneous": "passes",
                  "sufficiently homogeneous by the extended criterion": "passes (extended)",
                  "not sufficiently homogeneous": "fails", "waits": "no sigma_pt",
                  "stable": "stable", "stable within the uncertainty of the means":
                  "stable (widened)", "not stable": "not stable"}


def items_lines(statistics: Mapping[str, Any]) -> list[str]:
    """Return the sentences (plain text) on the items' homogeneity and stability: what was
    recorded, waived and done about it; the front page and the section use them."""
    h = statistics.get("homogeneity")
    if h is None:
        return ["No homogeneity check: the round set no units aside for one when it was "
                "planned."]
    out: list[str] = []
    if not h.get("recorded"):
        out.append("The host's homogeneity check was not recorded: nothing is known of the "
                   "differences between units beyond the participants' own results.")
    else:
        if h.get("after_shipping"):
            out.append("The homogeneity check was recorded after the first packing lists were "
                       "printed, so it did not decide whether the parcels left.")

        def named(items: list[str]) -> str:
            return ", ".join(items) if len(items) < 7 else f"{len(items)} items"

        # A verdict that waits or cannot be computed is no pass: each is named as it is.
        verdicts: dict[str, list[str]] = {}
        steady: dict[str, list[str]] = {}
        for mid, per in h["measurands"].items():
            for m, e in per.items():
                verdicts.setdefault(str(e.get("verdict")), []).append(f"{mid}/{m}")
                if e.get("stability"):
                    steady.setdefault(str(e["stability"].get("verdict")), []).append(
                        f"{mid}/{m}")
        failed = verdicts.get("not sufficiently homogeneous", [])
        waiting = verdicts.get("waits", [])
        unknown = verdicts.get("cannot be computed", [])
        parts = ([f"not sufficiently homogeneous: {named(failed)}"] if failed else []) + (
            [f"no verdict, as no sigma_pt was known even at evaluation: {named(waiting)}"]
            if waiting else []) + ([f"cannot be computed: {named(unknown)}"] if unknown else [])
        out.append("Homogeneity: " + ("; ".join(parts) + "." if parts else
                                      "every material passes."))
        late = [f"{mid}/{m}" for mid, per in h["measurands"].items()
                for m, e in per.items() if e.get("judged_at_evaluation")]
        if late:
            out.append(f"No sigma_pt was known before the round for {named(late)}: the "
                       "check was recorded and the parcels could leave, and its verdict was "
                       "given at evaluation with the round's own sigma_pt.")
        for old in h.get("replaced") or ():
            out.append(f"An earlier homogeneity form ({old.get('file')}, recorded "
                       f"{str(old.get('at', ''))[:16].replace('T', ' ')} UTC) was replaced by "
                       "a later one, whose figures are shown"
                       + (f"; on the earlier form {', '.join(old['not_passing'])}."
                          if old.get("not_passing") else "; nothing on the earlier form held the "
                          "parcels back."))
        if steady:
            unstable = steady.get("not stable", [])
            undecided = steady.get("waits", [])
            parts = ([f"not stable: {named(unstable)}"] if unstable else []) + (
                [f"no verdict, as no sigma_pt was known: {named(undecided)}"]
                if undecided else [])
            out.append("Stability: " + ("; ".join(parts) + "." if parts else
                                        "every material checked is stable."))
        else:
            out.append("Stability: no stability check was recorded.")
    waiver = h.get("waiver")
    if waiver:
        when = ("after the first packing lists were printed" if waiver.get("after_shipping")
                else "before shipping")
        if waiver.get("before_any_form"):
            when += ", before any homogeneity form was recorded"
        out.append(f"The coordinator waived the homogeneity check {when} "
                   f"({str(waiver.get('at', ''))[:16].replace('T', ' ')} UTC): "
                   f"{str(waiver.get('reason', '')).rstrip('.')}.")
    for mid, per in (h.get("widened") or {}).items():
        for m, w in per.items():
            where = "sigma_pt" if w["into"] == "sigma_pt" else "u(x_pt)"
            out.append(f"{mid}/{m}: {where} of the scores includes {w['why']} "
                       f"(ISO 13528 B.2-B.3; combined {w['sd']:.3g}).")
    return out


def _items(d: _Doc, s: Mapping[str, Any]) -> list[Any]:
    """The homogeneity and stability of the items: the host's figures, the criteria, what
    was waived or done, per measurand and material."""
    from reportlab.platypus import CondPageBreak

    from planner.render import _charts

    esc = _layout.escape
    h = s.get("homogeneity")
    out: list[Any] = [CondPageBreak(60 * _MM),
                      d.p("Homogeneity and stability of the items", "h2")]
    if h is not None and h.get("recorded"):
        out.append(d.p(esc(
            "The host measured each homogeneity unit twice under repeatability conditions, "
            "in an order drawn from the round secret (form "
            f"{h.get('file') or '?'}, SHA-256 {str(h.get('sha256') or '')[:16]}..., recorded "
            f"{str(h.get('at') or '')[:16].replace('T', ' ')} UTC"
            + (", after the first packing lists were printed" if h.get("after_shipping")
               else ", before the packing lists were printed") + "). "
            "s_x: SD of the unit means; s_w: within-unit SD; s_s: between-unit SD, "
            "sqrt(s_x² - s_w²/2), 0 when negative. limit: s_s <= 0.3 sigma_pt; ext. limit: "
            "sqrt(F1 (0.3 sigma_pt)² + F2 s_w²), F1 and F2 for the actual g (ISO 13528 "
            "B.2)."), "small"))
        head = ["measurand / material", "g", "mean", "s_x", "s_w", "s_s", "sigma_pt",
                "limit", "ext. limit", "verdict"]
        rows: list[list[Any]] = [head]
        shade: list[tuple[Any, ...]] = []
        notes: list[str] = []
        stab: list[list[Any]] = [["measurand / material", "n1", "n2", "mean 1", "mean 2",
                                  "difference", "limit", "widened", "verdict"]]
        for mid, per in h["measurands"].items():
            for m, e in per.items():
                name = f"{mid} / {m}"
                if "g" not in e:
                    rows.append([name, "", "", "", "", "", "", "", "", e["verdict"]])
                    notes.append(f"{mid}/{m}: {e.get('why')}")
                    continue
                rows.append([name, e["g"], _plain(e["mean"], 5), _plain(e["s_x"]),
                             _plain(e["s_w"]),
                             _plain(e["s_s"]) + ("*" if e["s_s_forced_zero"] else ""),
                             _plain(e["sigma_pt"]), _plain(e["criterion"]),
                             _plain(e["c"] ** 0.5) if e["c"] is not None else "",
                             _VERDICT_SHORT.get(e["verdict"], e["verdict"])])
                if e["verdict"] == "not sufficiently homogeneous":
                    shade.append(("BACKGROUND", (9, len(rows) - 1), (9, len(rows) - 1),
                                  d.hex(_charts.band_colour("unsatisfactory") or "#ffffff")))
                notes.append(f"{mid}/{m}: sigma_pt from {e['sigma_pt_source']}.")
                if e.get("why"):
                    notes.append(f"{mid}/{m}: {e['why']}.")
                if e.get("left_out"):
                    notes.append(f"{mid}/{m}: {e['left_out']} unit(s) without both values "
                                 "were left out.")
                st = e.get("stability")
                if st:
                    stab.append([name, st["n_before"], st["n_after"],
                                 _plain(st["mean_before"], 5), _plain(st["mean_after"], 5),
                                 _plain(st["difference"]), _plain(st["criterion"]),
                                 _plain(st["criterion_widened"]),
                                 _VERDICT_SHORT.get(st["verdict"], st["verdict"])])
        out.append(d.table(rows, [104, 16, 46, 44, 44, 42, 46, 38, 48, 54], size=7.2,
                           right_from=1, extra=[("ALIGN", (9, 0), (9, -1), "LEFT"),
                                                ("FONT", (0, 0), (-1, 0), _layout.BOLD, 7.2),
                                                *shade]))
        if any(e.get("s_s_forced_zero") for per in h["measurands"].values()
               for e in per.values()):
            out.append(d.p(esc("* s_x² < s_w²/2, so s_s is set to 0: common by chance in a "
                               "small check, and no proof of a perfect batch."), "small"))
        # Notes that say the same for every material of a measurand are said once.
        seen: dict[str, None] = {}
        for note in notes:
            seen.setdefault(note)
        out += [d.p(esc(n), "small") for n in _merge_sources(list(seen))]
        if len(stab) > 1:
            out.append(d.p(esc(
                "Stability: the host's retained units, measured after the round (2: n2 "
                "values, mean 2), against the homogeneity check (1: n1 values, mean 1). "
                "difference: mean 2 - mean 1; limit: |difference| <= 0.3 sigma_pt; widened: "
                "0.3 sigma_pt + 2 sqrt(u1² + u2²), u = s/sqrt(n) of each mean (ISO 13528 "
                "B.5)."), "small"))
            out.append(d.table(stab, [104, 22, 22, 50, 50, 54, 44, 48, 86], size=7.2,
                               right_from=1, extra=[("ALIGN", (8, 0), (8, -1), "LEFT"),
                                                    ("FONT", (0, 0), (-1, 0), _layout.BOLD,
                                                     7.2)]))
    out += [d.p(esc(line), "bullet") for line in items_lines(s)]
    return out


def _plain(v: float | None, digits: int = 3) -> str:
    """Return ``v`` to ``digits`` significant figures without an exponent ('-' for None)."""
    import numpy as np

    if v is None:
        return "-"
    return str(np.format_float_positional(float(v), precision=digits, unique=False,
                                          fractional=False, trim="-"))


def _merge_sources(notes: list[str]) -> list[str]:
    """Return the notes with 'x/m: sigma_pt from S.' lines of one source joined per source."""
    by: dict[str, list[str]] = {}
    rest: list[str] = []
    for note in notes:
        head, sep, tail = note.partition(": sigma_pt from ")
        if sep:
            by.setdefault(tail, []).append(head)
        else:
            rest.append(note)
    return [f"sigma_pt from {tail[:-1]}: {', '.join(heads)}." for tail, heads in by.items()] + rest


def _methods(d: _Doc, statistics: Mapping[str, Any]) -> list[Any]:
    out: list[Any] = [d.p("Methods", "h2")]
    for name in ("gauge_rr", "iso5725_2", "iso13528"):
        source = (statistics.get("sources") or {}).get(name)
        if source:
            out.append(d.p(_layout.escape(str(source)), "small"))
    return out


def _measurand(d: _Doc, s: Mapping[str, Any], rows: Sequence[Unblinded]) -> list[Any]:
    """Sections 1 (from its summary on) to 6 of one measurand, from its view of the round."""
    if "skipped" in s and not s["materials"]:
        return [d.p(_title(s, "Summary"), "h2"),
                d.p(_layout.escape(f"Not evaluated: {s['skipped']}."), "body")]
    spreads = spread(rows)
    story = _summary(d, s)
    story += _drift(d, s)
    story += _matrix(d, s)
    for m in s["materials"]:
        story += _material_section(d, s, m, spreads)
    story += _precision(d, s)
    story += _gauge(d, s)
    if len(s["labs"]) <= DETAIL_LABS:
        story += _results(d, s, rows)
    return story


def _heading(d: _Doc, s: Mapping[str, Any]) -> list[Any]:
    """A measurand's heading: a new page, its id, name, unit, method and resolution."""
    from reportlab.lib.styles import ParagraphStyle
    from reportlab.platypus import PageBreak, Paragraph

    esc = _layout.escape
    big = ParagraphStyle("measurand", parent=d.st["h2"], fontSize=15, leading=19,
                         spaceBefore=0, spaceAfter=4)
    facts = [f"in {s['unit']}"]
    if s.get("method"):
        facts.append(f"method: {s['method']}")
    if s.get("resolution") is not None:
        facts.append(f"declared resolution {fmt(s['resolution'])}")
    on = s.get("measured_on") or []
    facts.append(f"measured on {len(on)} material{'s' if len(on) != 1 else ''}: "
                 + ", ".join(on))
    return [PageBreak(),
            Paragraph(f"Measurand {esc(s['measurand_id'])}: {esc(s['measurand'])}", big),
            d.p(esc("; ".join(facts) + "."), "small")]


def render(path: Path, statistics: Mapping[str, Any], rows: Sequence[Unblinded], *,
           paper: str) -> Path:
    """Write the round report to ``path`` on ``paper`` ("A4" or "letter"); return ``path``.

    ``statistics`` is statistics.json (format ``ringplan-statistics/3``); ``rows`` the
    unblinded results of every measurand.
    """
    d = _Doc(paper)
    s = statistics
    if is_shorthand(s):
        view = measurand_view(s, SHORTHAND_ID)
        story = _front(d, view, _lead(view)) + _measurand(d, view, rows)
    else:
        story = _front(d, s, _measurand_lead(s)) + _across(d, s)
        by: dict[str, list[Unblinded]] = {mid: [] for mid in measurand_ids(s)}
        for r in rows:
            by.setdefault(r.measurand, []).append(r)
        for mid in measurand_ids(s):
            view = measurand_view(s, mid)
            view["section_prefix"] = f"{mid}: "
            story += _heading(d, view) + _measurand(d, view, by[mid])
    story += _items(d, s)
    story += _methods(d, s)
    running = _layout.Running(s["study"], s["title"], s["round"], "round report",
                              "for the coordinator: names every laboratory")
    return _layout.build(path, story, paper=paper, running=running,
                         title=f"{s['study']} round {s['round']}: report")
