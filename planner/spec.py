"""Read study.yaml, check it, and return a frozen Study.

Every problem is reported with the file, the 1-based line and the field path
(``study.yaml:14: labs[2].id: 'lab-b' is used twice; ids must be unique``), one
line per problem, all problems at once. Line numbers come from the YAML node
tree; values are checked by typed pydantic models, then by cross-field rules.
"""

from __future__ import annotations

import difflib
import re
from datetime import date
from pathlib import Path
from typing import Any, Literal

import yaml
from pydantic import (BaseModel, ConfigDict, Field, ValidationError, field_validator,
                      model_validator)

from planner.errors import PlannerError, SpecError, Where

__all__ = [
    "Study", "StudyInfo", "Lab", "Contact", "Blackout", "Material", "Hazard",
    "Design", "Schedule", "Transit", "Evaluation", "SigmaPtPolicy", "PrecisionStudy",
    "Participants", "MaterialEvaluation", "PastRound", "Trustee", "Sealing", "Fonts",
    "KnownValue", "Measurand", "load", "parse", "SPEC_NAME", "SHORTHAND_ID", "FORM_WORDS",
]

SPEC_NAME = "study.yaml"
SHORTHAND_ID = "value"
"""The id of the one measurand of a spec written in the single-measurand form
(``study.measurand`` and ``study.unit``): its results sit in the form's ``value`` column."""
FORM_WORDS = ("trial", "position", "code", "value", "uncertainty", "date", "analyst", "remarks",
              "measurand", "material", "lab", "flags")
"""Column names of the result form and results.csv that a measurand id must not take."""
_ID = r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,31}$"
_WEEKDAYS = ("mon", "tue", "wed", "thu", "fri", "sat", "sun")


class _Model(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, str_strip_whitespace=True,
                              allow_inf_nan=False)


class Fonts(_Model):
    """A study's own TrueType files, relative to the study folder (planner.fonts)."""

    regular: str = Field(min_length=1)
    bold: str | None = Field(default=None, min_length=1)
    italic: str | None = Field(default=None, min_length=1)


class StudyInfo(_Model):
    id: str = Field(pattern=_ID)
    title: str = Field(min_length=1)
    # The single-measurand form; a study with ``measurands:`` leaves both out.
    measurand: str | None = Field(default=None, min_length=1)
    unit: str | None = Field(default=None, min_length=1)
    organiser: str = ""
    paper: Literal["A4", "letter"] = "A4"
    label_sheet: str = "a4-3x8-70x37"
    fonts: Fonts | None = None


class Contact(_Model):
    name: str = Field(min_length=1)
    email: str = ""
    phone: str = ""


class Blackout(_Model):
    start: date = Field(alias="from")
    end: date = Field(alias="to")
    reason: str = ""


class Lab(_Model):
    id: str = Field(pattern=_ID)
    name: str = Field(min_length=1)
    address: tuple[str, ...] = Field(min_length=1)
    contact: Contact
    country: str = Field(pattern=r"^[A-Z]{2}$")
    can_host: bool = False
    decimal: Literal["point", "comma"] = "point"
    # The language of everything the laboratory receives (planner.language); None: the study's.
    language: str | None = None
    host_weight: float = Field(default=1.0, gt=0, le=1000)
    transit_days: int | None = Field(default=None, ge=0, le=30)
    joined: date | None = None
    blackouts: tuple[Blackout, ...] = ()
    # With trustees (``sealing``), the host's own copy of the map is sealed to this key.
    public_key: str | None = None

    @field_validator("language")
    @classmethod
    def _known_language(cls, code: str | None) -> str | None:
        from planner import language

        if code is not None and code not in language.available():
            raise ValueError(f"{code!r} is not a language of ringplan's documents; use one of "
                             f"{', '.join(language.available())}")
        return code


class Hazard(_Model):
    word: str = Field(min_length=1, max_length=24)
    note: str = Field(min_length=1)


class Material(_Model):
    id: str = Field(pattern=_ID)
    description: str = Field(min_length=1)
    amount: float = Field(gt=0, allow_inf_nan=False)
    amount_unit: str = Field(min_length=1)
    storage: str = Field(min_length=1)
    stability_days: int = Field(gt=0, le=3650)
    hazard: Hazard | None = None


