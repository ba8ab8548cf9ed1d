"""The OpenAPI model generator (app/web/schema_gen.py): one declaration per field, the JSON of ``jsonable``.

Each model is checked twice, by pydantic's validation and by jsonschema_rs (the validator schemathesis uses,
outside the project) against the JSON schema pydantic writes for it: what ``jsonable`` makes of a throwaway
dataclass passes, what it cannot make fails. A field added to a page dataclass reaches its model with no
second declaration; the served schema's bodies are compared with their dataclasses in test_openapi.py.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from datetime import date
from typing import Any, Literal

import jsonschema_rs
import numpy as np
import pandas as pd
import pytest
from pydantic import BaseModel, ValidationError

from app.jsonable import jsonable
from app.web.schema_gen import ModelFactory
from app.web.trend import TrendPage


@dataclass(frozen=True)
class _Part:
    label: str
    share: float


@dataclass(frozen=True)
class _Probe:
    """A throwaway result with one field of each kind ``jsonable`` handles."""

    name: str
    count: int
    share: float
    window: tuple[int, int]
    knots: tuple[float, ...]
    kind: Literal["a", "b"]
    by_code: dict[int, str]
    parts: list[_Part]
    maybe: _Part | None
    table: pd.DataFrame
    when: date
    scalar: np.float64
    figure: object = field(default=None, metadata={"json_skip": True})


@dataclass(frozen=True)
class _Odd:
    handle: complex


def _probe() -> _Probe:
    return _Probe(name="n", count=3, share=math.nan, window=(1998, 2022), knots=(1.0, math.inf), kind="a",
                  by_code={1: "x"}, parts=[_Part("p", -math.inf)], maybe=None,
                  table=pd.DataFrame({"year": [2000, 2001], "share": [0.25, np.nan]}), when=date(2026, 1, 2),
                  scalar=np.float64(0.5), figure=object())


def _schema_errors(model: type[BaseModel], value: Any) -> list[str]:
    """Errors of jsonschema_rs (outside the project) against the JSON schema pydantic writes for ``model``."""
    validator = jsonschema_rs.Draft202012Validator(model.model_json_schema())
    return [f"{e.instance_path}: {e.message}" for e in validator.iter_errors(value)]


def json_fields(cls: type) -> set[str]:
    return {f.name for f in dataclasses.fields(cls) if not f.metadata.get("json_skip")}


def test_a_generated_model_accepts_what_jsonable_writes() -> None:
    model = ModelFactory().define(_Probe, "Probe")
    value = jsonable(_probe())
    assert value["share"] is None and value["knots"] == [1.0, None] and value["table"][1]["share"] is None
    model.model_validate(value)
    assert _schema_errors(model, value) == []
    assert set(model.model_fields) == json_fields(_Probe) == set(value)
    assert set(model.model_json_schema()["required"]) == json_fields(_Probe)  # jsonable writes every field


@pytest.mark.parametrize("change", [
    {"extra": 1},  # a page body forbids unknown keys
    {"window": [1998, 2010, 2022]},  # a pair is exactly two items
    {"kind": "c"},  # a Literal keeps its words
    {"count": "three"},
    {"by_code": {"1": 2}},
    {"parts": [{"label": "p"}]},  # a nested dataclass's fields are required too
])
def test_a_generated_model_refuses_what_jsonable_cannot_write(change: dict[str, Any]) -> None:
    model = ModelFactory().define(_Probe, "Probe")
    value = {**jsonable(_probe()), **change}
    with pytest.raises(ValidationError):
        model.model_validate(value)
    assert _schema_errors(model, value)


def test_a_result_nested_in_a_page_may_stay_open() -> None:
    models = ModelFactory()
    models.define(_Part, extra="allow")
    model = models.define(_Probe, "Probe")
    value = jsonable(_probe())
    value["parts"][0]["more"] = 1
    model.model_validate(value)
    assert _schema_errors(model, value) == []
    with pytest.raises(ValidationError):
        model.model_validate({**value, "more": 1})


def test_a_field_added_to_a_page_dataclass_reaches_its_model_without_schemas_py() -> None:
    plus = dataclasses.make_dataclass("TrendPagePlus", [("note", str, field(default=""))], bases=(TrendPage,),
                                      frozen=True)
    model = ModelFactory().define(plus, "TrendPagePlus")
    assert set(model.model_fields) == json_fields(TrendPage) | {"note"}
    assert "note" in model.model_json_schema()["required"]
    assert "figure" not in model.model_fields  # json_skip


def test_a_shape_must_name_fields_the_dataclass_has() -> None:
    with pytest.raises(ValueError, match="typo"):
        ModelFactory().define(_Part, fields={"typo": int})
    with pytest.raises(ValueError, match="which it has already"):
        ModelFactory().define(_Part, add={"label": str})


def test_a_type_with_no_json_shape_is_refused_naming_the_field() -> None:
    with pytest.raises(TypeError, match=r"_Odd\.handle"):
        ModelFactory().define(_Odd)


def test_a_dataclass_gets_one_model_and_names_are_unique() -> None:
    models = ModelFactory()
    models.define(_Part)
    with pytest.raises(ValueError, match="already has a model"):
        models.define(_Part)
    with pytest.raises(ValueError, match="two models are named _PartOut"):
        models.variant(_Part, "_PartOut")
