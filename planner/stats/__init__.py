"""Statistics of an interlaboratory comparison from a plain long table.

A table is a sequence of records (``Row`` or mappings) with ``material``, ``lab``,
``trial``, ``value`` and an optional expanded (k = 2) ``uncertainty``. No Study is
needed, so any CSV in that shape can be evaluated::

    rows = read_long_csv(path)
    result = evaluate_table(rows, sigma_pt=0.5)
    text = summary_text(result)

``evaluate_table`` works on the results of one measurand. A CSV with a ``measurand``
column holds several: ``by_measurand`` splits its rows, and ``summary_text`` of
``{"measurands": {id: result}}`` gives a section per measurand.

``evaluate_table`` runs every method that the data allow - one-way ANOVA, the gauge
R&R ANOVA and average-and-range methods (materials crossed with laboratories, trials
as replicates), ISO 5725-2 precision and ISO 13528 scores - and
returns a JSON-ready dict; a method that cannot run gives ``{"skipped": reason}``::

    materials, labs      ids in order of first appearance
    anova[material]      one-way ANOVA of labs: ss_/df_/ms_between|within, f, p
    grr_anova            table{material, laboratory, material_x_laboratory,
                         repeatability, total: ss, df, ms, f, p}, pooled_table, model
                         ("full"/"pooled"), variance{...}, *_sd, pct_variance (share of
                         the variance of all results), pct_tv (100 SD / TV), pct_tolerance
                         (100 k SD / tolerance), multiplier (k), ndc, materials,
                         laboratories, trials
    grr_range            ev, av, grr, pv, tv, pct_ev/av/grr/pv, pct_tolerance, ndc,
                         laboratory_means, laboratory_r_bar,
                         range_check{d4, ucl, flagged[{material, laboratory, range}]}
    precision[material]  s_r, s_L, s_R, r, R, cells{lab: {n, mean, sd}}, mandel_h, mandel_k,
                         indicators{h_5, h_1, k_5, k_1}, cochran{...}, grubbs{...}, notes
    scores[material]     assigned_value, u_assigned_value, robust_sd, sigma_pt,
                         sigma_pt_source, sigma_pt_policy, method, use_z_prime, banded,
                         no_band (why there is no band, else None), resolution,
                         labs{lab: {mean, n, D, D_percent, z, z_prime, En, band, en_band}}
                         (the reference laboratory: reference true, no scores)

The gauge study crosses every material with every laboratory; it needs the same number
(2 or more) of results in every material x laboratory cell and is skipped with the
reason otherwise (see ``gauge_rr``).
Importing this package loads no numpy or scipy; the method modules are imported when
``evaluate_table`` runs.
"""

from __future__ import annotations

import csv
import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, fields, is_dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from planner.errors import DataError, Where

if TYPE_CHECKING:
    from planner.stats.iso13528 import Known, SigmaPt, Widen

__all__ = ["Row", "read_long_csv", "evaluate_table", "check_reference", "summary_text",
           "by_measurand", "SHORTHAND_ID"]

SHORTHAND_ID = "value"
"""The measurand id of results that name none (``spec.SHORTHAND_ID``): a section of this
id alone is summed up without a heading."""

_REQUIRED = ("material", "lab", "trial", "value")


@dataclass(frozen=True, slots=True)
class Row:
    """One test result: material, laboratory, trial, value, optional U (k = 2), source line
    and measurand (None when the table has no measurand column)."""

    material: str
    lab: str
    trial: str
    value: float
    uncertainty: float | None = None
    line: int | None = None
    measurand: str | None = None