class Parcel(_Model):
    """What every unit a laboratory receives shows, whatever its material (planner.parcel)."""

    storage: str | None = Field(default=None, min_length=1, max_length=200)


class Design(_Model):
    mode: Literal["split", "circulate"] = "split"
    trials: int = Field(ge=2, le=20)
    spares_per_lab: int = Field(default=1, ge=0, le=10)
    retained_by_host: int = Field(default=0, ge=0, le=1000)
    homogeneity_units: int = Field(default=0, ge=0, le=100)
    run_order: Literal["random", "balanced"] = "random"


class Transit(_Model):
    """Transit days between two laboratories (either direction unless the reverse has its own row)."""

    origin: str = Field(alias="from")
    destination: str = Field(alias="to")
    days: int = Field(ge=0, le=30)


class Schedule(_Model):
    prepare_on: date | None = None
    receive_by: date
    test_window_days: int = Field(ge=1, le=120)
    reporting_days: int = Field(ge=0, le=120)
    ship_weekdays: tuple[Literal["mon", "tue", "wed", "thu", "fri", "sat", "sun"], ...] = (
        "mon", "tue", "wed", "thu")
    transit_days: int = Field(default=2, ge=0, le=30)
    stability_margin_days: int = Field(default=0, ge=0, le=3650)
    round_interval_weeks: int = Field(default=13, ge=1, le=104)
    transit: tuple[Transit, ...] = ()


class PrecisionStudy(_Model):
    """sigma_R and sigma_r of the method from a collaborative precision study (ISO 5725-2)."""

    sigma_R: float = Field(gt=0, allow_inf_nan=False)
    sigma_r: float = Field(gt=0, allow_inf_nan=False)


class Participants(_Model):
    min_participants: int = Field(default=8, ge=3, le=1000)


_POLICIES = ("value", "percent", "precision", "participants")


def _policy_shorthand(raw: Any) -> Any:
    """Read ``sigma_pt: 0.5`` as a fixed value and ``sigma_pt: participants`` as that policy."""
    if isinstance(raw, bool):
        return raw
    if isinstance(raw, (int, float)):
        return {"value": raw}
    if isinstance(raw, str) and raw.strip() == "participants":
        return {"participants": {}}
    if isinstance(raw, dict) and raw.get("participants", 0) in (None, True):
        return {**raw, "participants": {}}
    return raw


class SigmaPtPolicy(_Model):
    """How sigma_pt is set: exactly one of value, percent, precision or participants."""

    value: float | None = Field(default=None, gt=0, allow_inf_nan=False)
    percent: float | None = Field(default=None, gt=0, le=100, allow_inf_nan=False)
    precision: PrecisionStudy | None = None
    participants: Participants | None = None

    @model_validator(mode="after")
    def _one(self) -> SigmaPtPolicy:
        given = [k for k in _POLICIES if getattr(self, k) is not None]
        if len(given) != 1:
            raise ValueError(f"give exactly one of {', '.join(_POLICIES)}"
                             + (f" (found {', '.join(given)})" if given else ""))
        return self

    @property
    def kind(self) -> str:
        return {"value": "fixed"}.get(self._key, self._key)

    @property
    def _key(self) -> str:
        return next(k for k in _POLICIES if getattr(self, k) is not None)


class KnownValue(_Model):
    """An assigned value from outside the round (ISO 13528 §7.3-7.5): a certified reference
    material, a formulation, or a reference value, with its standard uncertainty."""

    value: float = Field(allow_inf_nan=False)
    u: float = Field(gt=0, allow_inf_nan=False)
    source: str = ""


class MaterialEvaluation(_Model):
    """Settings of one material that differ from its measurand's."""

    sigma_pt: SigmaPtPolicy | None = None
    tolerance: float | None = Field(default=None, gt=0, allow_inf_nan=False)
    known_value: KnownValue | None = None

    _shorthand = field_validator("sigma_pt", mode="before")(
        lambda cls, raw: _policy_shorthand(raw))


