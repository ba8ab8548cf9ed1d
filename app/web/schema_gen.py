"""Pydantic models generated from the result dataclasses, for the OpenAPI schema: a field is declared once.

The routes answer with ``jsonable(page)`` (app/jsonable.py); a model made here describes exactly that JSON,
so it follows ``jsonable``'s rules, not the dataclass's Python types:

- a dataclass becomes a model of its fields, less those marked ``metadata={"json_skip": True}``; a nested
  dataclass becomes its own model (one per dataclass, shared by every place it appears);
- every field is required, because ``jsonable`` writes every field (defaults included);
- ``float`` becomes ``float | None``: a number that is not finite is written as null;
- ``tuple[A, B]`` becomes an array of exactly those items; ``tuple[A, ...]``, lists and sets plain arrays;
- ``dict[K, V]`` becomes an object with string keys;
- a pandas DataFrame becomes an array of records (``dict[str, Any]`` unless the shape names a row model),
  numpy arrays and Series arrays; dates and datetimes ISO strings; ``Literal`` stays as it is.

Where a dataclass's annotation says less than its JSON holds (``dict[str, Any]`` filled by a known builder,
a ``str`` that is really one of a few words), a :class:`Shape` names the sharper annotation for that field;
it must name a field the dataclass has. pydantic's ``create_model`` builds the models; the walk over the
annotations is written here because pydantic's own dataclass support validates Python objects, not the
JSON ``jsonable`` makes of them (NaN to null, DataFrames to records, skipped fields).
"""

from __future__ import annotations

import dataclasses
import inspect
from collections.abc import Iterable, Mapping, Sequence
from collections.abc import Set as AbstractSet
from datetime import date, datetime
from types import NoneType, UnionType
from typing import Annotated, Any, Literal, Union, get_args, get_origin, get_type_hints

import numpy as np
import pandas as pd
from pydantic import BaseModel, ConfigDict, Field, create_model

Extra = Literal["forbid", "allow"]

__all__ = ["Extra", "ModelFactory", "Shape", "list_of", "one_of", "row_model"]


@dataclasses.dataclass(frozen=True)
class Shape:
    """How one dataclass becomes a model.

    ``fields`` replaces the derived annotation of a field (used as given: write the JSON type);
    ``drop`` leaves fields out and ``add`` adds fields, for JSON built by a hand-written serialiser from
    the dataclass; ``descriptions`` documents fields; ``doc`` replaces the class docstring.
    """

    name: str | None = None
    extra: Extra = "forbid"
    fields: Mapping[str, Any] = dataclasses.field(default_factory=dict)
    drop: frozenset[str] = frozenset()
    add: Mapping[str, Any] = dataclasses.field(default_factory=dict)
    descriptions: Mapping[str, str] = dataclasses.field(default_factory=dict)
    doc: str | None = None


def one_of(values: Iterable[str]) -> Any:
    """``Literal[...]`` of the given words (so a route's choices are written once, where they are checked)."""
    choices = tuple(values)
    if not choices:
        raise ValueError("one_of needs at least one value.")
    return Literal.__getitem__(choices)


def list_of(item: Any) -> Any:
    """``list[item]`` for a model made at run time (a variable: a type checker will not take it as a type)."""
    return list.__class_getitem__(item)


def row_model(name: str, columns: Mapping[str, Any], *, extra: Extra = "allow", doc: str | None = None
              ) -> type[BaseModel]:
    """A record of a DataFrame's rows (``to_dict("records")``), from its column names and JSON types."""
    fields: dict[str, Any] = {column: (annotation, ...) for column, annotation in columns.items()}
    return _create(name, extra, doc, fields)


