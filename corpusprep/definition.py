"""Pipeline definitions: a TOML file with one table per stage.

```toml
input = "raw"              # folder to read, relative to this file
output = "build/out"       # folder to write, relative to this file

[read]
include = ["**/*.jsonl"]
[clean]
normalization = "NFC"
...
```

Every table is validated against the stage's settings dataclass: unknown
keys are refused with the list of valid ones, values are checked for type
and range, and each error names the file, the line and the dotted key, e.g.
``demo.toml:14: near.threshold = 1.3: must be <= 1``.
"""

from __future__ import annotations

import dataclasses
import json
import re
import tomllib
import typing
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from corpusprep.clean import CleanConfig
from corpusprep.engine import EngineConfig
from corpusprep.errors import DefinitionError
from corpusprep.exact import ExactConfig
from corpusprep.hashing import hash_text
from corpusprep.near import NearConfig
from corpusprep.pack import PackConfig
from corpusprep.read import ReadConfig
from corpusprep.split import SplitConfig
from corpusprep.tokens import TokenizerConfig

__all__ = ["RUN_TABLES", "STAGE_TABLES", "Definition", "load_definition", "parse_definition"]

#: Definition table name -> settings dataclass, in the order the stages run.
STAGE_TABLES: dict[str, type] = {
    "read": ReadConfig,
    "clean": CleanConfig,
    "exact": ExactConfig,
    "near": NearConfig,
    "split": SplitConfig,
    "tokenizer": TokenizerConfig,
    "pack": PackConfig,
}
#: Tables that say where and how the run works, not what it writes: left out of
#: :meth:`Definition.resolved` and the digest, so they never change the output.
RUN_TABLES: dict[str, type] = {"engine": EngineConfig}
_TOP_LEVEL = {"input": "folder to read", "output": "folder to write"}

_TABLE_LINE = re.compile(r"^\s*\[\s*([A-Za-z0-9_.-]+)\s*\]")
_KEY_LINE = re.compile(r"^\s*([A-Za-z0-9_-]+)\s*=")


@dataclass(frozen=True, slots=True, kw_only=True)
class Definition:
    """A validated pipeline definition. Paths are absolute."""

    source: str
    base: Path | None = None  # the definition file's folder: relative paths inside tables resolve here
    input: Path | None
    output: Path | None
    read: ReadConfig
    clean: CleanConfig
    exact: ExactConfig
    near: NearConfig
    split: SplitConfig
    tokenizer: TokenizerConfig
    pack: PackConfig
    engine: EngineConfig = dataclasses.field(default_factory=EngineConfig)

    def stages(self) -> dict[str, Any]:
        """The stage settings by table name, in run order."""
        return {name: getattr(self, name) for name in STAGE_TABLES}

    def resolved(self) -> dict[str, dict[str, Any]]:
        """Every stage setting with defaults filled in, as JSON-ready data.

        Folders and the ``[engine]`` table are left out on purpose: the same
        definition run on the same input gives the same output wherever the
        folders live and whatever runs it.
        """
        return {
            name: {field.name: _jsonable(getattr(config, field.name)) for field in dataclasses.fields(config)}
            for name, config in self.stages().items()
        }

    def digest(self) -> str:
        """XXH3-128 of the canonical JSON of :meth:`resolved`."""
        return hash_text(json.dumps(self.resolved(), sort_keys=True, separators=(",", ":")))

    def with_folders(self, *, input: Path | None = None, output: Path | None = None) -> Definition:
        """A copy with the input and/or output folder replaced (command-line overrides)."""
        return dataclasses.replace(
            self,
            input=input.resolve() if input is not None else self.input,
            output=output.resolve() if output is not None else self.output,
        )


def _jsonable(value: Any) -> Any:
    return list(value) if isinstance(value, tuple) else value


def _key_lines(text: str) -> dict[str, int]:
    """Map dotted keys ("near.threshold", "input") to the line that sets them."""
    lines: dict[str, int] = {}
    table = ""
    for number, line in enumerate(text.splitlines(), start=1):
        if match := _TABLE_LINE.match(line):
            table = match.group(1)
            lines.setdefault(table, number)
        elif match := _KEY_LINE.match(line):
            dotted = f"{table}.{match.group(1)}" if table else match.group(1)
            lines.setdefault(dotted, number)
    return lines


class _Where:
    """Formats the 'file:line: key' prefix of error messages."""

    def __init__(self, source: str, lines: Mapping[str, int]) -> None:
        self.source, self.lines = source, lines

    def __call__(self, dotted: str) -> str:
        line = self.lines.get(dotted) or self.lines.get(dotted.split(".")[0])
        return f"{self.source}:{line}" if line else self.source