class Evaluation(_Model):
    tolerance: float | None = Field(default=None, gt=0, allow_inf_nan=False)
    sigma_pt: SigmaPtPolicy = SigmaPtPolicy(participants=Participants())
    # "known": every material gives a known_value under by_material. A material with a
    # known_value uses it whatever this says.
    assigned_value: Literal["consensus", "reference", "known"] = "consensus"
    reference_lab: str | None = None
    pool_alpha: float = Field(default=0.25, gt=0, lt=1)
    by_material: dict[str, MaterialEvaluation] = {}
    # Where a between-unit SD or an instability that is not negligible goes (ISO 13528
    # B.2.4, B.3): "uncertainty" widens u(x_pt), "sigma_pt" widens sigma_pt. None reads
    # as "uncertainty" and stays out of the round definition, so rounds planned before
    # the setting existed keep their fingerprints.
    between_units: Literal["uncertainty", "sigma_pt"] | None = None

    _shorthand = field_validator("sigma_pt", mode="before")(
        lambda cls, raw: _policy_shorthand(raw))

    def sigma_pt_for(self, material: str) -> SigmaPtPolicy:
        """Return the sigma_pt policy of a material: its own, else the study's."""
        own = self.by_material.get(material)
        return own.sigma_pt if own is not None and own.sigma_pt is not None else self.sigma_pt

    def tolerance_for(self, material: str) -> float | None:
        """Return the tolerance of a material: its own, else the study's (None: no tolerance)."""
        own = self.by_material.get(material)
        return own.tolerance if own is not None and own.tolerance is not None else self.tolerance

    def known_value_for(self, material: str) -> KnownValue | None:
        """Return the known value of a material, or None when it has none."""
        own = self.by_material.get(material)
        return own.known_value if own is not None else None

    @property
    def widen(self) -> str:
        """Return where a between-unit SD or instability that is not negligible goes."""
        return self.between_units or "uncertainty"

    def assigned_for(self, material: str) -> str:
        """Return where a material's assigned value comes from: known, reference or consensus."""
        return "known" if self.known_value_for(material) is not None else self.assigned_value


class Measurand(_Model):
    """One property measured on the units: its name, unit, reporting and evaluation."""

    id: str = Field(pattern=_ID)
    name: str = Field(min_length=1)
    unit: str = Field(min_length=1)
    # The step results are reported in (0.01 for two decimals); None: read from the data.
    resolution: float | None = Field(default=None, gt=0, allow_inf_nan=False)
    method: str = ""
    # The materials it is measured on; None: every material.
    materials: tuple[str, ...] | None = Field(default=None, min_length=1)
    # Whether the form asks for an expanded uncertainty: optional, required or none.
    uncertainty: Literal["optional", "required", "none"] = "optional"
    evaluation: Evaluation = Evaluation()

    def applies_to(self, material: str) -> bool:
        """Return whether this measurand is measured on ``material``."""
        return self.materials is None or material in self.materials


class Trustee(_Model):
    id: str = Field(pattern=_ID)
    name: str = Field(min_length=1)
    public_key: str = Field(min_length=1)


class Sealing(_Model):
    """Trustees of the key: any ``threshold`` of them open it, fewer cannot."""

    threshold: int = Field(ge=1, le=50)
    trustees: tuple[Trustee, ...] = Field(min_length=1, max_length=50)


class PastRound(_Model):
    round: str = Field(pattern=_ID)
    host: str
    date: date


