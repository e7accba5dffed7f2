"""One JSON Schema for the spec and the model options, and one formatter for its messages.

Every message names the path (``model.mean_bandwidth``), what is allowed (the schema's
``x-allowed`` text) and the value it got, for example::

    model.mean_bandwidth must be a number > 0 (at most 1e15) or "auto"; got -1.
"""

from __future__ import annotations

import difflib
import json
from functools import cache
from importlib import resources
from typing import Any

import jsonschema

from ..errors import SpecError
from ..fpca.options import FPCAOptions


@cache
def spec_schema() -> dict[str, Any]:
    """The JSON Schema of a spec (shipped as ``reportgen/spec.schema.json``)."""
    text = resources.files("reportgen.inputs").joinpath("spec.schema.json").read_text("utf-8")
    schema: dict[str, Any] = json.loads(text)
    return schema


def _resolve(node: dict[str, Any]) -> dict[str, Any]:
    ref = node.get("$ref")
    if isinstance(ref, str) and ref.startswith("#/$defs/"):
        return dict(spec_schema()["$defs"][ref.rsplit("/", 1)[1]])
    return node


def _node_at(schema: dict[str, Any], path: list[Any]) -> dict[str, Any]:
    """The most specific schema node along ``path`` that says what is allowed."""
    node, best = _resolve(schema), _resolve(schema)
    for key in path:
        if isinstance(key, int):
            node = _resolve(node.get("items", {}))
        else:
            node = _resolve(node.get("properties", {}).get(key, {}))
        if "x-allowed" in node:
            best = node
    return best


def format_path(root: str, path: list[Any]) -> str:
    out = root
    for key in path:
        out += f"[{key}]" if isinstance(key, int) else (f".{key}" if out else str(key))
    return out or "the spec"


def _short(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 80 else text[:77] + "..."


def _message(error: jsonschema.ValidationError, schema: dict[str, Any], root: str) -> str:
    path = list(error.absolute_path)
    where = format_path(root, path)
    if error.validator == "additionalProperties" and isinstance(error.instance, dict):
        allowed = sorted(_node_at(schema, path).get("properties", {}))
        unknown = sorted(str(k) for k in error.instance if k not in allowed)
        parts = []
        for key in unknown:
            close = difflib.get_close_matches(key, allowed, n=1)
            hint = f"; did you mean {close[0]!r}?" if close else ""
            parts.append(f"{format_path(root, [*path, key])} is not a known key{hint}")
        return "; ".join(parts) + f" (allowed here: {', '.join(allowed)})."
    if error.validator == "required":
        missing = str(error.message).split("'")[1] if "'" in error.message else error.message
        return f"{format_path(root, [*path, missing])} is required but missing."
    allowed_text = _node_at(schema, path).get("x-allowed", "valid")
    return f"{where} must be {allowed_text}; got {_short(error.instance)}."


def validate(instance: Any, schema: dict[str, Any], root: str = "") -> None:
    """Raise :class:`SpecError` listing every violation of ``schema`` (sorted by path)."""
    validator = jsonschema.Draft202012Validator(schema)
    errors = sorted(validator.iter_errors(instance), key=lambda e: [str(p) for p in e.path])
    if errors:
        messages = list(dict.fromkeys(_message(e, schema, root) for e in errors))
        raise SpecError(" ".join(messages[:8]))


def model_schema() -> dict[str, Any]:
    """The schema of the ``model`` section (the fit options), standalone."""
    root = spec_schema()
    return {**root["$defs"]["model"], "$defs": root["$defs"]}


def make_options(options: dict[str, Any], root: str = "") -> FPCAOptions:
    """Validate ``options`` against the spec's model schema and build :class:`FPCAOptions`.

    Raises :class:`SpecError` naming the option, what is allowed and the value given.
    """
    validate(options, model_schema(), root)
    values = dict(options)
    if "domain" in values:
        lo, hi = (float(v) for v in values["domain"])
        if not hi > lo:
            where = f"{root}.domain" if root else "domain"
            raise SpecError(f"{where} must be [start, end] with end > start; got {[lo, hi]!r}.")
        values["domain"] = (lo, hi)
    opts = FPCAOptions(**values)
    if opts.component_rule == "fixed" and opts.n_components is None:
        where = f"{root}.n_components" if root else "n_components"
        raise SpecError(f'{where} is required when component_rule is "fixed".')
    return opts
