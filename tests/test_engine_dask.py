"""The Dask engine against two outside references: the local engine's bytes, and Dask's documented behaviour.

References named beside the checks:

- the local engine (``run_pipeline(workers=1)``, corpusprep's own reference path): every output
  file (shards, ledger, tokenizer, signatures, manifest) must be byte for byte the same through Dask;
- distributed docs, "Futures" (``Client.submit``, ``Future.result``) and "Resilience": a task whose
  worker dies is recomputed on another worker; after ``distributed.scheduler.allowed-failures``
  (default 3) such deaths it fails with ``distributed.scheduler.KilledWorker``;
- distributed docs, "Coordination Primitives" (``distributed.Event``): used to force results to
  arrive in the reverse of input order, with no sleeping;
- distributed docs, "LocalCluster" (``processes``, ``threads_per_worker``, ``dashboard_address``):
  every cluster here runs on 127.0.0.1 with no dashboard, so no network is used beyond loopback.
"""

from __future__ import annotations

import os
import shutil
import signal
from collections.abc import Callable, Iterable, Iterator
from pathlib import Path
from typing import Any

import pytest

pytest.importorskip(
    "distributed",
    reason="dask.distributed is not installed (pip install 'corpusprep[cluster]'); the engine is optional",
)

import dask
from distributed import Client, Event, LocalCluster, rejoin, secede
from typer.testing import CliRunner

from corpusprep.cli import EXIT_FAILED, EXIT_OK, EXIT_USAGE, app
from corpusprep.definition import load_definition
from corpusprep.engine_dask import ClusterError, dask_engine, dask_mapper
from corpusprep.errors import WorkerDiedError
from corpusprep.pipeline import run_pipeline
from corpusprep.pool import Mapper, local_mapper

ROOT = Path(__file__).parent.parent

DEMO = ROOT / "pipelines" / "demo.toml"
BENCH = ROOT / "bench" / "bench.toml"
#: Package python3.11-doc: the reStructuredText sources of the Python documentation (real text).
PYDOC_SOURCES = Path("/usr/share/doc/python3.11-doc/html/_sources")
SLICE_FILES = 300

pytestmark = pytest.mark.slow


def _tree_bytes(folder: Path) -> dict[str, bytes]:
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


@pytest.fixture(scope="module")
def client() -> Iterator[Client]:
    with (
        LocalCluster(
            n_workers=2,
            threads_per_worker=1,
            processes=True,
            host="127.0.0.1",
            dashboard_address=None,
            scheduler_kwargs={"dashboard_address": "127.0.0.1:0"},  # see engine_dask._SCHEDULER_HTTP
        ) as cluster,
        Client(cluster) as connected,
    ):
        yield connected


@pytest.fixture(scope="module")
def demo_reference(demo_output: Path) -> dict[str, bytes]:
    return _tree_bytes(demo_output)


@pytest.fixture(scope="module")
def pydoc_slice(tmp_path_factory: pytest.TempPathFactory) -> Path:
    files = sorted(PYDOC_SOURCES.rglob("*.txt"))[:SLICE_FILES] if PYDOC_SOURCES.is_dir() else []
    if len(files) < SLICE_FILES:
        pytest.skip(f"{PYDOC_SOURCES}: needs {SLICE_FILES} files (Debian package python3.11-doc)")
    folder = tmp_path_factory.mktemp("pydoc") / "raw"
    for source in files:
        target = folder / source.relative_to(PYDOC_SOURCES)
        target.parent.mkdir(parents=True, exist_ok=True)
        shutil.copyfile(source, target)
    return folder


@pytest.fixture(scope="module")
def pydoc_reference(pydoc_slice: Path, tmp_path_factory: pytest.TempPathFactory) -> dict[str, bytes]:
    output = tmp_path_factory.mktemp("local") / "pydoc"
    run_pipeline(load_definition(BENCH).with_folders(input=pydoc_slice, output=output), workers=1)
    return _tree_bytes(output)


# ---------------------------------------------------------------------------- the mapper alone