def read_long_csv(path: str | Path) -> list[Row]:
    """Return the rows of a long-format CSV (material, lab, trial, value[, uncertainty]
    [, measurand]).

    Extra columns are ignored; lines starting with ``#`` and blank lines are skipped.
    With a ``measurand`` column every row names its measurand, and material/lab/trial
    may repeat once per measurand. Raises DataError (with file and line) for an
    unreadable or empty file, a missing column, a short row, an empty or non-numeric
    value, an empty measurand, or a repeated (measurand,) material/lab/trial.
    """
    name = str(path)
    try:
        text = Path(path).read_text(encoding="utf-8-sig")
    except OSError as exc:
        raise DataError(f"cannot read the file ({exc.strerror or exc})", Where(name)) from None
    except UnicodeDecodeError:
        raise DataError("the file is not UTF-8 text; save it as UTF-8 CSV",
                        Where(name)) from None
    kept = [(i, ln) for i, ln in enumerate(text.splitlines(), start=1)
            if ln.strip() and not ln.lstrip().startswith("#")]
    if not kept:
        raise DataError("the file is empty; expected a header line "
                        "'material,lab,trial,value' and one line per result", Where(name, 1))
    parsed = list(csv.reader([ln for _, ln in kept]))
    header_line = kept[0][0]
    header = [h.strip().lower() for h in parsed[0]]
    for col in _REQUIRED:
        if col not in header:
            found = ", ".join(repr(h) for h in header) or "nothing"
            raise DataError(f"missing column {col!r} (the header has {found}); expected "
                            "material, lab, trial, value and optionally uncertainty",
                            Where(name, header_line))
    pos = {col: header.index(col) for col in _REQUIRED}
    u_pos = header.index("uncertainty") if "uncertainty" in header else None
    m_pos = header.index("measurand") if "measurand" in header else None
    width = max(pos.values()) + 1
    if len(kept) == 1:
        raise DataError("the file has a header but no results", Where(name, header_line))
    rows: list[Row] = []
    seen: dict[tuple[str, str, str, str], int] = {}
    for (line, _), fields_ in zip(kept[1:], parsed[1:]):
        if len(fields_) < width:
            raise DataError(f"expected at least {width} fields, found {len(fields_)}",
                            Where(name, line))
        if len(fields_) > len(header) and any(f.strip() for f in fields_[len(header):]):
            raise DataError(f"the line has {len(fields_)} fields but the header has "
                            f"{len(header)}; a decimal comma splits a number in two: write "
                            "10.5, not 10,5 (or put the value in double quotes)",
                            Where(name, line))
        material, lab, trial = (fields_[pos[c]].strip() for c in ("material", "lab", "trial"))
        for col, val in (("material", material), ("lab", lab), ("trial", trial)):
            if not val:
                raise DataError(f"{col} is empty; every result needs a {col}",
                                Where(name, line, col))
        measurand = None
        if m_pos is not None:
            measurand = fields_[m_pos].strip() if m_pos < len(fields_) else ""
            if not measurand:
                raise DataError("measurand is empty; with a measurand column every result "
                                "names its measurand", Where(name, line, "measurand"))
        value = _number(fields_[pos["value"]], Where(name, line, "value"))
        unc = None
        if u_pos is not None and u_pos < len(fields_) and fields_[u_pos].strip():
            unc = _number(fields_[u_pos], Where(name, line, "uncertainty"))
            if unc < 0:
                raise DataError(f"{fields_[u_pos].strip()!r} is negative; an expanded "
                                "uncertainty is 0 or more", Where(name, line, "uncertainty"))
        key = (measurand or "", material, lab, trial)
        if key in seen:
            which = f"measurand {measurand!r}, " if measurand is not None else ""
            raise DataError(f"{which}material {material!r}, lab {lab!r}, trial {trial!r} "
                            f"appears twice (first on line {seen[key]})", Where(name, line))
        seen[key] = line
        rows.append(Row(material, lab, trial, value, unc, line, measurand))
    return rows


def by_measurand(rows: Iterable[Row]) -> dict[str, list[Row]]:
    """Return the rows of each measurand, measurands in order of first appearance.

    Rows that name no measurand are given ``SHORTHAND_ID``, the id of a single measurand.
    """
    out: dict[str, list[Row]] = {}
    for row in rows:
        out.setdefault(row.measurand if row.measurand is not None else SHORTHAND_ID,
                       []).append(row)
    return out


