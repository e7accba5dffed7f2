"""YAML spec -> frozen, validated :class:`Spec` with typed sections, resolved paths and
defaults.

The JSON Schema (``spec.schema.json``, through ``schema.validate``) says what a spec may
hold and words every refusal; this module turns a valid mapping into one frozen dataclass
per section, so that the rest of the package reads ``spec.data.time_unit``, never a key of
a dictionary.
"""

from __future__ import annotations

import hashlib
import math
from dataclasses import dataclass, field, fields
from datetime import date, datetime
from pathlib import Path
from typing import Any, Literal

import yaml

from ..errors import SpecError
from ..fpca.options import FPCAOptions
from .schema import make_options, spec_schema, validate

MAX_SPEC_BYTES = 1_000_000
REQUIRED_SECTIONS = ("caveats", "reproducibility")
DEFAULT_FACTORS = (0.5, 0.75, 1.5, 2.0)


class _NoAliasLoader(yaml.SafeLoader):
    """Safe loader that also refuses anchors and aliases (no 'billion laughs' expansion)."""

    def compose_node(self, parent: Any, index: Any) -> Any:
        if self.check_event(yaml.AliasEvent):
            event = self.peek_event()
            raise SpecError(
                f"line {event.start_mark.line + 1}: YAML aliases (*name) are not allowed in "
                "a spec; write the value out"
            )
        event = self.peek_event()
        if getattr(event, "anchor", None):
            raise SpecError(
                f"line {event.start_mark.line + 1}: YAML anchors (&name) are not allowed in "
                "a spec; write the value out"
            )
        return super().compose_node(parent, index)

    def construct_mapping(self, node: Any, deep: bool = False) -> Any:
        """A key given twice in one mapping is refused (YAML would keep the last silently)."""
        seen: dict[Any, int] = {}
        for key_node, _ in node.value:
            key = self.construct_object(key_node, deep=deep)
            line = key_node.start_mark.line + 1
            try:
                if key in seen:
                    raise SpecError(
                        f"line {line}: the key {key!r} is given twice in one mapping (first at "
                        f"line {seen[key]}); a spec names each key once"
                    )
                seen[key] = line
            except TypeError:  # an unhashable key: the mapping's own check refuses it
                break
        return super().construct_mapping(node, deep)


# --- the sections -------------------------------------------------------------------------


@dataclass(frozen=True)
class ReportSection:
    """``report``: what the appendix is called and how it looks."""

    id: str
    title: str
    authors: tuple[str, ...] = ()
    description: str = ""
    band_level: float = 0.95
    template: str = "default"
    stylesheet: str | None = None
    logo: str | None = None
    header: str = ""
    footer: str = ""
    numbering: str = ""
    sections: tuple[str, ...] | None = None


@dataclass(frozen=True)
class RowCondition:
    """One condition of ``data.keep_rows``: ``column`` equals a value, is in a list, or is
    between two bounds (``values`` holds the one value, the list, or the two bounds)."""

    column: str
    kind: Literal["equals", "in", "between"]
    values: tuple[Any, ...]


@dataclass(frozen=True)
class TimeOrigin:
    """``data.time_origin``: each subject's first reading, a calendar date (ISO text), or
    each subject's baseline in a column."""

    kind: Literal["first", "date", "column"]
    value: str = ""  # the ISO date, or the column's name

    def describe(self) -> str:
        """The origin as the spec writes it (for messages)."""
        return {"first": "first", "date": self.value, "column": f"{{column: {self.value}}}"}[
            self.kind
        ]


@dataclass(frozen=True)
class DataSection:
    """``data``: which file, which columns, and how the values are read."""

    file: str
    subject: str
    time: str
    value: str
    format: str = "auto"
    time_unit: str = ""
    value_unit: str = ""
    transform: Literal["none", "log", "log10"] = "none"
    time_origin: TimeOrigin | None = None
    time_scale: str = "days"
    group: str | None = None
    time_label: str | None = None
    value_label: str | None = None
    keep_rows: tuple[RowCondition, ...] = ()


@dataclass(frozen=True)
class ChecksSection:
    """``checks``: what the data checks refuse, drop or only report."""

    missing: Literal["drop", "fail"] = "drop"
    duplicates: Literal["average", "keep", "fail"] = "average"
    value_range: tuple[float, float] | None = None
    out_of_range: Literal["warn", "fail", "drop"] = "warn"
    domain: tuple[float, float] | None = None
    out_of_domain: Literal["fail", "drop"] = "fail"
    min_subjects: int = 10
    min_pair_coverage: float = 0.9


@dataclass(frozen=True)
class SensitivitySection:
    """``sensitivity``: the bandwidth factors (``given``: the spec names them, so they are
    used as given; otherwise the defaults, which may be raised) and the similarity that
    counts as stable."""

    factors: tuple[float, ...] = DEFAULT_FACTORS
    given: bool = False
    similarity_threshold: float = 0.9