def _negate_after_event(item: tuple[int, int, str]) -> int:
    """Item 0 waits until the last item has run; the last item sets the event.

    Item 0 leaves its worker's thread pool while it waits (distributed docs, "Launch Tasks
    from Tasks": ``secede``/``rejoin``), so tasks placed behind it on that worker still run.
    """
    position, last, event_name = item
    event = Event(event_name)
    if position == 0:
        secede()
        assert event.wait(timeout=60), "the last item never ran"
        rejoin()
    elif position == last:
        event.set()
    return -position


def test_results_come_in_input_order_when_they_arrive_reversed(client: Client) -> None:
    # Item 0 cannot finish before item 5 has run (distributed.Event), so on 2 workers it arrives
    # after every other item; yielding by arrival would put -0 last.
    name = f"order-{os.getpid()}"
    items = [(position, 5, name) for position in range(6)]
    mapper = dask_mapper(client, in_flight=6)
    assert list(mapper(_negate_after_event, items)) == [0, -1, -2, -3, -4, -5]


def test_in_flight_tasks_are_bounded(client: Client) -> None:
    drawn = 0

    def items() -> Iterator[int]:
        nonlocal drawn
        for item in range(20):
            drawn += 1
            yield item

    received = 0
    for value in dask_mapper(client, in_flight=3)(abs, items()):
        received += 1
        assert drawn - received <= 3 - 1 or drawn == 20, (drawn, received)
        assert value == received - 1
    assert received == 20