def _number(text: str, where: Where) -> float:
    s = text.strip()
    if not s:
        raise DataError("is empty; expected a number (remove the line if there is no result)",
                        where)
    try:
        v = float(s)
    except ValueError:
        raise DataError(f"{s!r} is not a number; use digits with a decimal point, "
                        "e.g. 12.5", where) from None
    if not math.isfinite(v):
        raise DataError(f"{s!r} is not a finite number", where)
    _check_magnitude(v, where, s)
    return v


# Squares of differences of values beyond this overflow, and below it underflow, in the
# sums of squares; no measurement result needs more than this range.
_LARGEST, _SMALLEST = 1e100, 1e-100


def _check_magnitude(v: float, where: Where, text: str | None = None) -> None:
    if abs(v) > _LARGEST or (v != 0 and abs(v) < _SMALLEST):
        raise DataError(f"{text or repr(v)} is outside the range the statistics can square "
                        f"without overflow ({_SMALLEST:g} to {_LARGEST:g} in size); "
                        "express the results in a larger or smaller unit", where)


def _get(row: Any, name: str) -> Any:
    if type(row) is dict or isinstance(row, Mapping):
        return row.get(name)
    return getattr(row, name, None)


def evaluate_table(rows: Iterable[Row | Mapping[str, Any]], *,
                   tolerance: float | None = None,
                   sigma_pt: float | SigmaPt | Mapping[str, float | SigmaPt] | None = None,
                   assigned: str | Mapping[str, str] = "consensus",
                   reference_lab: str | None = None, pool_alpha: float = 0.25,
                   exclude_labs_for_consensus: Sequence[str] = (),
                   known: Mapping[str, Known] | None = None,
                   resolution: float | None = None,
                   widen: Mapping[str, Widen] | None = None,
                   also_without: Sequence[str] = ()) -> dict[str, Any]:
    """Return every statistic the table allows as a JSON-ready dict (floats, None for NaN).

    Keys: materials, labs, anova, grr_anova, grr_range, precision, scores (see the module
    docstring). ``sigma_pt`` is a policy (``iso13528.SigmaPt``) or a fixed value for all
    materials, or a mapping of either by material; a material without one uses the
    participants' robust SD. ``assigned`` ("consensus", "reference" or "known") holds for
    every material, or is a mapping by material (a material not in it: "consensus");
    a "known" material takes its value and standard uncertainty from ``known``.
    ``resolution`` is the declared step the results are reported in (None: read from
    the data). ``widen`` maps a material to the between-unit SD or instability added to
    its sigma_pt or u(x_pt) (``iso13528.Widen``). ``also_without`` names laboratories to leave out of a second consensus:
    ``scores_without[material]`` then holds that consensus (as ``scores`` does) and, under
    ``labs``, the scores of the laboratories left out against it, for every material whose
    assigned value is the consensus. Raises DataError for an empty table, a row without a
    field or with a non-finite value, a repeated material/lab/trial, an unknown ``assigned``
    method,
    ``"reference"`` without a ``reference_lab`` or ``"known"`` without a known value. A
    reference laboratory without results on a material leaves that material's scores
    skipped with the reason; ``check_reference`` refuses a name that is not in the table
    at all.
    """
    import numpy as np

    from planner.stats import anova, gauge_rr, iso5725_2, iso13528
    from planner.stats._common import Skipped

    materials, labs, mat_codes, lab_codes, values, uncs = _columns(rows)
    methods = {m: (assigned.get(m, "consensus") if isinstance(assigned, Mapping) else assigned)
               for m in materials}
    for m, method in methods.items():
        if method not in iso13528.ASSIGNED:
            raise DataError(f"assigned value method {method!r} is unknown; "
                            "use 'consensus', 'reference' or 'known'")
        if method == "reference" and reference_lab is None:
            raise DataError("assigned value 'reference' needs a reference laboratory; name "
                            "one, or use the consensus of participants")
        if method == "known" and (known is None or m not in known):
            raise DataError(f"material {m!r} has no known value; give its value and standard "
                            "uncertainty, or use the consensus of participants")
    if resolution is not None and not (math.isfinite(resolution) and resolution > 0):
        raise DataError(f"the resolution {resolution!r} must be a number above 0")
    mat_arr = np.asarray(mat_codes, dtype=np.intp)
    lab_arr = np.asarray(lab_codes, dtype=np.intp)
    x = np.asarray(values, dtype=np.float64)
    u = np.asarray(uncs, dtype=np.float64)
    lab_names = np.asarray(labs, dtype=object)
    has_u = bool(np.isfinite(u).any())

    out: dict[str, Any] = {"materials": materials, "labs": labs, "anova": {},
                           "grr_anova": None, "grr_range": None, "precision": {},
                           "scores": {}}
    if also_without:
        out["scores_without"] = {}
    order = np.argsort(mat_arr, kind="stable")
    bounds = np.searchsorted(mat_arr[order], np.arange(len(materials) + 1))
    for m, material in enumerate(materials):
        idx = order[bounds[m]:bounds[m + 1]]
        xv, lv = x[idx], lab_arr[idx]
        lab_of = lab_names[lv].tolist()
        n_labs = len(set(lv.tolist()))
        if n_labs < 2:
            out["anova"][material] = {"skipped": f"one-way ANOVA needs 2 or more laboratories; "
                                                 f"found {n_labs}"}
        elif idx.size == n_labs:
            out["anova"][material] = {"skipped": "one result per laboratory: no within-"
                                                 "laboratory scatter to compare with"}
        else:
            out["anova"][material] = _plain(anova.evaluate(xv, lv))
        out["precision"][material] = _plain(iso5725_2.evaluate(xv, lab_of))
        sig = sigma_pt.get(material) if isinstance(sigma_pt, Mapping) else sigma_pt
        method = methods[material]
        sc = iso13528.evaluate(xv, lab_of, uncertainties=u[idx] if has_u else None,
                               sigma_pt=sig, assigned=method, reference_lab=reference_lab,
                               exclude_labs=exclude_labs_for_consensus,
                               known=known.get(material) if known and method == "known"
                               else None, resolution=resolution,
                               widen=(widen or {}).get(material))
        out["scores"][material] = _plain_scores(sc)
        if also_without and method == "consensus":
            other = iso13528.evaluate(xv, lab_of, uncertainties=u[idx] if has_u else None,
                                      sigma_pt=sig, assigned=method,
                                      exclude_labs=[*exclude_labs_for_consensus, *also_without],
                                      resolution=resolution,
                                      widen=(widen or {}).get(material))
            # The second consensus and the left-out laboratories' scores against it.
            out["scores_without"][material] = _plain_scores(other, labs=also_without)

    cube = gauge_rr.arrange_cells(x, [materials[i] for i in mat_codes],
                                  [labs[i] for i in lab_codes])
    if isinstance(cube, Skipped):
        out["grr_anova"] = out["grr_range"] = {"skipped": cube.reason}
    else:
        y, p_lab, o_lab = cube
        study = gauge_rr.evaluate(y, tolerance=tolerance, pool_alpha=pool_alpha,
                                  materials=p_lab, laboratories=o_lab)
        out["grr_anova"] = _plain(study.anova)
        out["grr_range"] = _plain(study.range)
    out["sources"] = {"anova": anova.SOURCE, "gauge_rr": gauge_rr.SOURCE,
                      "iso5725_2": iso5725_2.SOURCE, "iso13528": iso13528.SOURCE}
    if "known" in methods.values():
        out["sources"]["iso13528"] += "; " + iso13528.KNOWN_SOURCE
    return out