@dataclass(frozen=True)
class SubjectsSection:
    """``subjects``: which trajectories are shown, the outlier rule, how the tables of
    subjects are written."""

    show: tuple[str, ...] = ()
    count: int = 6
    outlier_quantile: float = 0.99
    tables: Literal["csv", "parquet"] = "csv"
    all_trajectories: bool = False


@dataclass(frozen=True)
class GatesSection:
    """``gates``: what ``reportgen compare`` treats as a change beyond the allowed."""

    max_mean_change: float = 0.1
    max_eigenvalue_change: float = 0.5
    max_error_variance_change: float = 0.5
    min_eigenfunction_similarity: float = 0.9
    same_components: bool = True


def value_unit(unit: str, transform: str) -> str:
    """The unit of the analysed values: the data's unit under the spec's transform
    (``log(mg/dl)``; the transform's name alone when the data have no unit)."""
    if transform == "none":
        return unit
    return f"{transform}({unit})" if unit else transform


@dataclass(frozen=True)
class Spec:
    """A validated spec. ``raw`` holds the file's bytes exactly as given."""

    path: Path
    raw: bytes
    sha256: str
    report: ReportSection
    data: DataSection
    checks: ChecksSection
    sensitivity: SensitivitySection
    subjects: SubjectsSection
    gates: GatesSection
    options: FPCAOptions
    # Input files found elsewhere than beside the spec (``verify --inputs``): the path as
    # the spec writes it -> where it is.
    locations: dict[str, Path] = field(default_factory=dict)

    def locate(self, relpath: str) -> Path:
        """An input file named in the spec: relative to the spec, unless found elsewhere."""
        if relpath in self.locations:
            return self.locations[relpath]
        return (self.path.parent / relpath).resolve()

    @property
    def data_path(self) -> Path:
        """The data file: ``data.file`` relative to the spec (or where verify found it)."""
        return self.locate(self.data.file)

    @property
    def report_id(self) -> str:
        return self.report.id

    def units(self) -> dict[str, str]:
        """The unit of each reported quantity, from the value unit u and time unit T.

        With eigenfunctions of unit L2 norm over the time domain (unit 1/sqrt(T)), a score
        carries u sqrt(T) and an eigenvalue (a score variance) u^2 T. Empty where the spec
        gives no unit.
        """
        u, t = self.value_unit, self.data.time_unit
        uu = f"({u})^2" if u and not u.isalnum() else (f"{u}^2" if u else "")
        root_t = f"sqrt({t})" if t else ""
        return {
            "time": t,
            "value": u,
            "mean": u,
            "error variance": uu,
            "bandwidth": t,
            "eigenvalue": " x ".join(x for x in (uu, t) if x),
            "eigenfunction": f"1/{root_t}" if t else "",
            "score": " x ".join(x for x in (u, root_t) if x),
            "covariance": uu,
            "residual": u,
            "standardized residual": "none (ratio)",
        }

    @property
    def value_unit(self) -> str:
        """The unit of the analysed values: the data's unit under the spec's transform."""
        return value_unit(self.data.value_unit, self.data.transform)


def parse_spec_bytes(raw: bytes, where: str = "spec") -> dict[str, Any]:
    """Parse YAML bytes with the safe, alias-free loader; the result must be a mapping."""
    if len(raw) > MAX_SPEC_BYTES:
        raise SpecError(f"{where} is {len(raw)} bytes; a spec may be at most {MAX_SPEC_BYTES}")
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as e:
        raise SpecError(f"{where} is not UTF-8 text (byte {e.start})") from e
    try:
        content = yaml.load(text, Loader=_NoAliasLoader)
    except RecursionError as e:
        raise SpecError(f"{where} nests too deeply to be a spec") from e
    except yaml.YAMLError as e:
        mark = getattr(e, "problem_mark", None)
        at = f" at line {mark.line + 1}, column {mark.column + 1}" if mark else ""
        problem = getattr(e, "problem", None) or str(e).splitlines()[0]
        raise SpecError(f"{where} is not valid YAML{at}: {problem}") from e
    if not isinstance(content, dict):
        raise SpecError(
            f"{where} must be a YAML mapping with report and data sections; "
            f"got {type(content).__name__}"
        )
    return content


def load_spec(path: str | Path) -> Spec:
    """Read, parse and validate a spec file."""
    p = Path(path)
    if "\x00" in str(p):
        raise SpecError(f"spec path {str(p)!r} contains a NUL byte")
    if not p.exists():
        raise SpecError(f"spec file {str(p)!r} does not exist")
    if not p.is_file():
        raise SpecError(f"spec path {str(p)!r} is not a regular file")
    try:
        raw = p.read_bytes()
    except OSError as e:
        raise SpecError(f"cannot read spec {str(p)!r}: {e.strerror}") from e
    return spec_from_bytes(raw, p)


