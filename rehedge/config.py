"""Loading a desk's config: read the TOML file, validate it against :mod:`rehedge.schema` and
resolve it into a :class:`~rehedge.schema.Config` in which every default is filled in, including
the ones that depend on other sections (``pricing.volatility`` from the market model's volatility,
the data seeds from ``seed``, baseline volatilities and cost rates), so ``config.model_dump()`` is
the "resolved config" written into run folders and :func:`config_hash` identifies it.

Every problem is a :class:`~rehedge.errors.ConfigError` with a single-line message that starts
with the TOML key path, e.g. ``book.options[1].strike: must be > 0, got -5``.
"""

from __future__ import annotations

import copy
import difflib
import hashlib
import itertools
import json
import math
import re
import tomllib
import types
import typing
from pathlib import Path
from typing import Annotated, Any, Union

from pydantic import BaseModel, ValidationError

from rehedge.budget import check_memory
from rehedge.errors import ConfigError, one_line
from rehedge.files import CONFIG_BYTES, read_regular
from rehedge.schema import Config
from rehedge.schema.base import _num, _show

_BARE_KEY_RE = re.compile(r"[A-Za-z0-9_-]+")


def load_config(path: str | Path) -> Config:
    """Read a TOML config file, validate and resolve it; raises ConfigError."""
    path = Path(path)
    source = str(path)
    raw = read_regular(path, CONFIG_BYTES, lambda message: ConfigError(message, source=source), "config file")
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ConfigError(
            f"{source}: not UTF-8 text (bad byte at offset {exc.start})", source=source
        ) from None
    data = _parse_toml(text, source)
    return parse_config(data, source=source, base_dir=path.parent)


def _parse_toml(text: str, source: str) -> dict:
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{source}: {_toml_error(exc, text)}", source=source) from None
    except RecursionError:
        raise ConfigError(f"{source}: arrays or tables nested too deep to read (a config needs a few levels)",
                          source=source) from None


SWEEP_CELLS_MAX = 10_000  # each cell is a run of its own: 10,000 small runs already take days


def load_variants(path: str | Path) -> list[Config]:
    """The config of ``path`` and, when it has a ``sweep``, one config per combination of the
    swept values (each named ``NAME-key-value``, validated like a config of its own)."""
    base = load_config(path)
    if not base.sweep:
        return [base]
    data = _parse_toml(read_regular(path, CONFIG_BYTES, ConfigError).decode("utf-8"), str(path))
    sweep = data.pop("sweep")
    cells = math.prod(len(values) for values in sweep.values())
    if cells > SWEEP_CELLS_MAX:
        raise ConfigError(f"sweep: {cells:,} cells (the product of the lists' lengths), more than the "
                          f"{SWEEP_CELLS_MAX:,} a sweep may have; split it or sweep fewer values", source=str(path),
                          key="sweep")
    variants = []
    for values in itertools.product(*sweep.values()):
        variant = copy.deepcopy(data)
        label = []
        for key, value in zip(sweep, values):
            *parents, leaf = key.split(".")
            table = variant
            for part in parents:
                table = table.setdefault(part, {})
                if not isinstance(table, dict):
                    raise ConfigError(f"sweep.{key}: {part!r} is not a table", source=str(path), key=f"sweep.{key}")
            table[leaf] = value
            label.append(f"{leaf}{value:g}" if isinstance(value, float) else f"{leaf}{value}")
        variant["name"] = "-".join([data["name"], *label]).replace("_", "")
        try:
            variants.append(parse_config(variant, source=str(path), base_dir=Path(path).parent))
        except ConfigError as error:
            raise ConfigError(f"sweep {dict(zip(sweep, values))}: {error}", source=str(path), key="sweep") from None
    return variants


