"""Plain JSON values from result dataclasses, DataFrames and numpy scalars (for ``--json`` and the API).

It lives below the web layer so that the command line can print JSON without loading a web framework.
"""

from __future__ import annotations

import dataclasses
import math
from datetime import date, datetime
from typing import Any

import numpy as np
import pandas as pd


def jsonable(value: Any) -> Any:
    """Convert dataclasses, DataFrames, numpy scalars and non-finite floats into plain JSON values."""
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return {f.name: jsonable(getattr(value, f.name)) for f in dataclasses.fields(value)
                if not f.metadata.get("json_skip")}
    if isinstance(value, pd.DataFrame):
        return [jsonable(r) for r in value.to_dict("records")]
    if isinstance(value, pd.Series):
        return jsonable(value.tolist())
    if isinstance(value, dict):
        return {str(k): jsonable(v) for k, v in value.items()}
    if isinstance(value, list | tuple | set | frozenset):
        return [jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return [jsonable(v) for v in value.tolist()]
    if isinstance(value, np.generic):
        return jsonable(value.item())
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, datetime | date):
        return value.isoformat()
    if value is pd.NA or value is pd.NaT:
        return None
    return value
