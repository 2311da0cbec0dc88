"""Pipeline definitions: validation messages name the file, the line and the dotted key.

TOML itself is checked by Python's tomllib (the TOML 1.0 reference parser in the standard library);
these tests pin our layer on top: unknown keys, types, ranges, relative paths.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from corpusprep.definition import STAGE_TABLES, load_definition, parse_definition
from corpusprep.errors import DefinitionError

PIPELINES = sorted((Path(__file__).parent.parent / "pipelines").glob("*.toml"))


def _error(text: str) -> str:
    with pytest.raises(DefinitionError) as caught:
        parse_definition(text, source="demo.toml")
    return str(caught.value)


def test_defaults_are_valid() -> None:
    definition = parse_definition("", source="empty.toml")
    assert set(definition.resolved()) == set(STAGE_TABLES)
    assert definition.input is None and definition.output is None


def test_unknown_key_names_line_and_lists_valid_keys() -> None:
    message = _error('input = "raw"\n\n[split]\nseed = 1\ntrian = 0.8\n')
    assert message.startswith("demo.toml:5: unknown key split.trian")
    assert "train" in message and "validation" in message and "seed" in message


def test_unknown_table_lists_tables() -> None:
    message = _error("[shuffle]\nseed = 1\n")
    assert message.startswith("demo.toml:1: unknown key shuffle")
    assert "read" in message and "pack" in message


def test_wrong_type_names_key_and_value() -> None:
    message = _error('[split]\nseed = "seven"\n')
    assert message == 'demo.toml:2: split.seed = "seven": must be an integer'


def test_booleans_are_not_integers() -> None:
    assert "must be an integer" in _error("[split]\nseed = true\n")


def test_out_of_range_value() -> None:
    message = _error("[split]\ntrain = 1.5\nvalidation = 0.0\ntest = 0.0\n")
    assert message == "demo.toml:2: split.train = 1.5: must be <= 1.0"


def test_choice_lists_allowed_values() -> None:
    message = _error('[exact]\nkey = "fuzzy"\n')
    assert message.startswith('demo.toml:2: exact.key = "fuzzy": must be one of')
    assert "'text'" in message and "'normalized'" in message


def test_cross_field_rule_names_the_table() -> None:
    message = _error("[split]\ntrain = 0.5\n")
    assert message.startswith("demo.toml:1:") and "add up to 1" in message


def test_toml_syntax_error_names_file() -> None:
    assert _error("[split\n").startswith("demo.toml: not valid TOML")


def test_folders_resolve_against_the_definition_file(tmp_path: Path) -> None:
    folder = tmp_path / "pipelines"
    folder.mkdir()
    path = folder / "job.toml"
    path.write_text('input = "../raw"\noutput = "out"\n', encoding="utf-8")
    definition = load_definition(path)
    assert definition.input == (tmp_path / "raw").resolve()
    assert definition.output == (folder / "out").resolve()


def test_digest_ignores_folders_and_follows_settings() -> None:
    a = parse_definition('input = "a"\n[split]\nseed = 1\n', base=Path("/x"))
    b = parse_definition('input = "b"\n[split]\nseed = 1\n', base=Path("/y"))
    c = parse_definition('input = "a"\n[split]\nseed = 2\n', base=Path("/x"))
    assert a.digest() == b.digest() != c.digest()


def test_missing_file_is_a_definition_error(tmp_path: Path) -> None:
    with pytest.raises(DefinitionError, match="no such definition file"):
        load_definition(tmp_path / "absent.toml")


@pytest.mark.parametrize("path", PIPELINES, ids=[p.name for p in PIPELINES])
def test_every_example_pipeline_is_valid(path: Path) -> None:
    load_definition(path)


# The [engine] table says where the run works, never what it writes (see corpusprep.engine).
def test_the_engine_table_is_read_but_stays_out_of_the_digest() -> None:
    plain = parse_definition("[split]\nseed = 3\n", source="plain.toml")
    text = '[split]\nseed = 3\n\n[engine]\nkind = "dask"\nworkers = 3\nscheduler = "tcp://10.0.0.5:8786"\n'
    on_cluster = parse_definition(text, source="cluster.toml")
    assert (on_cluster.engine.kind, on_cluster.engine.workers) == ("dask", 3)
    assert on_cluster.engine.scheduler == "tcp://10.0.0.5:8786"
    assert "engine" not in on_cluster.resolved()
    assert on_cluster.digest() == plain.digest()
    assert plain.engine.kind == "local" and plain.engine.worker_count() >= 1


def test_engine_errors_name_the_line_and_key() -> None:
    assert _error('[engine]\nkind = "spark"\n').startswith(
        'demo.toml:2: engine.kind = "spark": must be one of'
    )
    message = _error('\n[engine]\nscheduler = "tcp://10.0.0.5:8786"\n')
    assert message.startswith("demo.toml:2: engine.scheduler") and "engine.kind = 'dask'" in message
    assert _error("[engine]\nthreads = 2\n").startswith("demo.toml:2: unknown key engine.threads")
