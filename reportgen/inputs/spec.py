"""YAML spec -> frozen, validated :class:`Spec` with resolved paths and defaults."""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from datetime import date, datetime
from pathlib import Path
from typing import Any

import yaml

from ..errors import SpecError
from ..fpca.options import FPCAOptions
from .schema import make_options, spec_schema, validate

MAX_SPEC_BYTES = 1_000_000
REQUIRED_SECTIONS = ("caveats", "reproducibility")

DEFAULT_CHECKS: dict[str, Any] = {
    "missing": "drop", "duplicates": "average", "out_of_range": "warn", "out_of_domain": "fail",
    "min_subjects": 10, "min_pair_coverage": 0.9,
}
DEFAULT_SENSITIVITY: dict[str, Any] = {"factors": [0.5, 0.75, 1.5, 2.0],
                                       "similarity_threshold": 0.9}
DEFAULT_SUBJECTS: dict[str, Any] = {"show": [], "count": 6, "outlier_quantile": 0.99,
                                    "tables": "csv", "all_trajectories": False}
DEFAULT_GATES: dict[str, Any] = {
    "max_mean_change": 0.1, "max_eigenvalue_change": 0.5, "max_error_variance_change": 0.5,
    "min_eigenfunction_similarity": 0.9, "same_components": True,
}


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


@dataclass(frozen=True)
class Spec:
    """A validated spec. ``raw`` holds the file's bytes exactly as given."""

    path: Path
    raw: bytes
    sha256: str
    content: dict[str, Any]
    report: dict[str, Any]
    data: dict[str, Any]
    checks: dict[str, Any]
    sensitivity: dict[str, Any]
    subjects: dict[str, Any]
    gates: dict[str, Any]
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
        return self.locate(self.data["file"])

    @property
    def report_id(self) -> str:
        return str(self.report["id"])

    def units(self) -> dict[str, str]:
        """The unit of each reported quantity, from the value unit u and time unit T.

        With eigenfunctions of unit L2 norm over the time domain (unit 1/sqrt(T)), a score
        carries u sqrt(T) and an eigenvalue (a score variance) u^2 T. Empty where the spec
        gives no unit.
        """
        u, t = self.value_unit, self.data["time_unit"]
        uu = f"({u})^2" if u and not u.isalnum() else (f"{u}^2" if u else "")
        root_t = f"sqrt({t})" if t else ""
        return {
            "time": t, "value": u, "mean": u, "error variance": uu, "bandwidth": t,
            "eigenvalue": " x ".join(x for x in (uu, t) if x),
            "eigenfunction": f"1/{root_t}" if t else "",
            "score": " x ".join(x for x in (u, root_t) if x),
            "covariance": uu, "residual": u, "standardized residual": "none (ratio)",
        }

    @property
    def value_unit(self) -> str:
        """The unit of the analysed values: the data's unit under the spec's transform."""
        unit = self.data["value_unit"]
        transform = self.data["transform"]
        if transform == "none":
            return unit
        return f"{transform}({unit})" if unit else transform


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
        raise SpecError(f"{where} must be a YAML mapping with report and data sections; "
                        f"got {type(content).__name__}")
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
    if isinstance(value, float) and value != value:
        raise SpecError(f"{path} must be a number; got nan.")


def _check_time_origin(data: dict[str, Any]) -> None:
    origin = data.get("time_origin")
    if not isinstance(origin, str) or origin == "first":
        return
    try:
        datetime.fromisoformat(origin)
    except ValueError:
        raise SpecError(f"data.time_origin must be an ISO date such as 2024-01-31, first, or "
                        f"{{column: NAME}}; got {origin!r}.") from None


def spec_from_bytes(raw: bytes, path: Path) -> Spec:
    content = parse_spec_bytes(raw, f"spec {str(path)!r}")
    content = _dates_as_text(content)
    _json_safe(content, "")
    validate(content, spec_schema())
    report = {"authors": [], "description": "", "band_level": 0.95, "template": "default",
              "header": "", "footer": "", "numbering": "", **content["report"]}
    sections = report.get("sections")
    if sections is not None:
        missing = [x for x in REQUIRED_SECTIONS if x not in sections]
        if missing:
            raise SpecError(f"report.sections must keep {' and '.join(missing)}: the caveats "
                            "(with the standing cautions) and the reproducibility record are "
                            "in every report.")
    data = {"format": "auto", "transform": "none", "time_unit": "", "value_unit": "",
            **content["data"]}
    checks = {**DEFAULT_CHECKS, **content.get("checks", {})}
    for name in ("value_range", "domain"):
        pair = checks.get(name)
        if pair is not None and not pair[1] > pair[0]:
            raise SpecError(f"checks.{name} must be [low, high] with high > low; got {pair!r}.")
    _check_time_origin(data)
    model = dict(content.get("model", {}))
    if "domain" not in model and "domain" in checks:
        model["domain"] = checks["domain"]
    model["band_level"] = report["band_level"]
    options = make_options(model, root="model")
    subjects = {**DEFAULT_SUBJECTS, **content.get("subjects", {})}
    if subjects["all_trajectories"] and options.band == "corrected":
        raise SpecError("subjects.all_trajectories writes every subject's trajectory with the "
                        "plug-in band; model.band is corrected, whose band needs each "
                        "subject's readings in one place. Set model.band: plugin, or leave "
                        "subjects.all_trajectories out (the shown subjects keep the corrected "
                        "band).")
    return Spec(
        path=path.resolve(), raw=raw, sha256=hashlib.sha256(raw).hexdigest(), content=content,
        report=report, data=data, checks=checks,
        sensitivity={**DEFAULT_SENSITIVITY, **content.get("sensitivity", {})},
        subjects=subjects,
        gates={**DEFAULT_GATES, **content.get("gates", {})}, options=options,
    )