def _type_name(kind: Any) -> str:
    if typing.get_origin(kind) is tuple:
        return "a list of strings"
    return {bool: "true or false", int: "an integer", float: "a number", str: "a string"}.get(kind, str(kind))


def _check_value(dotted: str, value: Any, kind: Any, meta: Mapping[str, Any], where: str) -> Any:
    shown = json.dumps(value, ensure_ascii=False) if not isinstance(value, bool) else str(value).lower()
    prefix = f"{where}: {dotted} = {shown}"
    if typing.get_origin(kind) is tuple:
        if not isinstance(value, list) or not all(isinstance(item, str) for item in value):
            raise DefinitionError(f"{prefix}: must be {_type_name(kind)}")
        value = tuple(value)
    elif kind is bool:
        if not isinstance(value, bool):
            raise DefinitionError(f"{prefix}: must be true or false")
    elif kind is int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise DefinitionError(f"{prefix}: must be an integer")
    elif kind is float:
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise DefinitionError(f"{prefix}: must be a number")
        value = float(value)
    elif kind is str and not isinstance(value, str):
        raise DefinitionError(f"{prefix}: must be a string")
    choices = meta.get("choices")
    if choices and value not in choices:
        raise DefinitionError(f"{prefix}: must be one of {', '.join(repr(c) for c in choices)}")
    low, high = meta.get("minimum"), meta.get("maximum")
    if low is not None and (value <= low if meta.get("exclusive_minimum") else value < low):
        raise DefinitionError(f"{prefix}: must be {'>' if meta.get('exclusive_minimum') else '>='} {low}")
    if high is not None and (value >= high if meta.get("exclusive_maximum") else value > high):
        raise DefinitionError(f"{prefix}: must be {'<' if meta.get('exclusive_maximum') else '<='} {high}")
    return value


def _build_stage(name: str, cls: type, table: Any, where: _Where) -> Any:
    if not isinstance(table, dict):
        raise DefinitionError(f"{where(name)}: {name} must be a table ([{name}])")
    fields = {field.name: field for field in dataclasses.fields(cls)}
    hints = typing.get_type_hints(cls)
    values: dict[str, Any] = {}
    for key, value in table.items():
        dotted = f"{name}.{key}"
        if key not in fields:
            raise DefinitionError(
                f"{where(dotted)}: unknown key {dotted}; valid keys of [{name}]: {', '.join(fields)}"
            )
        values[key] = _check_value(dotted, value, hints[key], fields[key].metadata, where(dotted))
    try:
        return cls(**values)
    except DefinitionError as error:
        raise DefinitionError(f"{where(name)}: {error}") from None


def parse_definition(text: str, *, source: str = "<definition>", base: Path | None = None) -> Definition:
    """Validate definition ``text``; relative folders resolve against ``base``."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as error:
        raise DefinitionError(f"{source}: not valid TOML: {error}") from None
    where = _Where(source, _key_lines(text))
    known = set(_TOP_LEVEL) | set(STAGE_TABLES) | set(RUN_TABLES)
    for key in data:
        if key not in known:
            raise DefinitionError(
                f"{where(key)}: unknown key {key}; valid top-level keys: {', '.join(_TOP_LEVEL)}; "
                f"valid tables: {', '.join([*STAGE_TABLES, *RUN_TABLES])}"
            )
    folders: dict[str, Path | None] = {}
    for key in _TOP_LEVEL:
        value = data.get(key)
        if value is None:
            folders[key] = None
            continue
        if not isinstance(value, str) or not value:
            raise DefinitionError(f"{where(key)}: {key} = {value!r}: must be a folder path (a string)")
        path = Path(value)
        folders[key] = (base / path if base is not None and not path.is_absolute() else path).resolve()
    tables = {**STAGE_TABLES, **RUN_TABLES}
    stages = {name: _build_stage(name, cls, data.get(name, {}), where) for name, cls in tables.items()}
    return Definition(
        source=source,
        base=base.resolve() if base is not None else None,
        input=folders["input"],
        output=folders["output"],
        **stages,
    )


def load_definition(path: Path) -> Definition:
    """Read and validate a definition file."""
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise DefinitionError(f"{path}: no such definition file") from None
    except (OSError, UnicodeDecodeError) as error:
        raise DefinitionError(f"{path}: cannot read the definition: {error}") from None
    return parse_definition(text, source=str(path), base=path.resolve().parent)