class Study(_Model):
    """A validated study: the spec's sections as frozen models with tuples."""

    study: StudyInfo
    measurands: tuple[Measurand, ...] | None = Field(default=None, min_length=1, max_length=20)
    laboratories: tuple[Lab, ...] = Field(min_length=2)
    materials: tuple[Material, ...] = Field(min_length=2)
    parcel: Parcel | None = None
    design: Design
    schedule: Schedule
    evaluation: Evaluation = Evaluation()
    sealing: Sealing | None = None
    history: tuple[PastRound, ...] = ()

    @property
    def id(self) -> str:
        return self.study.id

    def lab(self, lab_id: str) -> Lab:
        """Return the laboratory with this id (KeyError if none)."""
        for lab in self.laboratories:
            if lab.id == lab_id:
                return lab
        raise KeyError(lab_id)

    def material(self, material_id: str) -> Material:
        for material in self.materials:
            if material.id == material_id:
                return material
        raise KeyError(material_id)

    @property
    def all_measurands(self) -> tuple[Measurand, ...]:
        """Return every measurand; the single-measurand form gives one, with id SHORTHAND_ID,
        the study's measurand and unit, and the top-level evaluation section."""
        if self.measurands is not None:
            return self.measurands
        return (Measurand(id=SHORTHAND_ID, name=self.study.measurand or "",
                          unit=self.study.unit or "", evaluation=self.evaluation),)

    @property
    def shorthand(self) -> bool:
        """Return whether the spec is in the single-measurand form (no ``measurands:``)."""
        return self.measurands is None

    def measurand(self, measurand_id: str) -> Measurand:
        """Return the measurand with this id (KeyError if none)."""
        for item in self.all_measurands:
            if item.id == measurand_id:
                return item
        raise KeyError(measurand_id)

    def measurands_of(self, material: str) -> tuple[Measurand, ...]:
        """Return the measurands measured on ``material``, in spec order."""
        return tuple(m for m in self.all_measurands if m.applies_to(material))

    @property
    def hosts(self) -> tuple[Lab, ...]:
        return tuple(lab for lab in self.laboratories if lab.can_host)


# --- reading -----------------------------------------------------------------

class _Loader(getattr(yaml, "CSafeLoader", yaml.SafeLoader)):  # type: ignore[misc]
    """Safe loader that leaves dates as text, so that pydantic checks them
    (PyYAML would raise on 2027-02-30 before any message could name the line)."""


_Loader.yaml_implicit_resolvers = {
    first: [(tag, rx) for tag, rx in resolvers if tag != "tag:yaml.org,2002:timestamp"]
    for first, resolvers in yaml.SafeLoader.yaml_implicit_resolvers.items()
}


def _refuse_aliases(root: yaml.Node, name: str) -> None:
    """Raise SpecError at the first node used twice (an alias, ``*name``) or repeated key.

    Aliases can make a few lines of YAML expand into millions of values; a study spec
    never needs them, so they are refused before anything is built from the text.
    """
    seen: set[int] = set()
    stack = [root]
    while stack:
        node = stack.pop()
        if id(node) in seen:
            raise SpecError("anchors and aliases (&name, *name) are not allowed in a study "
                            "spec; write each value out",
                            Where(name, node.start_mark.line + 1))
        seen.add(id(node))
        if isinstance(node, yaml.MappingNode):
            first: dict[str, int] = {}
            for key, value in node.value:
                line = key.start_mark.line + 1
                if isinstance(key, yaml.ScalarNode) and key.value in first:
                    # YAML would keep the last silently; a second value is a slip to name
                    raise SpecError(f"the key {key.value!r} appears twice in this section "
                                    f"(first on line {first[key.value]}); keep one",
                                    Where(name, line))
                if isinstance(key, yaml.ScalarNode):
                    first[key.value] = line
                stack += [key, value]
        elif isinstance(node, yaml.SequenceNode):
            stack += node.value


def _lines(node: yaml.Node, path: tuple[Any, ...], out: dict[tuple[Any, ...], int]) -> None:
    """Record the 1-based line of every node, keyed by its path of keys and indexes."""
    out.setdefault(path, node.start_mark.line + 1)
    if isinstance(node, yaml.MappingNode):
        for key, value in node.value:
            name = key.value
            out[path + (name,)] = key.start_mark.line + 1
            out[(*path, name, "<key>")] = key.start_mark.line + 1
            _lines(value, path + (name,), out)
    elif isinstance(node, yaml.SequenceNode):
        for i, item in enumerate(node.value):
            _lines(item, path + (i,), out)


def _field_path(loc: tuple[Any, ...]) -> str:
    text = ""
    for part in loc:
        if isinstance(part, int):
            text += f"[{part}]"
        else:
            text += ("." if text else "") + str(part)
    return text


def load(folder_or_file: Path) -> Study:
    """Return the Study in a folder (its study.yaml) or file; raise SpecError listing every problem."""
    path = Path(folder_or_file)
    if path.is_dir():
        path = path / SPEC_NAME
    if not path.is_file():
        raise SpecError(f"no study spec found; expected a file named {SPEC_NAME!r} "
                        "(create one with 'ringplan new DIR')", Where(str(path)))
    try:
        text = path.read_text(encoding="utf-8")
    except UnicodeDecodeError:
        raise SpecError("the file is not UTF-8 text; save it as UTF-8", Where(str(path))) from None
    return parse(text, name=str(path), folder=path.parent)


