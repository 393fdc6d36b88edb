"""Loading a plant file: TOML → validated :class:`PlantConfig`, one line per problem."""

from __future__ import annotations

import re
import tomllib
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from pydantic import BaseModel, ValidationError

from twin.config.schema import PlantConfig
from twin.config.types import ConfigError, _Problems


def load_config(path: str | Path) -> PlantConfig:
    """Read, validate and convert a plant file.

    Parameters
    ----------
    path : str or Path
        TOML plant file.

    Raises
    ------
    FileNotFoundError, OSError
        The file cannot be read.
    ConfigError
        The file is not valid TOML or breaks the schema; one line per problem.
    """
    path = Path(path)
    raw = path.read_bytes()
    try:
        data = tomllib.loads(raw.decode("utf-8"))
    except UnicodeDecodeError as exc:
        raise ConfigError([f"{path}: not UTF-8 text ({exc.reason}); expected a UTF-8 TOML file"], path) from None
    except tomllib.TOMLDecodeError as exc:
        m = re.search(r"^(.*?)\s*\(at line (\d+), column (\d+)\)", str(exc))
        where, what = (f"{path}:{m.group(2)}:{m.group(3)}", m.group(1)) if m else (str(path), str(exc))
        raise ConfigError([f"{where}: TOML syntax error: {what}; expected valid TOML"], path) from None
    cfg = validate_config(data, source=path)
    base = path.parent
    b = cfg.broker
    files: list[tuple[str, Path]] = []
    if b.password_file is not None:
        b.password_file = base / b.password_file
        files.append(("broker.password_file", b.password_file))
    for section, tls in (("broker.tls", b.tls), ("metrics.tls", cfg.metrics.tls)):
        if tls is None:
            continue
        for key in ("ca_file", "cert_file", "key_file", "client_ca_file"):
            if getattr(tls, key, None) is not None:
                setattr(tls, key, base / getattr(tls, key))
                files.append((f"{section}.{key}", getattr(tls, key)))
    st = cfg.state
    st.file = base / (st.file if st.file is not None else f"{cfg.unit.id}.state.json")
    if cfg.sparkplug.historical_file is not None:
        cfg.sparkplug.historical_file = base / cfg.sparkplug.historical_file
    problems = [f"{path}: {key}: {why}; expected a readable file"
                for key, file in files if (why := unreadable(file)) is not None]
    if problems:
        raise ConfigError(problems, path)
    cfg._source_path = path
    return cfg


def unreadable(file: Path) -> str | None:
    """Why ``file`` cannot be read (naming it), or None when it can."""
    try:
        with open(file, "rb") as fh:
            fh.read(1)
    except IsADirectoryError:
        return f"{str(file)!r} is a directory"
    except OSError as exc:
        return f"cannot read {str(file)!r}: {exc.strerror or exc}"
    return None


def validate_config(data: Mapping[str, Any], source: str | Path = "<config>") -> PlantConfig:
    """Validate an already-parsed plant document; errors as in :func:`load_config`."""
    try:
        return PlantConfig.model_validate(data)
    except ValidationError as exc:
        raise ConfigError(_format_errors(exc, data, str(source)), source) from None


def json_schema() -> dict[str, Any]:
    """The JSON Schema of the plant file format."""
    schema = PlantConfig.model_json_schema(mode="validation")
    schema["title"] = "twin plant configuration"
    return schema


def _format_errors(exc: ValidationError, data: Any, source: str) -> list[str]:
    merged: dict[str, list[str]] = {}
    for err in exc.errors(include_url=False):
        prefix, dropped = _loc_path(err["loc"], data, err["type"])
        ctx_error = (err.get("ctx") or {}).get("error")
        if isinstance(ctx_error, _Problems):
            for path, msg in ctx_error.items:
                merged.setdefault(".".join(p for p in (prefix, path) if p), []).append(msg)
            continue
        what, expected = _describe(err)
        key = prefix or "(top level)"
        if dropped and key in merged:  # several members of a union failed: merge the expectations
            merged[key][0] = f"{merged[key][0]} or {expected}"
        else:
            merged.setdefault(key, []).append(f"{what}; expected {expected}" if expected else what)
    return [f"{source}: {path}: {msg}" for path, msgs in merged.items() for msg in msgs]


def _loc_path(loc: tuple[Any, ...], data: Any, err_type: str) -> tuple[str, bool]:
    parts: list[str] = []
    dropped = False
    node = data
    for i, key in enumerate(loc):
        if isinstance(node, list) and isinstance(key, int) and 0 <= key < len(node):
            item = node[key]
            label = item.get("id", item.get("tag")) if isinstance(item, dict) else None
            parts[-1:] = [f"{parts[-1] if parts else ''}[{label if isinstance(label, str) else key}]"]
            node = item
        elif isinstance(node, dict) and key in node:
            parts.append(str(key))
            node = node[key]
        elif i == len(loc) - 1 and err_type == "missing":
            parts.append(str(key))
        else:
            dropped = True  # a union member or validator name, not a key of the file
    return ".".join(parts), dropped


def _describe(err: Any) -> tuple[str, str]:
    t, msg, value = err["type"], err["msg"], err.get("input")
    shown = repr(value)
    shown = shown if len(shown) <= 60 else shown[:57] + "..."
    if t == "missing":
        return "required key is missing", "a value"
    if t == "extra_forbidden":
        fields = _fields_at(err["loc"][:-1])
        return "unknown key", "one of " + ", ".join(fields) if fields else "no such key"
    if t == "value_error":
        text = str((err.get("ctx") or {}).get("error", msg))
        what, _, expected = text.partition("; expected ")
        return what, expected
    if t == "string_pattern_mismatch":
        return f"invalid id {shown}", f"letters, digits, '_', '-' matching {err['ctx']['pattern']}"
    what = f"wrong type {type(value).__name__} ({shown})" if t.endswith("_type") else f"wrong value {shown}"
    expected = msg[len("Input should be "):] if msg.startswith("Input should be ") else msg
    return what, expected


def _fields_at(loc: tuple[Any, ...]) -> list[str]:
    model: Any = PlantConfig
    for key in loc:
        if isinstance(key, int):
            continue
        field = model.model_fields.get(key)
        model = _inner_model(field.annotation) if field is not None else None
        if model is None:
            return []
    return list(model.model_fields)


def _inner_model(tp: Any) -> type[BaseModel] | None:
    if isinstance(tp, type) and issubclass(tp, BaseModel):
        return tp
    for arg in getattr(tp, "__args__", ()):
        found = _inner_model(arg)
        if found is not None:
            return found
    return None