def parse_config(data: dict, source: str = "<config>", base_dir: str | Path | None = None) -> Config:
    """Validate and resolve an already-parsed config mapping; raises ConfigError.

    ``base_dir`` is the folder relative file names in the config (``market.csv``) are read from;
    default the working directory."""
    if not isinstance(data, dict):
        raise ConfigError(
            f"config must be a table of settings, got {_show(data)}", source=source
        )
    try:
        config = Config.model_validate(data, context={"base_dir": base_dir})
    except ValidationError as exc:
        problems = _ordered(tuple(_format_error(err) for err in exc.errors()))
        key, _, _ = problems[0].partition(": ")
        message = problems[0]
        if len(problems) > 1:
            more = len(problems) - 1
            message += f" (and {more} more error{'s' if more > 1 else ''})"
        raise ConfigError(message, source=source, key=key, problems=problems) from None
    check_memory(config, source)
    return config


def _ordered(problems: tuple[str, ...]) -> tuple[str, ...]:
    """Unknown keys first, and a key reported missing dropped where an unknown key beside it is its
    misspelling (``cost_rat``: "did you mean 'cost_rate'?" says it all)."""
    meant = set()
    for problem in problems:
        key, _, rule = problem.partition(": ")
        hint = re.search(r"\(did you mean '([^']+)'\?\)$", rule)
        if rule.startswith("unknown key") and hint:
            meant.add(key.rpartition(".")[0] + "." + hint.group(1) if "." in key else hint.group(1))
    kept = [p for p in problems
            if not (p.endswith(": required key missing") and p.partition(": ")[0] in meant)]
    return tuple(sorted(kept, key=lambda p: not p.partition(": ")[2].startswith("unknown key")))


def config_hash(config: Config) -> str:
    """sha256 hex digest of the canonical JSON (sorted keys) of the resolved config."""
    payload = json.dumps(
        config.model_dump(mode="python"),
        sort_keys=True,
        separators=(",", ":"),
        ensure_ascii=True,
        default=_json_default,
    )
    return hashlib.sha256(payload.encode("utf-8")).hexdigest()


def _json_default(value: Any) -> Any:
    # TOML dates/times (possible inside free-form agent params) and anything else exotic.
    if hasattr(value, "isoformat"):
        return value.isoformat()
    return repr(value)


_TOML_POS_RE = re.compile(r"\s*\(at line (\d+), column (\d+)\)\s*$")
_TOML_END_RE = re.compile(r"\s*\(at end of document\)\s*$")


def _toml_error(exc: tomllib.TOMLDecodeError, text: str) -> str:
    msg = str(exc)
    match = _TOML_POS_RE.search(msg)
    if match:
        reason = msg[: match.start()]
        return f"TOML syntax error at line {match.group(1)}, column {match.group(2)}: {reason}"
    if _TOML_END_RE.search(msg):
        reason = _TOML_END_RE.sub("", msg)
        last_line = text.count("\n") + (0 if text.endswith("\n") else 1)
        return f"TOML syntax error at end of document (line {max(last_line, 1)}): {reason}"
    lineno = getattr(exc, "lineno", None)
    where = f" at line {lineno}" if lineno else ""
    return f"TOML syntax error{where}: {msg}"


def _format_key(parts: list[str | int]) -> str:
    out = ""
    for part in parts:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            key = part if _BARE_KEY_RE.fullmatch(part) else json.dumps(part)
            out += f".{key}" if out else key
    return out or "(top level)"


def _unwrap(tp: Any) -> Any:
    while typing.get_origin(tp) is Annotated:
        tp = typing.get_args(tp)[0]
    return tp


def _is_model(tp: Any) -> bool:
    return isinstance(tp, type) and issubclass(tp, BaseModel)


def _tag_member(members: list[Any], tag: Any) -> Any:
    """The model in ``members`` whose kind/model literal equals ``tag``, else None."""
    for member in members:
        if not _is_model(member):
            continue
        for field in ("kind", "model"):
            info = member.model_fields.get(field)
            if info is not None and tag in typing.get_args(_unwrap(info.annotation)):
                return member
    return None