def _dates_as_text(value: Any) -> Any:
    """YAML reads an unquoted 2024-01-31 as a date; the spec means the text (ISO 8601)."""
    if isinstance(value, dict):
        return {k: _dates_as_text(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_dates_as_text(v) for v in value]
    if isinstance(value, date):
        return value.isoformat()
    return value


def _json_safe(value: Any, path: str) -> None:
    """Reject YAML values that JSON Schema cannot judge (dates, bytes, non-string keys)."""
    if isinstance(value, dict):
        for k, v in value.items():
            if not isinstance(k, str):
                raise SpecError(f"{path or 'the spec'} has a key {k!r} that is not text")
            _json_safe(v, f"{path}.{k}" if path else k)
    elif isinstance(value, list):
        for i, v in enumerate(value):
            _json_safe(v, f"{path}[{i}]")
    elif not (value is None or isinstance(value, str | int | float | bool)):
        raise SpecError(f"{path} must be plain text or a number; got {value!r}. Quote it.")
    if isinstance(value, float) and not math.isfinite(value):
        raise SpecError(f"{path} must be a finite number; got {value}.")
    if isinstance(value, str) and "\x00" in value:
        raise SpecError(f"{path} contains a NUL character; a spec's text cannot hold one.")


def _time_origin(given: Any) -> TimeOrigin | None:
    if given is None:
        return None
    if isinstance(given, dict):
        return TimeOrigin("column", str(given["column"]))
    if given == "first":
        return TimeOrigin("first")
    try:
        datetime.fromisoformat(given)
    except ValueError:
        raise SpecError(
            f"data.time_origin must be an ISO date such as 2024-01-31, first, or "
            f"{{column: NAME}}; got {given!r}."
        ) from None
    return TimeOrigin("date", str(given))


def _condition(given: dict[str, Any]) -> RowCondition:
    kind: Literal["equals", "in", "between"] = next(
        k for k in ("equals", "in", "between") if k in given
    )
    value = given[kind]
    return RowCondition(str(given["column"]), kind, (value,) if kind == "equals" else tuple(value))


def _pair(given: Any, where: str) -> tuple[float, float] | None:
    if given is None:
        return None
    low, high = float(given[0]), float(given[1])
    if not high > low:
        raise SpecError(f"{where} must be [low, high] with high > low; got {list(given)!r}.")
    return low, high


def _known(section: type, given: dict[str, Any]) -> dict[str, Any]:
    """The fields of ``section`` that ``given`` sets (the schema allows no others)."""
    names = {f.name for f in fields(section)}
    return {k: v for k, v in given.items() if k in names}


def spec_from_bytes(raw: bytes, path: Path) -> Spec:
    content = parse_spec_bytes(raw, f"spec {str(path)!r}")
    content = _dates_as_text(content)
    _json_safe(content, "")
    validate(content, spec_schema())
    given = content["report"]
    sections = given.get("sections")
    if sections is not None:
        missing = [x for x in REQUIRED_SECTIONS if x not in sections]
        if missing:
            raise SpecError(
                f"report.sections must keep {' and '.join(missing)}: the caveats "
                "(with the standing cautions) and the reproducibility record are "
                "in every report."
            )
    report = ReportSection(
        **{
            **_known(ReportSection, given),
            "authors": tuple(given.get("authors", ())),
            "sections": None if sections is None else tuple(sections),
        }
    )
    given = content["data"]
    data = DataSection(
        **{
            **_known(DataSection, given),
            "time_origin": _time_origin(given.get("time_origin")),
            "keep_rows": tuple(_condition(c) for c in given.get("keep_rows", ())),
        }
    )
    given = content.get("checks", {})
    checks = ChecksSection(
        **{
            **_known(ChecksSection, given),
            "value_range": _pair(given.get("value_range"), "checks.value_range"),
            "domain": _pair(given.get("domain"), "checks.domain"),
        }
    )
    model = dict(content.get("model", {}))
    if "domain" not in model and checks.domain is not None:
        model["domain"] = list(checks.domain)
    model["band_level"] = report.band_level
    options = make_options(model, root="model")
    given = content.get("sensitivity", {})
    sensitivity = SensitivitySection(
        tuple(float(f) for f in given.get("factors", DEFAULT_FACTORS)),
        "factors" in given,
        float(given.get("similarity_threshold", 0.9)),
    )
    given = content.get("subjects", {})
    subjects = SubjectsSection(
        **{**_known(SubjectsSection, given), "show": tuple(str(s) for s in given.get("show", ()))}
    )
    if subjects.all_trajectories and options.band == "corrected":
        raise SpecError(
            "subjects.all_trajectories writes every subject's trajectory with the "
            "plug-in band; model.band is corrected, whose band needs each "
            "subject's readings in one place. Set model.band: plugin, or leave "
            "subjects.all_trajectories out (the shown subjects keep the corrected "
            "band)."
        )
    gates = GatesSection(**_known(GatesSection, content.get("gates", {})))
    return Spec(
        path=path.resolve(),
        raw=raw,
        sha256=hashlib.sha256(raw).hexdigest(),
        report=report,
        data=data,
        checks=checks,
        sensitivity=sensitivity,
        subjects=subjects,
        gates=gates,
        options=options,
    )