def test_errors_of_the_function_come_back_as_they_are(client: Client) -> None:
    # distributed docs, Future.result: "If the function erred then this re-raises the exception".
    with pytest.raises(ZeroDivisionError):
        list(dask_mapper(client)(lambda item: 1 // item, [2, 1, 0, 3]))


# ---------------------------------------------------------------------------- whole runs


def test_demo_through_dask_is_byte_identical_to_the_local_engine(
    client: Client, archive: Path, demo_reference: dict[str, bytes], tmp_path: Path
) -> None:
    definition = load_definition(DEMO).with_folders(input=archive, output=tmp_path / "demo")
    output = run_pipeline(definition, mapper=dask_mapper(client)).output
    produced = _tree_bytes(output)
    assert {"manifest.json", "ledger.parquet", "tokenizer.json"} <= set(produced)
    assert any(name.startswith("shards/") for name in produced)
    assert produced == demo_reference


def test_real_text_slice_through_dask_is_byte_identical(
    client: Client, pydoc_slice: Path, pydoc_reference: dict[str, bytes], tmp_path: Path
) -> None:
    definition = load_definition(BENCH).with_folders(input=pydoc_slice, output=tmp_path / "pydoc")
    assert _tree_bytes(run_pipeline(definition, mapper=dask_mapper(client, in_flight=1)).output) == (
        pydoc_reference
    )


# ---------------------------------------------------------------------------- dying workers


def _die_once(marker: str, function: Callable[[Any], Any], item: Any) -> Any:
    """The first task to get here ends its worker process abruptly; later ones do the work."""
    try:
        with open(marker, "x", encoding="utf-8") as flag:
            flag.write(str(os.getpid()))
    except FileExistsError:
        return function(item)
    os._exit(1)


def _always_die(function: Callable[[Any], Any], item: Any) -> Any:
    os._exit(1)


def _first_map_wrapped(
    mapper: Mapper, wrap: Callable[[Callable[[Any], Any]], Callable[[Any], Any]]
) -> Mapper:
    """``mapper``, with the first map's function (the pipeline's first pass) wrapped by ``wrap``."""
    calls = 0

    def wrapped(function: Callable[[Any], Any], items: Iterable[Any]) -> Iterator[Any]:
        nonlocal calls
        calls += 1
        return mapper(wrap(function) if calls == 1 else function, items)

    return wrapped


def test_a_worker_dying_inside_a_first_pass_task_is_retried_elsewhere(
    client: Client, archive: Path, demo_reference: dict[str, bytes], tmp_path: Path
) -> None:
    import functools

    marker = tmp_path / "died"
    before = set(client.scheduler_info()["workers"])
    mapper = _first_map_wrapped(dask_mapper(client), lambda f: functools.partial(_die_once, str(marker), f))
    definition = load_definition(DEMO).with_folders(input=archive, output=tmp_path / "demo")
    output = run_pipeline(definition, mapper=mapper).output
    assert marker.exists(), "no worker was killed"
    client.wait_for_workers(2)
    assert set(client.scheduler_info()["workers"]) != before, "the killed worker was not replaced"
    assert _tree_bytes(output) == demo_reference


def test_a_worker_killed_from_outside_mid_map_changes_nothing(
    client: Client,
    pydoc_slice: Path,
    pydoc_reference: dict[str, bytes],
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # SIGKILL (as the out-of-memory killer does) to the worker process that is processing the first
    # batch, while the map draws its next batch (distributed docs, Client.run and Client.processing).
    # First-pass tasks of about 256 KiB of input, so the slice makes several.
    import time

    import corpusprep.pipeline as pipeline_module

    monkeypatch.setattr(pipeline_module, "_PART_BYTES", 256 << 10)

    killed: list[str] = []
    inner = dask_mapper(client)
    calls = 0

    def mapper(function: Callable[[Any], Any], items: Iterable[Any]) -> Iterator[Any]:
        nonlocal calls
        calls += 1
        if calls > 1:
            return inner(function, items)

        def killing(source: Iterable[Any]) -> Iterator[Any]:
            for index, item in enumerate(source):
                if index == 1:
                    deadline = time.monotonic() + 60
                    busy: list[str] = []
                    while not busy and time.monotonic() < deadline:
                        busy = [worker for worker, keys in client.processing().items() if keys]
                    assert busy, "no task was ever processing"
                    pid = client.run(os.getpid, workers=busy[:1])[busy[0]]
                    os.kill(pid, signal.SIGKILL)
                    killed.append(busy[0])
                yield item

        return inner(function, killing(items))

    definition = load_definition(BENCH).with_folders(input=pydoc_slice, output=tmp_path / "pydoc")
    output = run_pipeline(definition, mapper=mapper).output
    assert killed
    client.wait_for_workers(2)
    assert killed[0] not in client.scheduler_info()["workers"]
    assert _tree_bytes(output) == pydoc_reference


def test_a_task_that_keeps_killing_workers_fails_the_run_and_publishes_nothing(
    archive: Path, tmp_path: Path
) -> None:
    # allowed-failures = 1: the second death of a worker under the same task gives KilledWorker.
    output = tmp_path / "demo"
    definition = load_definition(DEMO).with_folders(input=archive, output=output)
    with (
        dask.config.set({"distributed.scheduler.allowed-failures": 1}),
        dask_engine(None, 2) as engine,
    ):
        import functools

        mapper = _first_map_wrapped(engine, lambda f: functools.partial(_always_die, f))
        with pytest.raises(WorkerDiedError, match=r"batch 1 .*allowed-failures.*nothing was published"):
            run_pipeline(definition, mapper=mapper)
    assert not output.exists()
    assert not [p.name for p in tmp_path.iterdir() if p.name.startswith(".")], "a partial folder is left"


def _named_map_wrapped(
    mapper: Mapper, name: str, wrap: Callable[[Callable[[Any], Any]], Callable[[Any], Any]]
) -> Mapper:
    """``mapper``, with the function of every map whose function is called ``name`` wrapped by ``wrap``."""

    def wrapped(function: Callable[[Any], Any], items: Iterable[Any]) -> Iterator[Any]:
        return mapper(wrap(function) if getattr(function, "__name__", "") == name else function, items)

    return wrapped


@pytest.mark.parametrize("task", ["_band_task", "_exact_task"])
def test_a_worker_dying_inside_a_near_duplicate_task_is_retried_elsewhere(
    client: Client, archive: Path, demo_reference: dict[str, bytes], tmp_path: Path, task: str
) -> None:
    # The near-duplicate step's LSH band tasks and exact-Jaccard tasks run on the workers
    # (corpusprep.barriers); a worker dying under one is replaced and the task recomputed.
    import functools

    marker = tmp_path / "died"
    mapper = _named_map_wrapped(
        dask_mapper(client), task, lambda f: functools.partial(_die_once, str(marker), f)
    )
    definition = load_definition(DEMO).with_folders(input=archive, output=tmp_path / "demo")
    output = run_pipeline(definition, mapper=mapper).output
    assert marker.exists(), f"no worker died inside {task}"
    client.wait_for_workers(2)
    assert _tree_bytes(output) == demo_reference


def test_global_steps_cut_into_many_tasks_give_the_local_bytes(
    client: Client, archive: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Small task sizes, so every global step becomes many tasks spread over both workers.
    import corpusprep.pipeline as pipeline_module
    from corpusprep import barriers
    from corpusprep.definition import parse_definition

    monkeypatch.setattr(pipeline_module, "_PART_BYTES", 4096)  # a few files per first-pass task
    monkeypatch.setattr(pipeline_module, "_DRIVER_READ_BYTES", 4096)  # larger files: read by the driver
    for name, value in [
        ("EXACT_PARTITION_ROWS", 16),
        ("BAND_TASKS", 5),
        ("PAIRS_PER_TASK", 16),
        ("EXACT_PAIRS_PER_TASK", 4),
    ]:
        monkeypatch.setattr(barriers, name, value)
    text = DEMO.read_text(encoding="utf-8").replace("windows_per_shard = 256", "windows_per_shard = 8")
    definition = parse_definition(text, source=str(DEMO), base=DEMO.parent)
    local = run_pipeline(definition.with_folders(input=archive, output=tmp_path / "local"), workers=1)
    counted: dict[str, int] = {}
    inner = dask_mapper(client)

    def counting(function: Callable[[Any], Any], items: Iterable[Any]) -> Iterator[Any]:
        name = getattr(getattr(function, "func", function), "__name__", "?")

        def counted_items() -> Iterator[Any]:
            for item in items:
                counted[name] = counted.get(name, 0) + 1
                if name == "stage_inputs":
                    kind = (
                        "stage_inputs: driver-read batch" if item.batch is not None else "stage_inputs: files"
                    )
                    counted[kind] = counted.get(kind, 0) + 1
                yield item

        return inner(function, counted_items())

    remote = run_pipeline(definition.with_folders(input=archive, output=tmp_path / "dask"), mapper=counting)
    for name in (
        "stage_inputs: files",
        "stage_inputs: driver-read batch",
        "_exact_partition",
        "_band_task",
        "_estimate_task",
        "_exact_task",
        "encode_staged",
        "_pack_shard",
    ):
        assert counted.get(name, 0) > 1, f"{name}: {counted.get(name, 0)} tasks"
    assert _tree_bytes(remote.output) == _tree_bytes(local.output)


# ---------------------------------------------------------------------------- command line

runner = CliRunner()


def test_cli_dask_engine_with_a_scheduler_address(
    client: Client, archive: Path, demo_reference: dict[str, bytes], tmp_path: Path
) -> None:
    address = client.scheduler.address
    assert address.startswith("tcp://127.0.0.1:")
    arguments = ["run", str(DEMO), "--input", str(archive), "--output", str(tmp_path / "out"), "--quiet"]
    result = runner.invoke(app, [*arguments, "--engine", "dask", "--scheduler", address])
    assert result.exit_code == EXIT_OK, result.output
    assert _tree_bytes(tmp_path / "out") == demo_reference
    # the cluster belongs to whoever started it: still there after the run
    assert len(client.scheduler_info()["workers"]) == 2


def test_cli_dask_engine_starts_and_stops_a_local_cluster(
    archive: Path, demo_reference: dict[str, bytes], tmp_path: Path
) -> None:
    arguments = ["run", str(DEMO), "--input", str(archive), "--output", str(tmp_path / "out"), "--quiet"]
    result = runner.invoke(app, [*arguments, "--engine", "dask", "--workers", "2"])
    assert result.exit_code == EXIT_OK, result.output
    assert _tree_bytes(tmp_path / "out") == demo_reference


def test_cli_takes_the_engine_from_the_definition(
    archive: Path, demo_reference: dict[str, bytes], tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    from corpusprep import engine_dask

    started: list[tuple[str | None, int]] = []
    real = engine_dask.dask_engine

    def recording(scheduler: str | None, workers: int) -> Any:
        started.append((scheduler, workers))
        return real(scheduler, workers)

    monkeypatch.setattr(engine_dask, "dask_engine", recording)
    definition = tmp_path / "cluster.toml"
    definition.write_text(
        DEMO.read_text(encoding="utf-8") + '\n[engine]\nkind = "dask"\nworkers = 2\n', encoding="utf-8"
    )
    arguments = [
        "run",
        str(definition),
        "--input",
        str(archive),
        "--output",
        str(tmp_path / "out"),
        "--quiet",
    ]
    result = runner.invoke(app, arguments)
    assert result.exit_code == EXIT_OK, result.output
    assert started == [(None, 2)]
    assert _tree_bytes(tmp_path / "out") == demo_reference
    local = runner.invoke(
        app, ["run", str(definition), "--input", str(archive), "--output", str(tmp_path / "local"), "--quiet",
              "--engine", "local"],
    )  # fmt: skip
    assert local.exit_code == EXIT_OK, local.output
    assert started == [(None, 2)], "--engine local overrides the definition"


@pytest.mark.parametrize("resume_on", ["dask", "local"])
def test_a_dask_run_interrupted_while_packing_resumes_from_its_checkpoint(
    client: Client, archive: Path, demo_reference: dict[str, bytes], tmp_path: Path, resume_on: str
) -> None:
    # An interrupt keeps the partial folder and its checkpoints (corpusprep.pipeline); the next run
    # through Dask resumes after the last checkpoint: no first-pass task runs again.
    inner = dask_mapper(client)
    mapped: list[str] = []

    def interrupting(function: Callable[[Any], Any], items: Iterable[Any]) -> Iterator[Any]:
        name = getattr(getattr(function, "func", function), "__name__", "?")
        if name == "_pack_shard":
            raise KeyboardInterrupt
        return inner(function, items)

    resume_mapper = inner if resume_on == "dask" else local_mapper(1)

    def recording(function: Callable[[Any], Any], items: Iterable[Any]) -> Iterator[Any]:
        mapped.append(getattr(getattr(function, "func", function), "__name__", "?"))
        return resume_mapper(function, items)

    definition = load_definition(DEMO).with_folders(input=archive, output=tmp_path / "demo")
    with pytest.raises(KeyboardInterrupt):
        run_pipeline(definition, mapper=interrupting)
    assert (tmp_path / ".demo.partial").is_dir()
    output = run_pipeline(definition, mapper=recording).output
    assert "stage_inputs" not in mapped and "encode_staged" not in mapped
    assert "_pack_shard" in mapped
    assert _tree_bytes(output) == demo_reference


def test_cli_scheduler_needs_the_dask_engine(tmp_path: Path) -> None:
    result = runner.invoke(app, ["run", str(DEMO), "--scheduler", "tcp://127.0.0.1:8786", "--quiet"])
    assert result.exit_code == EXIT_USAGE
    assert "--scheduler" in result.stderr and "--engine dask" in result.stderr


def test_cli_unreachable_scheduler_is_a_clear_failure(archive: Path, tmp_path: Path) -> None:
    # Port 1 on loopback: nothing listens there; the connect timeout is Dask's own setting.
    arguments = ["run", str(DEMO), "--input", str(archive), "--output", str(tmp_path / "out"), "--quiet"]
    with dask.config.set({"distributed.comm.timeouts.connect": "2s"}):
        result = runner.invoke(app, [*arguments, "--engine", "dask", "--scheduler", "tcp://127.0.0.1:1"])
    assert result.exit_code == EXIT_FAILED
    assert "tcp://127.0.0.1:1: cannot connect" in result.stderr
    assert "Traceback" not in result.stderr
    assert not (tmp_path / "out").exists()


def test_engine_refuses_a_missing_scheduler_before_any_work(tmp_path: Path) -> None:
    with (
        dask.config.set({"distributed.comm.timeouts.connect": "2s"}),
        pytest.raises(ClusterError, match="cannot connect"),
        dask_engine("tcp://127.0.0.1:1", 1),
    ):
        pass