def parse(text: str, *, name: str = SPEC_NAME, folder: Path | None = None) -> Study:
    """Return the Study written in YAML ``text``; ``name`` is used in messages. With the
    study ``folder``, the font files the study names must be there and usable."""
    loader = _Loader(text)
    try:
        node = loader.get_single_node()
        if node is not None:
            _refuse_aliases(node, name)
        raw = loader.construct_document(node) if node is not None else None
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        problem = getattr(exc, "problem", None) or str(exc).splitlines()[0]
        line = mark.line + 1 if mark is not None else None
        raise SpecError(f"this is not valid YAML: {problem}", Where(name, line)) from None
    finally:
        loader.dispose()
    if node is None or not isinstance(raw, dict):
        raise SpecError("the spec is empty or not a mapping of sections; start from "
                        "'ringplan new DIR'", Where(name, 1))
    lines: dict[tuple[Any, ...], int] = {}
    _lines(node, (), lines)

    def where(loc: tuple[Any, ...]) -> Where:
        for cut in range(len(loc), -1, -1):
            if loc[:cut] in lines:
                return Where(name, lines[loc[:cut]], _field_path(loc) or None)
        return Where(name, None, _field_path(loc) or None)

    try:
        study = Study.model_validate(raw)
    except ValidationError as exc:
        problems = [PlannerError(_message(err, raw), where(_yaml_loc(err["loc"])))
                    for err in exc.errors()]
        raise SpecError(problems[0].message, problems[0].where, problems) from None
    problems = [PlannerError(msg, where(loc)) for loc, msg in _cross_checks(study)]
    if folder is not None and study.study.fonts is not None:
        from planner import fonts

        problems += [PlannerError(msg, where(("study", "fonts", role)))
                     for role, msg in fonts.problems(study.study.fonts, folder)]
    if problems:
        raise SpecError(problems[0].message, problems[0].where, problems)
    return study


_ALIASES = {"start": "from", "end": "to", "origin": "from", "destination": "to"}


def _yaml_loc(loc: tuple[Any, ...]) -> tuple[Any, ...]:
    """Turn a pydantic location into the path the user wrote (drop union branch tags)."""
    out: list[Any] = []
    for part in loc:
        if isinstance(part, str) and ("[" in part or part in ("Hazard", "function-after")):
            continue
        out.append(_ALIASES.get(part, part) if isinstance(part, str) else part)
    return tuple(out)


def _model_at(loc: tuple[Any, ...]) -> type[BaseModel] | None:
    model: Any = Study
    for part in loc:
        if isinstance(part, int):
            continue
        field = model.model_fields.get(part)
        if field is None:
            return None
        annotation = field.annotation
        inner = [a for a in getattr(annotation, "__args__", (annotation,))
                 if isinstance(a, type) and issubclass(a, BaseModel)]
        if not inner:
            args = getattr(annotation, "__args__", ())
            inner = [a for arg in args for a in getattr(arg, "__args__", ())
                     if isinstance(a, type) and issubclass(a, BaseModel)]
        if not inner:
            return None
        model = inner[0]
    return model if isinstance(model, type) else None