class ModelFactory:
    """Makes and remembers one model per dataclass (its default shape) and named variants of it.

    ``glossary`` describes fields by name wherever they appear without a description of their own
    (``window`` means the same on every page).
    """

    def __init__(self, *, glossary: Mapping[str, str] | None = None, suffix: str = "Out") -> None:
        self.glossary = dict(glossary or {})
        self.suffix = suffix
        self._shapes: dict[type, Shape] = {}
        self._defaults: dict[type, type[BaseModel]] = {}
        self._names: dict[str, type[BaseModel]] = {}

    # -- public ---------------------------------------------------------------------------------------

    def define(self, cls: type, name: str | None = None, **shape: Any) -> type[BaseModel]:
        """The model of ``cls`` wherever it appears, with the given :class:`Shape` options; defined once."""
        if cls in self._shapes:
            raise ValueError(f"{cls.__qualname__} already has a model ({self._defaults[cls].__name__}); "
                             "define it before anything that nests it, and only once.")
        chosen = Shape(name=name, **shape)
        model = self._build(cls, chosen)
        self._shapes[cls], self._defaults[cls] = chosen, model
        return model

    def variant(self, cls: type, name: str, **changes: Any) -> type[BaseModel]:
        """Another model of ``cls`` (not used where ``cls`` is nested): its shape with ``changes``.

        ``fields``, ``add`` and ``descriptions`` are merged into the shape's own; the rest replace.
        """
        base = self._shapes.get(cls, Shape())
        merged: dict[str, Any] = {**changes}
        for key in ("fields", "add", "descriptions"):
            if key in changes:
                merged[key] = {**getattr(base, key), **changes[key]}
        return self._build(cls, dataclasses.replace(base, name=name, **merged))

    def model(self, cls: type) -> type[BaseModel]:
        """The default model of ``cls``, made with the default shape on first use."""
        if cls not in self._defaults:
            self._defaults[cls] = self._build(cls, Shape())
            self._shapes[cls] = Shape()
        return self._defaults[cls]

    def annotation(self, tp: Any, where: str = "") -> Any:
        """The JSON type ``jsonable`` makes of a value annotated ``tp``."""
        origin, args = get_origin(tp), get_args(tp)
        if tp is Any or tp is NoneType or tp is None:
            return Any if tp is Any else NoneType
        if isinstance(tp, type) and issubclass(tp, BaseModel):
            return tp
        if isinstance(tp, type) and dataclasses.is_dataclass(tp):
            return self.model(tp)
        if tp is float or (isinstance(tp, type) and issubclass(tp, np.floating)):
            return float | None
        if tp in (bool, int, str):
            return tp
        if isinstance(tp, type) and issubclass(tp, np.integer):
            return int
        if tp in (datetime, date):
            return str
        if tp is pd.DataFrame:
            return list[dict[str, Any]]
        if tp in (pd.Series, np.ndarray, list, tuple, set, frozenset):
            return list[Any]
        if tp is dict:
            return dict[str, Any]
        if origin is Literal:
            return tp
        if origin is Annotated:
            return Annotated.__class_getitem__((self.annotation(args[0], where), *tp.__metadata__))
        if origin is Union or origin is UnionType:
            return _union(self.annotation(a, where) for a in args)
        if origin is tuple:
            if len(args) == 2 and args[1] is Ellipsis:
                return list_of(self.annotation(args[0], where))
            return tuple.__class_getitem__(tuple(self.annotation(a, where) for a in args))
        if origin in (list, set, frozenset, Sequence, AbstractSet):
            return list_of(self.annotation(args[0], where))
        if origin in (dict, Mapping):
            return dict.__class_getitem__((str, self.annotation(args[1], where)))
        raise TypeError(f"{where or 'a field'}: no JSON shape for the type {tp!r}; give the field an "
                        "annotation in its Shape (fields=...).")

    # -- building -------------------------------------------------------------------------------------

    def _build(self, cls: type, shape: Shape) -> type[BaseModel]:
        if not (isinstance(cls, type) and dataclasses.is_dataclass(cls)):
            raise TypeError(f"{cls!r} is not a dataclass.")
        fields = [f for f in dataclasses.fields(cls) if not f.metadata.get("json_skip")]
        names = {f.name for f in fields}
        unknown = sorted((set(shape.fields) | shape.drop | set(shape.descriptions)) - names - set(shape.add))
        if unknown:
            raise ValueError(f"the shape of {cls.__qualname__} names {', '.join(unknown)}, which it does not "
                             "have (or skips in JSON); a field renamed or removed?")
        clash = sorted(set(shape.add) & names)
        if clash:
            raise ValueError(f"the shape of {cls.__qualname__} adds {', '.join(clash)}, "
                             "which it has already.")
        try:
            hints = get_type_hints(cls, include_extras=True)
        except NameError as exc:
            raise TypeError(f"{cls.__qualname__}: an annotation cannot be resolved ({exc}); import the "
                            "type at module level in its module.") from exc
        spec: dict[str, Any] = {}
        for f in fields:
            if f.name in shape.drop:
                continue
            where = f"{cls.__qualname__}.{f.name}"
            given = f.name in shape.fields
            annotation = shape.fields[f.name] if given else self.annotation(hints[f.name], where)
            text = shape.descriptions.get(f.name) or f.metadata.get("doc") or self.glossary.get(f.name)
            spec[f.name] = (annotation, Field(description=text) if text else ...)
        for name, annotation in shape.add.items():
            text = shape.descriptions.get(name) or self.glossary.get(name)
            spec[name] = (annotation, Field(description=text) if text else ...)
        doc = shape.doc if shape.doc is not None else _docstring(cls)
        return self._register(_create(shape.name or cls.__name__ + self.suffix, shape.extra, doc, spec))

    def _register(self, model: type[BaseModel]) -> type[BaseModel]:
        if model.__name__ in self._names:
            raise ValueError(f"two models are named {model.__name__}; give one of them another name.")
        self._names[model.__name__] = model
        return model


def _create(name: str, extra: Extra, doc: str | None, fields: dict[str, Any]) -> type[BaseModel]:
    shadowing = sorted(n for n in fields if hasattr(BaseModel, n))
    if shadowing:
        raise ValueError(f"{name}: field(s) {', '.join(shadowing)} would shadow pydantic's BaseModel.")
    config = ConfigDict(extra=extra, protected_namespaces=())
    model: type[BaseModel] = create_model(name, __config__=config, __doc__=doc, **fields)
    return model


def _union(members: Iterable[Any]) -> Any:
    unique: list[Any] = []
    for member in members:
        for part in (get_args(member) if get_origin(member) in (Union, UnionType) else (member,)):
            if part not in unique:
                unique.append(part)
    return unique[0] if len(unique) == 1 else Union.__getitem__(tuple(unique))


def _docstring(cls: type) -> str | None:
    """The class docstring, unless it is the signature ``dataclass`` writes when there is none."""
    doc = cls.__doc__
    if not doc or doc.startswith(f"{cls.__name__}("):
        return None
    return inspect.cleandoc(doc)
