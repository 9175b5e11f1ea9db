"""Segment names: `tillite name` writes them into a model file or a summary store.

Names are any text, keyed by segment id (ids never change).  They are kept as
data only: escaped in HTML by the report, passed as string literals in SQL.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from .engines import Engine
from .errors import NamingError
from .model import Model

__all__ = ["apply_names", "read_names_file", "name_model_file", "name_store_segments"]


def read_names_file(path: str | Path) -> dict[str, Any]:
    """A JSON object of segment id -> name."""
    try:
        data = json.loads(Path(path).read_text(encoding="utf-8"))
    except OSError as err:
        raise NamingError(f"cannot read --names file {path}: {err.strerror}") from None
    except (json.JSONDecodeError, UnicodeDecodeError) as err:
        raise NamingError(f"--names file {path} is not valid JSON: {err}") from None
    if not isinstance(data, dict):
        raise NamingError(f'--names file {path} must hold a JSON object such as {{"4": "probable leak"}}')
    return data


def apply_names(model: Model, given: dict[Any, Any], group: str | None = None) -> Model:
    """Set names on a model (in place): keys are segment ids, values text; an empty text removes a name.

    A --within model names the segments of one group (``group``: its name as `show` prints it), by the same
    rules; its names are kept in that group's entry."""
    if model.within:
        return _apply_group_names(model, given, group)
    if group is not None:
        raise NamingError("--group is for a model of segments within groups (segment --within); this model has none")
    ids = model.segment_ids() + ([-1] if has_segment_minus_one(model) and -1 not in model.segment_ids() else [])
    names = dict(model.names)
    for key, value in given.items():
        try:
            sid = int(str(key).strip())
        except ValueError:
            raise NamingError(f"segment id {key!r} is not a whole number; the model's ids are {', '.join(map(str, ids))}") from None
        if sid not in ids and str(sid) not in model.names:  # a name already there may still be removed
            raise NamingError(f"segment id {sid} is not in the model; its ids are {', '.join(map(str, ids))}")
        if not isinstance(value, str):
            raise NamingError(f"the name of segment {sid} must be text, got {json.dumps(value)}")
        if value == "":
            names.pop(str(sid), None)
        else:
            names[str(sid)] = value
    model.names = {k: names[k] for k in sorted(names, key=int)}
    return model


def has_segment_minus_one(model: Model) -> bool:
    """Whether the model labels rows -1: its outlier group (CF tree), or density noise dropped from the segments."""
    return bool(model.extras.get("outliers")) or (model.method == "density" and model.params.get("noise") == "drop")


def _apply_group_names(model: Model, given: dict[Any, Any], group: str | None) -> Model:
    """``apply_names`` on one group of a --within model, named as `show` names it."""
    from .model import group_models

    groups = group_models(model)
    listing = ", ".join(g["name"] for g, _ in groups)
    if group is None:
        raise NamingError(f"this model holds segments within each {model.within['column']} (segment --within): give --group "
                          f"with one of its groups: {listing}")
    found = [(g, one) for g, one in groups if g["name"] == group]
    if not found:
        raise NamingError(f"--group {group} is not a group of the model's {model.within['column']}; its groups: {listing}")
    entry, one = found[0]
    try:
        apply_names(one, given)
    except NamingError as err:
        raise NamingError(f"group {group}: {err}") from None
    if one.names:
        entry["names"] = one.names
    else:
        entry.pop("names", None)
    return model


def name_model_file(path: Path, given: dict[Any, Any], group: str | None = None) -> Model:
    """Read, name, and write back atomically (a failure leaves the file as it was)."""
    model = apply_names(Model.read(path), given, group)
    model.write(path)
    return model


def name_store_segments(engine: Engine, store: str, given: dict[Any, Any], group: str | None = None) -> Model:
    """Name a store's segments (of ``group``, for a --within store) and re-create its label views, in one
    transaction."""
    from . import sqlgen
    from . import store as S

    info = S.load(engine, store)
    model = apply_names(info.model, given, group)
    with engine.transaction():
        S._claim(engine, info)
        engine.execute(sqlgen.update_statement(S.STORES, {"model": model.to_json()}, sqlgen.equals_all({"store": store})))
        S._relabel(engine, info, model)
    return model