def _message(err: Any, raw: Any) -> str:
    kind = err["type"]
    value = err.get("input")
    loc = _yaml_loc(err["loc"])
    ctx = err.get("ctx") or {}
    if kind == "extra_forbidden":
        model = _model_at(loc[:-1])
        known = sorted({f.alias or n for n, f in model.model_fields.items()}) if model else []
        guess = difflib.get_close_matches(str(loc[-1]), known, n=1)
        hint = f"; did you mean {guess[0]!r}?" if guess else (
            f"; known keys here: {', '.join(known)}" if known else "")
        return f"unknown key {str(loc[-1])!r}{hint}"
    if kind == "missing":
        return "is required but missing"
    if kind in ("int_parsing", "int_type", "int_from_float"):
        return f"expected a whole number, got {value!r}"
    if kind in ("float_parsing", "float_type"):
        return f"expected a number, got {value!r}"
    if kind in ("bool_parsing", "bool_type"):
        return f"expected true or false, got {value!r}"
    if kind.startswith("date") or kind.startswith("datetime"):
        return f"{value!r} is not a valid date; write a real calendar date as YYYY-MM-DD"
    if kind == "literal_error":
        return f"{value!r} is not allowed; use one of {ctx.get('expected', '')}"
    if kind == "string_pattern_mismatch":
        if loc and loc[-1] == "country":
            return f"{value!r} is not a country code; use the two capital letters of ISO 3166 (e.g. 'SE')"
        return (f"{value!r} is not a usable id; use 1-32 letters, digits, '-', '_' or '.', "
                "starting with a letter or digit")
    if kind in ("too_short",):
        field = str(loc[-1]) if loc else "list"
        need = {"laboratories": "at least 2 laboratories", "materials": "at least 2 materials"}
        return f"needs {need.get(field, 'at least ' + str(ctx.get('min_length', 1)) + ' entries')}"
    if kind == "string_too_short":
        return "must not be empty"
    if kind in ("greater_than_equal", "greater_than", "less_than_equal", "less_than"):
        bound = {"greater_than_equal": ">=", "greater_than": ">", "less_than_equal": "<=",
                 "less_than": "<"}[kind]
        limit = next(iter(ctx.values()), "")
        return f"{value!r} is out of range; it must be {bound} {limit}"
    if kind in ("model_type", "dict_type"):
        return f"expected a mapping of keys, got {value!r}"
    if kind in ("tuple_type", "list_type"):
        return f"expected a list, got {value!r}"
    if kind == "string_type":
        return f"expected text, got {value!r}"
    if kind == "finite_number":
        return f"{value!r} is not a finite number; give an ordinary number"
    if kind == "value_error":
        return str(ctx.get("error", err.get("msg", kind)))
    return str(err.get("msg", kind)).lower()


