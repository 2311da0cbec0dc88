"""Declaring stage settings.

Every stage has one frozen dataclass of settings. Each field is declared with
:func:`setting`, which records its documentation and its allowed values; the
definition loader (:mod:`corpusprep.definition`) validates a TOML table
against the dataclass, and the README reference is generated from the same
metadata, so the key, the field and its documentation cannot drift apart.

Field types allowed: ``bool``, ``int``, ``float``, ``str``, ``tuple[str, ...]``.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from typing import Any

__all__ = ["SettingDoc", "setting", "setting_docs"]


def setting(
    default: Any,
    doc: str,
    *,
    choices: Sequence[Any] | None = None,
    minimum: float | None = None,
    maximum: float | None = None,
    exclusive_minimum: bool = False,
    exclusive_maximum: bool = False,
) -> Any:
    """Declare one documented setting of a stage config dataclass.

    ``minimum``/``maximum`` bound numbers (inclusive unless marked exclusive);
    ``choices`` lists the allowed values of a string or number.
    """
    metadata = {
        "doc": doc,
        "choices": tuple(choices) if choices is not None else None,
        "minimum": minimum,
        "maximum": maximum,
        "exclusive_minimum": exclusive_minimum,
        "exclusive_maximum": exclusive_maximum,
    }
    return dataclasses.field(default=default, metadata=metadata)


@dataclasses.dataclass(frozen=True, slots=True)
class SettingDoc:
    """One row of the settings reference."""

    key: str
    type_name: str
    default: Any
    doc: str
    allowed: str


def _allowed(meta: dict[str, Any]) -> str:
    if meta.get("choices"):
        return ", ".join(repr(c) for c in meta["choices"])
    low, high = meta.get("minimum"), meta.get("maximum")
    parts = []
    if low is not None:
        parts.append(("> " if meta.get("exclusive_minimum") else ">= ") + str(low))
    if high is not None:
        parts.append(("< " if meta.get("exclusive_maximum") else "<= ") + str(high))
    return ", ".join(parts)


def setting_docs(config_cls: type) -> list[SettingDoc]:
    """The documented settings of a stage config dataclass, in declaration order."""
    rows = []
    for field in dataclasses.fields(config_cls):
        meta = dict(field.metadata)
        type_name = (
            field.type if isinstance(field.type, str) else getattr(field.type, "__name__", str(field.type))
        )
        rows.append(
            SettingDoc(field.name, str(type_name), field.default, meta.get("doc", ""), _allowed(meta))
        )
    return rows
