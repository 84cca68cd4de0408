"""Turning numpy arrays, pandas objects, dicts and plain lists into (ids, predictions).

Accepted forms of ``predictions`` (``ids`` is the optional second argument of every call):

* a pandas ``DataFrame`` with an id column and a prediction column (``id_column`` /
  ``prediction_column``, default ``"id"`` / ``"prediction"``); when the prediction column is
  absent and exactly one other column remains, that one is used; when the id column is absent
  but the index is named like it, the index is used;
* a pandas ``Series``: the index holds the row ids (unless ``ids`` is given);
* a ``dict`` mapping row id to prediction;
* a numpy array, list or tuple of predictions, with ``ids`` of the same length; without
  ``ids`` the values are taken in the holdout's declared row order (``client.ids(name)``).

Ids are sent as text (numpy integers as plain integers). For metric ``error`` predictions are
class names: numbers are written as text, an integral float (``1.0``) as the declared class
``"1"`` when that is what the holdout declares. Every other metric takes finite numbers.
"""

from __future__ import annotations

import math
import numbers
from typing import Any, Callable, List, Optional, Sequence, Tuple

from .errors import InvalidInput
from .types import Target


def _module(x: Any) -> str:
    return type(x).__module__ or ""


def _is_dataframe(x: Any) -> bool:
    return _module(x).startswith("pandas") and hasattr(x, "columns") and hasattr(x, "iloc")


def _is_series(x: Any) -> bool:
    return _module(x).startswith("pandas") and hasattr(x, "index") and not hasattr(x, "columns")


def _tolist(x: Any) -> list:
    if hasattr(x, "tolist"):  # numpy arrays, pandas Index/Series: native Python scalars
        return list(x.tolist())
    return list(x)


def id_text(v: Any) -> str:
    """The row id as the daemon sees it."""
    if isinstance(v, str):
        return v
    if isinstance(v, bool):
        return str(v).lower()
    if isinstance(v, numbers.Integral):
        return str(int(v))
    if isinstance(v, float) and v.is_integer():
        return str(int(v))
    return str(v)


def split_predictions(
    predictions: Any,
    ids: Optional[Sequence[Any]],
    id_column: str,
    prediction_column: str,
    declared_ids: Callable[[], Sequence[str]],
) -> Tuple[List[str], list]:
    """Returns (ids as text, raw prediction values), aligned; see the module docstring."""
    if _is_dataframe(predictions):
        frame = predictions
        cols = [str(c) for c in frame.columns]
        if prediction_column in cols:
            pcol = prediction_column
        else:
            rest = [c for c in cols if c != id_column]
            if len(rest) != 1:
                raise InvalidInput(
                    f"the DataFrame has no column {prediction_column!r} (columns: {cols}); "
                    "pass prediction_column="
                )
            pcol = rest[0]
        values = _tolist(frame[pcol])
        if ids is not None:
            raw_ids = _tolist(ids)
        elif id_column in cols:
            raw_ids = _tolist(frame[id_column])
        elif getattr(frame.index, "name", None) == id_column:
            raw_ids = _tolist(frame.index)
        else:
            raise InvalidInput(
                f"the DataFrame has no column {id_column!r} (columns: {cols}) and its index is "
                "not named so; pass id_column= or ids="
            )
    elif _is_series(predictions):
        values = _tolist(predictions)
        raw_ids = _tolist(ids) if ids is not None else _tolist(predictions.index)
    elif isinstance(predictions, dict):
        if ids is not None:
            raise InvalidInput("a dict of predictions carries its own ids; do not pass ids=")
        raw_ids = list(predictions.keys())
        values = list(predictions.values())
    elif isinstance(predictions, (str, bytes)):
        raise InvalidInput("predictions must be a sequence of values, not a single string")
    else:
        try:
            values = _tolist(predictions)
        except TypeError:
            raise InvalidInput(
                f"cannot read predictions from a {type(predictions).__name__}: pass a DataFrame, "
                "Series, dict, numpy array or list"
            ) from None
        if values and isinstance(values[0], list):
            raise InvalidInput(
                "predictions must be one-dimensional (one value per row id); "
                "for a best-of batch use submit_batch"
            )
        raw_ids = _tolist(ids) if ids is not None else list(declared_ids())
    if len(raw_ids) != len(values):
        raise InvalidInput(f"{len(raw_ids)} row ids but {len(values)} predictions")
    return [id_text(i) for i in raw_ids], values


def encode_classes(ids: Sequence[str], values: Sequence[Any], target: Target) -> List[str]:
    """Predicted classes as text, each checked against the target's declared classes."""
    declared = set(target.classes)
    out = []
    for i, v in zip(ids, values):
        if v is None or (isinstance(v, float) and math.isnan(v)):
            raise InvalidInput(f"prediction for id `{i}` is missing (target {target.name})")
        if isinstance(v, str):
            c = v
        elif isinstance(v, bool):
            c = str(v).lower()
        elif isinstance(v, numbers.Integral):
            c = str(int(v))
        elif isinstance(v, float) and v.is_integer() and declared and str(v) not in declared:
            c = str(int(v))
        else:
            c = str(v)
        if declared and c not in declared:
            raise InvalidInput(
                f"prediction {c!r} for id `{i}` is not a declared class of target "
                f"{target.name} ({','.join(target.classes)})"
            )
        out.append(c)
    return out


def encode_numbers(ids: Sequence[str], values: Sequence[Any], target: Target) -> List[float]:
    """Predicted numbers as floats, each checked to be finite."""
    out = []
    for i, v in zip(ids, values):
        try:
            x = float(v)
        except (TypeError, ValueError):
            raise InvalidInput(
                f"prediction {v!r} for id `{i}` is not a number "
                f"(target {target.name} uses metric {target.metric})"
            ) from None
        if not math.isfinite(x):
            raise InvalidInput(f"prediction for id `{i}`: {x} is not a finite number")
        out.append(x)
    return out