def check_reference(rows: Sequence[Row], reference_lab: str) -> None:
    """Raise DataError when ``reference_lab`` has no result in ``rows``, naming the others."""
    labs = list(dict.fromkeys(r.lab for r in rows))
    if reference_lab in labs:
        return
    import difflib

    near = difflib.get_close_matches(reference_lab, labs, n=1)
    hint = (f"did you mean {near[0]!r}? " if near else "") + (
        f"the laboratories are {', '.join(labs[:8])}{', ...' if len(labs) > 8 else ''}")
    raise DataError(f"reference laboratory {reference_lab!r} has no result; {hint}; or leave "
                    "out the reference to use the consensus of participants")


def _columns(rows: Iterable[Any]) -> tuple[list[str], list[str], list[int], list[int],
                                            list[float], list[float]]:
    mat_index: dict[str, int] = {}
    lab_index: dict[str, int] = {}
    mat_codes: list[int] = []
    lab_codes: list[int] = []
    values: list[float] = []
    uncs: list[float] = []
    seen: set[tuple[int, int, str]] = set()
    for i, row in enumerate(rows):
        if type(row) is Row:
            material, lab, trial, value, unc = (row.material, row.lab, str(row.trial),
                                                row.value, row.uncertainty)
            got = (material, lab, trial, value)
        elif type(row) is dict:
            get = row.get
            got = (get("material"), get("lab"), get("trial"), get("value"))
            unc = get("uncertainty")
        else:
            got = tuple(_get(row, f) for f in _REQUIRED)
            unc = _get(row, "uncertainty")
        if not (type(got[3]) is float and _SMALLEST <= abs(got[3]) <= _LARGEST
                and all(got[:3])):
            _check_row(row, i, got)
        material, lab, trial = str(got[0]), str(got[1]), str(got[2])
        value = float(got[3])
        if unc is None or unc == "":
            unc = math.nan
        elif type(unc) is not float:
            try:
                unc = float(unc)
            except (TypeError, ValueError):
                raise DataError(f"uncertainty {unc!r} is not a number",
                                Where(line=_get(row, "line"), field=f"rows[{i}]")) from None
        m = mat_index.setdefault(material, len(mat_index))
        lb = lab_index.setdefault(lab, len(lab_index))
        key = (m, lb, trial)
        if key in seen:
            raise DataError(f"material {material!r}, lab {lab!r}, trial {trial!r} "
                            "appears twice", Where(line=_get(row, "line"), field=f"rows[{i}]"))
        seen.add(key)
        mat_codes.append(m)
        lab_codes.append(lb)
        values.append(value)
        uncs.append(unc)
    if not values:
        raise DataError("the table has no results")
    return list(mat_index), list(lab_index), mat_codes, lab_codes, values, uncs


