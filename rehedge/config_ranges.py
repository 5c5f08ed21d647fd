"""The range of every numeric config key, as a Markdown page (docs/config-ranges.md), from the schema.

``python -m rehedge.config_ranges > docs/config-ranges.md`` writes the page; a test checks that the
page in the repository is what the schema says, so the two cannot drift apart.
"""

from __future__ import annotations

import inspect
import re
import types
import typing

from annotated_types import Ge, Gt, Le, Lt
from pydantic import BaseModel

from rehedge import schema

INTRODUCTION = """# Config ranges

Every numeric key of a config has a range, checked when the config loads (`rehedge check-config`):
a value outside it ends in one line naming the key, the rule and the value, with exit code 2,
before any work starts. The ranges are plausibility bounds, wide enough for any market a desk
trades in, narrow enough that the arithmetic of a run (exponentials of drifts and volatilities over
the horizon, products of sizes) stays within floating point. Three checks need more than one key
and come after the ranges: the hedging horizon must end by the last expiry; the run's memory
estimate must fit in three quarters of the machine's memory (rehedge/budget.py: the path block,
the held-out results, the bootstrap's resamples, the grids and the hedge table's nodes); and a
sweep may have at most 10,000 cells. Once paths are simulated, a price that leaves the
floating-point range (a model mild on each key, wild over a long horizon) ends the run in one line
naming the market keys; an exponential objective whose risk aversion is beyond what the learned
agents' fit can carry ends it naming `objective.risk_aversion` (agents/certainty.py).

This page is generated from rehedge/schema/ (`python -m rehedge.config_ranges`); a test checks it.

## Why these bounds

"""


def _reasons() -> str:
    """The schema's named bounds with the comment that gives each its reason."""
    lines = []
    for line in inspect.getsource(schema.base).splitlines():
        match = re.match(r"^([A-Z][A-Z_]+) = (.+?)(?:\s+#\s*(.*))?$", line)
        if match and re.search(r"_(RANGE|MAX|MIN)$", match.group(1)):
            name, value, reason = match.groups()
            lines.append(f"- `{name}` = {value}" + (f": {reason}" if reason else ""))
    return "\n".join(lines) + "\n"


def _numeric(annotation) -> bool:
    text = str(annotation)
    return "float" in text or "int" in text


def _bound(value) -> str:
    return f"{value:,}" if isinstance(value, int) else f"{value:g}"


def _range(field) -> str:
    """The field's range from its constraints: pydantic's bounds, or a validator's ``range``; for a
    list, its items' (each)."""
    metadata, each = list(field.metadata), ""
    annotation = field.annotation
    if typing.get_origin(_unwrap_optional(annotation)) is list:
        item = typing.get_args(_unwrap_optional(annotation))[0]
        if typing.get_origin(item) is typing.Annotated:
            for extra in typing.get_args(item)[1:]:
                metadata.extend(getattr(extra, "metadata", [extra]))
        each = "each "
    parts = []
    for item in metadata:
        for kind, cls, sign in (("gt", Gt, ">"), ("ge", Ge, ">="), ("lt", Lt, "<"), ("le", Le, "<=")):
            if isinstance(item, cls):
                parts.append(f"{sign} {_bound(getattr(item, kind))}")
        parts.extend(getattr(getattr(item, "func", None), "range", ()))
    return each + ", ".join(parts) if parts else "any"


def _unwrap_optional(annotation):
    members = [a for a in typing.get_args(annotation) if a is not type(None)]
    return members[0] if typing.get_origin(annotation) in (typing.Union, types.UnionType) and len(members) == 1 \
        else annotation


def _default(field) -> str:
    if field.is_required():
        return "required"
    if field.default_factory is not None:
        return f"{field.default_factory()}"
    return "none" if field.default is None else f"{field.default}"


def _models(model: type[BaseModel], seen: list) -> None:
    if model in seen:
        return
    seen.append(model)
    for field in model.model_fields.values():
        for member in _members(field.annotation):
            _models(member, seen)


def _members(annotation) -> list[type[BaseModel]]:
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return [annotation]
    return [m for arg in typing.get_args(annotation) for m in _members(arg)]


def _title(model: type[BaseModel], where: dict) -> str:
    tag = next((f'{name} = "{typing.get_args(model.model_fields[name].annotation)[0]}"'
                for name in ("kind", "model") if name in model.model_fields), None)
    place = where.get(model, model.__name__)
    return f"`{place}`" + (f" with {tag}" if tag else "")


def _places() -> dict:
    """Where each model sits in a config, as a key path with [i] for a list."""
    places: dict = {}

    def walk(model, path):
        for name, field in model.model_fields.items():
            listed = "list" in str(field.annotation)
            for member in _members(field.annotation):
                place = f"{path}{'.' if path else ''}{name}{'[i]' if listed else ''}"
                if member not in places:
                    places[member] = place
                    walk(member, place)

    walk(schema.Config, "")
    places[schema.Config] = "(top level)"
    return places


def ranges_markdown() -> str:
    """The whole page."""
    models: list = []
    _models(schema.Config, models)
    places = _places()
    out = [INTRODUCTION, _reasons()]
    for model in models:
        rows = [(name, field) for name, field in model.model_fields.items() if _numeric(field.annotation)
                and name not in ("kind", "model")]
        if not rows:
            continue
        out.append(f"\n## {_title(model, places)}\n\n| key | range | default | what it is |\n|---|---|---|---|\n")
        for name, field in rows:
            what = " ".join((field.description or "").split()).replace("|", "\\|")
            out.append(f"| `{name}` | {_range(field)} | {_default(field)} | {what} |\n")
    return "".join(out)


if __name__ == "__main__":
    print(ranges_markdown(), end="")