def _walk(loc: tuple) -> tuple[list[str | int], Any]:
    """Follow a pydantic error location through the Config types.

    Returns the location with discriminated-union tags removed (the TOML key path)
    and the type reached (a model class when the location ends on a table)."""
    parts: list[str | int] = []
    tp: Any = Config
    for element in loc:
        tp = _unwrap(tp) if tp is not None else None
        origin = typing.get_origin(tp)
        if origin in (Union, types.UnionType):
            members = [_unwrap(m) for m in typing.get_args(tp) if m is not type(None)]
            if len(members) == 1:
                tp, origin = members[0], typing.get_origin(members[0])
            else:
                member = _tag_member(members, element)
                if member is not None:  # a tag element: not part of the key path
                    tp = member
                    continue
                tp = None
        if _is_model(tp) and isinstance(element, str) and element in tp.model_fields:
            tp = tp.model_fields[element].annotation
        elif origin is list and isinstance(element, int):
            tp = typing.get_args(tp)[0]
        else:
            tp = None
        parts.append(element)
    if tp is not None:
        tp = _unwrap(tp)
        if typing.get_origin(tp) in (Union, types.UnionType):
            members = [_unwrap(m) for m in typing.get_args(tp) if m is not type(None)]
            tp = members[0] if len(members) == 1 else tp
    return parts, tp


_TYPE_RULES = {
    "float_type": "must be a number",
    "float_parsing": "must be a number",
    "int_type": "must be an integer",
    "int_parsing": "must be an integer",
    "int_from_float": "must be an integer",
    "bool_type": "must be true or false",
    "bool_parsing": "must be true or false",
    "string_type": "must be a string",
    "finite_number": "must be a finite number",
    "model_type": "must be a table",
    "model_attributes_type": "must be a table",
    "dict_type": "must be a table",
    "dataclass_type": "must be a table",
}

_BOUND_RULES = {
    "greater_than": (">", "gt"),
    "greater_than_equal": (">=", "ge"),
    "less_than": ("<", "lt"),
    "less_than_equal": ("<=", "le"),
}


def _format_error(err: dict) -> str:
    """One pydantic error as ``key.path: rule, got value``."""
    kind = err.get("type", "")
    ctx = err.get("ctx") or {}
    value = err.get("input")
    parts, reached = _walk(tuple(err.get("loc", ())))

    if kind == "config_rule":
        parts = parts + list(ctx.get("path", ()))
        rule = ctx.get("rule", err.get("msg", ""))
    elif kind == "missing":
        rule = "required key missing"
    elif kind == "extra_forbidden":
        unknown = parts[-1] if parts else "?"
        rule = f"unknown key {str(unknown)!r}"
        parent_parts, parent = _walk(tuple(err.get("loc", ()))[:-1])
        if _is_model(parent):
            close = difflib.get_close_matches(str(unknown), list(parent.model_fields), n=1, cutoff=0.6)
            if close:
                rule += f" (did you mean {close[0]!r}?)"
    elif kind in _BOUND_RULES:
        symbol, key = _BOUND_RULES[kind]
        rule = f"must be {symbol} {_num(ctx.get(key))}, got {_show(value)}"
    elif kind == "literal_error":
        expected = str(ctx.get("expected", "")).replace(" or ", ", ")
        rule = f"must be one of {expected}, got {_show(value)}"
    elif kind == "union_tag_invalid":
        parts = parts + [str(ctx.get("discriminator", "kind")).strip("'")]
        rule = f"must be one of {ctx.get('expected_tags', '')}, got {_show(ctx.get('tag'))}"
    elif kind == "union_tag_not_found":
        parts = parts + [str(ctx.get("discriminator", "kind")).strip("'")]
        rule = "required key missing"
    elif kind == "list_type":
        if isinstance(value, dict):
            rule = f"must be an array, got a table (write [[{_format_key(parts)}]] for each entry)"
        else:
            rule = f"must be an array, got {_show(value)}"
    elif kind == "too_short":
        rule = f"must hold at least {ctx.get('min_length')} item(s)"
    elif kind in _TYPE_RULES:
        rule = f"{_TYPE_RULES[kind]}, got {_show(value)}"
    elif kind == "value_error":
        rule = str(err.get("msg", "")).removeprefix("Value error, ")
    else:
        rule = str(err.get("msg", kind))
    return one_line(f"{_format_key(parts)}: {rule}")