def _check_row(row: Any, i: int, got: tuple[Any, ...]) -> None:
    """Raise DataError when a record lacks a field or its value is not a finite number."""
    where = Where(line=_get(row, "line"), field=f"rows[{i}]")
    for f, v in zip(_REQUIRED, got):
        if v is None or (isinstance(v, str) and not v.strip()):
            raise DataError(f"the result has no {f!r}", where)
    try:
        value = float(got[3])
    except (TypeError, ValueError):
        raise DataError(f"value {got[3]!r} is not a number", where) from None
    if not math.isfinite(value):
        raise DataError(f"value {got[3]!r} is not a finite number", where)
    _check_magnitude(value, where, f"the value {value!r} of material {got[0]!r}, lab "
                                   f"{got[1]!r}, trial {got[2]!r}")


def _plain(obj: Any) -> Any:
    """Return obj as JSON-ready data: dataclasses to dicts, NaN/inf to None, numpy to Python."""
    from planner.stats._common import Skipped

    t = type(obj)
    if t is float:
        return obj if math.isfinite(obj) else None
    if t is str or t is int or t is bool or obj is None:
        return obj
    if t is dict:
        # Most dicts here are per-laboratory records of scalars: convert them inline.
        return {(k if type(k) is str else str(k)):
                (v if type(v) in _SCALARS else
                 (v if math.isfinite(v) else None) if type(v) is float else _plain(v))
                for k, v in obj.items()}
    if isinstance(obj, Skipped):
        return {"skipped": obj.reason}
    if is_dataclass(obj) and not isinstance(obj, type):
        return {f.name: _plain(getattr(obj, f.name)) for f in fields(obj)}
    if isinstance(obj, Mapping):
        return _plain(dict(obj))
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    if hasattr(obj, "item"):  # numpy scalar
        return _plain(obj.item())
    if isinstance(obj, float):
        return float(obj) if math.isfinite(obj) else None
    return obj