def _cross_checks(study: Study) -> list[tuple[tuple[Any, ...], str]]:
    """Return (location, message) for rules that span fields."""
    out: list[tuple[tuple[Any, ...], str]] = []

    def unique(section: str, items: tuple[Any, ...]) -> None:
        seen: dict[str, int] = {}
        for i, item in enumerate(items):
            key = item.id.lower()
            if key in seen:
                out.append(((section, i, "id"), f"{item.id!r} is used twice (first at "
                            f"{section}[{seen[key]}]); ids must be unique"))
            else:
                seen[key] = i

    unique("laboratories", study.laboratories)
    unique("materials", study.materials)
    lab_ids = {lab.id: lab for lab in study.laboratories}

    def known(lab_id: str) -> str:
        guess = difflib.get_close_matches(lab_id, list(lab_ids), n=1)
        return f"; did you mean {guess[0]!r}?" if guess else (
            f"; known laboratories: {', '.join(lab_ids)}")

    if not study.hosts:
        out.append((("laboratories",), "no laboratory can host; set 'can_host: true' on at least one"))
    for i, lab in enumerate(study.laboratories):
        for j, b in enumerate(lab.blackouts):
            if b.end < b.start:
                out.append((("laboratories", i, "blackouts", j, "to"),
                            f"ends on {b.end} before it starts on {b.start}"))
    material_ids = [m.id for m in study.materials]

    def material_hint(mat: str) -> str:
        guess = difflib.get_close_matches(mat, material_ids, n=1)
        return (f"; did you mean {guess[0]!r}?" if guess
                else f"; known materials: {', '.join(material_ids)}")

    info = study.study
    if study.measurands is None:
        for key in ("measurand", "unit"):
            if getattr(info, key) is None:
                out.append((("study", key), "is required but missing; give it, or list the "
                            "properties under 'measurands:'"))
        out += _evaluation_checks(study, study.evaluation, ("evaluation",), material_ids,
                                  material_hint, known)
    else:
        for key in ("measurand", "unit"):
            if getattr(info, key) is not None:
                out.append((("study", key), "is given with 'measurands:'; give each "
                            "measurand's name and unit under 'measurands:' and leave this out"))
        if "evaluation" in study.model_fields_set:
            out.append((("evaluation",), "is given with 'measurands:'; give each measurand "
                        "its own 'evaluation:' under 'measurands:' and leave this out"))
        seen_m: dict[str, int] = {}
        measured: set[str] = set()
        for i, item in enumerate(study.measurands):
            key = item.id.lower()
            if key in seen_m:
                out.append((("measurands", i, "id"), f"{item.id!r} is used twice (first at "
                            f"measurands[{seen_m[key]}]); ids must be unique"))
            seen_m.setdefault(key, i)
            if key in FORM_WORDS:
                out.append((("measurands", i, "id"), f"{item.id!r} is a column name of the "
                            "result form; give the measurand another id (e.g. 'mfr', 'density')"))
            mats = item.materials if item.materials is not None else tuple(material_ids)
            for j, mat in enumerate(item.materials or ()):
                if mat not in material_ids:
                    out.append((("measurands", i, "materials", j),
                                f"{mat!r} is not a material of this study{material_hint(mat)}"))
                elif item.materials is not None and item.materials.index(mat) != j:
                    out.append((("measurands", i, "materials", j), f"{mat!r} is listed twice"))
            measured.update(mats)
            out += _evaluation_checks(study, item.evaluation, ("measurands", i, "evaluation"),
                                      [m for m in material_ids if m in mats], material_hint,
                                      known, measurand=item.id)
        for i, mat in enumerate(material_ids):
            if mat not in measured:
                out.append((("materials", i, "id"), f"{mat!r} is measured by no measurand; add "
                            "it to a measurand's 'materials' or remove the material"))
    if study.sealing is not None:
        out += _sealing_checks(study)
    seen_rounds: dict[str, int] = {}
    for i, past in enumerate(study.history):
        if past.host not in lab_ids:
            out.append((("history", i, "host"),
                        f"{past.host!r} is not a laboratory of this study{known(past.host)}"))
        elif not lab_ids[past.host].can_host:
            out.append((("history", i, "host"),
                        f"{past.host!r} cannot host (can_host is false); correct the host or "
                        "set can_host: true for that laboratory"))
        if past.round in seen_rounds:
            out.append((("history", i, "round"), f"round {past.round!r} is listed twice"))
        seen_rounds[past.round] = i
        if i and past.date < study.history[i - 1].date:
            out.append((("history", i, "date"),
                        f"{past.date} is earlier than the round before it; list past rounds oldest first"))
    sched = study.schedule
    if study.history and sched.receive_by <= study.history[-1].date:
        out.append((("schedule", "receive_by"),
                    f"{sched.receive_by} is not after the last past round "
                    f"({study.history[-1].date}); give the coming round's date"))
    if sched.prepare_on is not None and sched.prepare_on > sched.receive_by:
        out.append((("schedule", "prepare_on"),
                    f"{sched.prepare_on} is after receive_by {sched.receive_by}; "
                    "material must be prepared before it can arrive"))
    if len(set(sched.ship_weekdays)) != len(sched.ship_weekdays) or not sched.ship_weekdays:
        out.append((("schedule", "ship_weekdays"), "list each shipping day once, at least one"))
    pairs: dict[tuple[str, str], int] = {}
    for i, row in enumerate(sched.transit):
        for key, lab_id in (("from", row.origin), ("to", row.destination)):
            if lab_id not in lab_ids:
                out.append((("schedule", "transit", i, key),
                            f"{lab_id!r} is not a laboratory of this study{known(lab_id)}"))
        if (row.origin, row.destination) in pairs:
            out.append((("schedule", "transit", i),
                        f"{row.origin!r} to {row.destination!r} is listed twice (first at "
                        f"schedule.transit[{pairs[row.origin, row.destination]}])"))
        pairs.setdefault((row.origin, row.destination), i)
    d = study.design
    if d.mode == "circulate":
        for name in ("spares_per_lab", "retained_by_host", "homogeneity_units"):
            if getattr(d, name):
                out.append((("design", name), f"is {getattr(d, name)}, but a circulating set has "
                            "one artefact per material and no spare, retained or homogeneity "
                            "units; set it to 0"))
    if d.mode == "split" and d.homogeneity_units == 1:
        out.append((("design", "homogeneity_units"),
                    "1 unit cannot show between-unit variation; use 0 or at least 2 (10 is common practice)"))
    return out