_SCALARS = frozenset({str, int, bool, type(None)})


def _plain_scores(sc: Any, labs: Sequence[str] | None = None) -> Any:
    """Return ISO 13528 scores as JSON-ready data; ``labs``: only these laboratories'."""
    from planner.stats._common import Skipped

    if isinstance(sc, Skipped):
        return {"skipped": sc.reason}
    shown = sc.labs if labs is None else {lab: sc.labs[lab] for lab in labs if lab in sc.labs}
    d = {f.name: _plain(shown if f.name == "labs" else getattr(sc, f.name))
         for f in fields(sc) if f.name != "robust"}
    if sc.robust is not None:
        # The iteration history is for checking the algorithm, not for the report.
        d["robust"] = {"x": _plain(sc.robust.x), "s": _plain(sc.robust.s),
                       "iterations": sc.robust.iterations, "converged": sc.robust.converged,
                       "start": sc.robust.start}
    else:
        d["robust"] = None
    return d


def summary_text(result: Mapping[str, Any]) -> str:
    """Return a compact plain-text summary of an ``evaluate_table`` result, columns aligned.

    A result with ``measurands`` (``{id: result}``, each optionally with ``name`` and
    ``unit``) gives a section per measurand under its own heading; the one measurand
    ``SHORTHAND_ID`` alone gives its summary without a heading.
    """
    if "measurands" in result and "scores" not in result:
        blocks = result["measurands"]
        if list(blocks) == [SHORTHAND_ID]:
            return summary_text(blocks[SHORTHAND_ID])
        parts = []
        for mid, block in blocks.items():
            name, unit = block.get("name"), block.get("unit")
            title = (f"measurand {mid}" + (f": {name}" if name and name != mid else "")
                     + (f", in {unit}" if unit else ""))
            body = (summary_text(block) if "scores" in block
                    else f"not computed: {block.get('skipped', 'no results')}\n")
            parts.append(f"{title}\n{'=' * len(title)}\n{body}")
        return "\n".join(parts)
    out: list[str] = []
    mats, labs = result["materials"], result["labs"]
    out.append(f"{len(mats)} material(s), {len(labs)} laboratory(ies)")
    out.append("")
    head = ["material", "labs", "x_pt", "u(x_pt)", "sigma_pt", "s_r", "s_R", "r", "R",
            "score", "sat", "quest", "unsat"]
    table = [head]
    skipped: list[str] = []
    flags: list[list[str]] = []
    unbanded: dict[str, list[str]] = {}
    for m in mats:
        sc = result["scores"].get(m, {})
        pr = result["precision"].get(m, {})
        if "skipped" in sc:
            skipped.append(f"scores {m}: {sc['skipped']}")
        if "skipped" in pr:
            skipped.append(f"precision {m}: {pr['skipped']}")
        n_labs = len(sc["labs"]) if "labs" in sc else pr.get("p", "-")
        bands = [s["band"] for s in sc.get("labs", {}).values()]
        if sc.get("no_band"):
            unbanded.setdefault(sc["no_band"], []).append(str(m))
        table.append([str(m), str(n_labs), _g(sc.get("assigned_value")),
                      _g(sc.get("u_assigned_value")), _g(sc.get("sigma_pt")),
                      _g(pr.get("s_r")), _g(pr.get("s_R")), _g(pr.get("r")), _g(pr.get("R")),
                      (("z'" if sc.get("use_z_prime") else "z") if sc.get("banded") else
                       "D only") if "labs" in sc else "-",
                      *([str(bands.count(b)) for b in ("satisfactory", "questionable",
                                                        "unsatisfactory")]
                        if sc.get("banded") else ["-", "-", "-"])])
        for lab, s in sc.get("labs", {}).items():
            score = s["z_prime"] if sc.get("use_z_prime") else s["z"]
            name = "z'" if sc.get("use_z_prime") else "z"
            if s["band"] not in (None, "satisfactory"):
                flags.append([str(m), lab, f"{name} = {score:.2f}", s["band"]])
            if s.get("en_band") == "unsatisfactory":
                flags.append([str(m), lab, f"En = {s['En']:.2f}", "unsatisfactory"])
        if "skipped" not in pr:
            for end in ("high", "low"):
                g = pr["grubbs"].get(end)
                if g and g["result"] in ("straggler", "outlier"):
                    flags.append([str(m), g["lab"], f"Grubbs {end} = {g['statistic']:.3f}",
                                  g["result"]])
            c = pr["cochran"]
            if c.get("result") in ("straggler", "outlier"):
                flags.append([str(m), c["lab"], f"Cochran C = {c['statistic']:.3f}", c["result"]])
    out.extend(_align(table))
    ga, gr = result["grr_anova"], result["grr_range"]
    if "skipped" not in ga or "skipped" not in gr:
        out.append("")
    if "skipped" in ga:
        skipped.append(f"gauge R&R (ANOVA): {ga['skipped']}")
    else:
        out.append(f"gauge R&R, ANOVA ({ga['model']} model): GRR {_g(ga['grr_sd'])}, "
                   f"%GRR {_g(ga['pct_tv']['grr'], 3)} (100 GRR/TV), ndc {ga['ndc']}")
        out.append(f"  SD within laboratories (EV) {_g(ga['repeatability_sd'])}, added by the "
                   f"laboratories (AV) {_g(ga['reproducibility_sd'])}, between materials (PV) "
                   f"{_g(ga['material_sd'])}")
        if ga.get("pct_tolerance"):
            out.append(f"  {_g(ga['multiplier'])} GRR = {_g(ga['pct_tolerance']['grr'], 3)} % "
                       f"of the tolerance {_g(ga['tolerance'])}")
    if "skipped" in gr:
        skipped.append(f"gauge R&R (average and range): {gr['skipped']}")
    else:
        out.append(f"gauge R&R, average and range: EV {_g(gr['ev'])}, AV {_g(gr['av'])}, "
                   f"GRR {_g(gr['grr'])} ({_g(gr['pct_grr'], 3)} % of TV), ndc {gr['ndc']}")
        for cell in gr["range_check"]["flagged"]:
            flags.append([str(cell["material"]), str(cell["laboratory"]),
                          f"range = {_g(cell['range'])}", "above UCL_R"])
    if flags:
        out.append("")
        out.append(f"flags ({len(flags)})")
        out.extend("  " + ln for ln in _align(flags)[:_MAX_FLAGS])
        if len(flags) > _MAX_FLAGS:
            out.append(f"  ... and {len(flags) - _MAX_FLAGS} more (see the full result)")
    for reason, where in unbanded.items():
        out.append("")
        out.append(f"no z-score bands for {', '.join(where)}: {reason}.")
        out.append("difference of each laboratory from the assigned value, D (D%):")
        for m in where[:_MAX_FLAGS]:
            labs_m = result["scores"][m]["labs"]
            out.append(f"  {m}: " + ", ".join(
                f"{lab} {_signed(e.get('D'))}"
                + (f" ({_signed(e.get('D_percent'), 2)} %)" if e.get("D_percent") is not None
                   else "") + (" reference" if e.get("reference") else "")
                for lab, e in list(labs_m.items())[:_MAX_FLAGS]))
    if skipped:
        out.append("")
        out.append("not computed")
        out.extend(f"  {s}" for s in skipped)
    return "\n".join(out).rstrip() + "\n"


_MAX_FLAGS = 30  # keep the screen summary short; the dict holds every score


def _g(v: Any, digits: int = 4) -> str:
    if v is None:
        return "-"
    if isinstance(v, float):
        return f"{v:.{digits}g}"
    return str(v)


def _signed(v: Any, digits: int = 3) -> str:
    return "-" if v is None else f"{v:+.{digits}g}"


def _align(table: list[list[str]]) -> list[str]:
    widths = [max(len(r[i]) for r in table) for i in range(len(table[0]))]
    return ["  ".join(c.ljust(w) for c, w in zip(r, widths)).rstrip() for r in table]