def _evaluation_checks(study: Study, ev: Evaluation, at: tuple[Any, ...],
                       material_ids: list[str], material_hint: Any, known: Any,
                       measurand: str | None = None) -> list[tuple[tuple[Any, ...], str]]:
    """Return the problems of one evaluation section (the study's, or a measurand's)."""
    out: list[tuple[tuple[Any, ...], str]] = []
    lab_ids = {lab.id for lab in study.laboratories}
    if ev.reference_lab is not None and ev.reference_lab not in lab_ids:
        out.append((at + ("reference_lab",),
                    f"{ev.reference_lab!r} is not a laboratory of this study{known(ev.reference_lab)}"))
    if ev.assigned_value == "reference" and ev.reference_lab is None:
        out.append((at + ("reference_lab",),
                    "is required when assigned_value is 'reference'; name the reference laboratory"))
    all_ids = [m.id for m in study.materials]
    for mat in ev.by_material:
        if mat not in all_ids:
            out.append((at + ("by_material", mat),
                        f"{mat!r} is not a material of this study{material_hint(mat)}"))
        elif mat not in material_ids:
            out.append((at + ("by_material", mat),
                        f"{mat!r} is not measured for {measurand!r}; add it to the measurand's "
                        "'materials' or remove these settings"))
    if ev.assigned_value == "known":
        for mat in material_ids:
            if ev.known_value_for(mat) is None:
                out.append((at + ("assigned_value",),
                            f"is 'known' but {mat!r} has no known_value; give "
                            f"by_material.{mat}.known_value {{value, u}} or use 'consensus'"))
    policies = [(at + ("sigma_pt",), ev.sigma_pt)] + [
        (at + ("by_material", mat, "sigma_pt"), own.sigma_pt)
        for mat, own in ev.by_material.items() if own.sigma_pt is not None]
    for loc, pol in policies:
        if pol.precision is not None and pol.precision.sigma_R < pol.precision.sigma_r:
            out.append((loc + ("precision", "sigma_R"),
                        f"{pol.precision.sigma_R!r} is smaller than sigma_r "
                        f"{pol.precision.sigma_r!r}; reproducibility includes repeatability, "
                        "so sigma_R >= sigma_r"))
    return out


def _sealing_checks(study: Study) -> list[tuple[tuple[Any, ...], str]]:
    """Return the problems of the sealing section and of the laboratories' public keys."""
    from planner.sealing import trustees as trustee_keys

    out: list[tuple[tuple[Any, ...], str]] = []
    sealing = study.sealing
    assert sealing is not None
    n = len(sealing.trustees)
    if sealing.threshold > n:
        out.append((("sealing", "threshold"),
                    f"{sealing.threshold} is larger than the {n} trustee(s) named; any "
                    f"'threshold' of them must be able to open the key (at most {n})"))
    seen: dict[str, int] = {}
    keys: dict[str, int] = {}
    for i, trustee in enumerate(sealing.trustees):
        if trustee.id in seen:
            out.append((("sealing", "trustees", i, "id"),
                        f"{trustee.id!r} is used twice (first at sealing.trustees[{seen[trustee.id]}])"))
        seen.setdefault(trustee.id, i)
        try:
            trustee_keys.parse_public_key(trustee.public_key)
        except ValueError as exc:
            out.append((("sealing", "trustees", i, "public_key"), f"{exc}; paste the last line "
                        "'ringplan trustee new' printed"))
            continue
        if trustee.public_key in keys:
            out.append((("sealing", "trustees", i, "public_key"),
                        f"is the key of sealing.trustees[{keys[trustee.public_key]}] too; each "
                        "trustee needs a key of its own"))
        keys.setdefault(trustee.public_key, i)
    for i, lab in enumerate(study.laboratories):
        if lab.public_key is None:
            continue
        try:
            trustee_keys.parse_public_key(lab.public_key)
        except ValueError as exc:
            out.append((("laboratories", i, "public_key"), f"{exc}; paste the last line "
                        "'ringplan trustee new' printed"))
    return out


def slug_ok(text: str) -> bool:
    """Return whether ``text`` is a usable id (letters, digits, '-', '_', '.')."""
    return re.match(_ID, text) is not None
