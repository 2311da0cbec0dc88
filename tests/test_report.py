"""The HTML report, checked against outside references.

* Numbers: every value the page marks with ``data-from``/``data-key`` is read back with
  Python's ``html.parser`` and compared with ``manifest.json`` as read by ``json``, the ledger
  as read by ``pyarrow.parquet`` (counted here with ``collections.Counter``), and the shards as
  read by ``numpy.load`` (token ids counted here with ``np.bincount``; special ids from
  ``tokenizer.json`` through HF ``tokenizers``).
* Rejected records: ``fixtures/ferry_planted.json``, the archive generator's own list of the
  defects it planted (file, line, reason).
* Cluster excerpts: the raw input files of the generated archive.
* Rendering: a real headless Chromium (Debian package ``chromium``) driven through
  ``chromedriver`` (package ``chromium-driver``) over the W3C WebDriver HTTP protocol with
  ``urllib``: console messages from the browser log, network requests from Chromium's
  performance log (DevTools ``Network.requestWillBeSent`` events), figure sizes from
  ``getBoundingClientRect``, and a screenshot. A planted page proves the same harness does
  catch a request and a console error.
"""

from __future__ import annotations

import base64
import html.parser
import json
import shutil
import socket
import subprocess
import sys
import time
import unicodedata
import urllib.error
import urllib.request
from collections import Counter
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow.parquet as pq
import pytest
from typer.testing import CliRunner

from corpusprep.audit import AuditConfig, audit_output
from corpusprep.cli import EXIT_USAGE, app
from corpusprep.definition import load_definition
from corpusprep.manifest import dump_json
from corpusprep.pipeline import run_pipeline
from corpusprep.report import build_report, default_report_path, token_frequencies, write_report

ROOT = Path(__file__).parent.parent
sys.path.insert(0, str(ROOT / "fixtures"))
import make_ferry_archive  # noqa: E402

CHROMIUM = Path("/usr/bin/chromium")
CHROMEDRIVER = Path("/usr/bin/chromedriver")
FIGURES = (
    "fig-fates",
    "fig-splits",
    "fig-lengths",
    "fig-clusters",
    "fig-ranks",
)  # + "fig-audit" with findings
NETWORK_SCHEMES = ("http:", "https:", "ws:", "wss:", "ftp:")


@dataclass(frozen=True)
class Demo:
    archive: Path
    output: Path
    report: Path  # with the audit result beside the output
    plain: str  # the page made before any audit result existed
    audit: dict[str, Any]


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> Demo:
    archive = tmp_path_factory.mktemp("ferry") / "ferry"
    make_ferry_archive.build(archive)
    output = tmp_path_factory.mktemp("runs") / "demo"
    run_pipeline(load_definition(ROOT / "pipelines" / "demo.toml").with_folders(input=archive, output=output))
    plain = build_report(output)
    audit = audit_output(output, AuditConfig(skip_ngrams=True)).to_json()
    output.with_name(output.name + ".audit.json").write_text(dump_json(audit), encoding="utf-8")
    return Demo(archive=archive, output=output, report=write_report(output), plain=plain, audit=audit)


# --------------------------------------------------------------------------- reading the page back
@dataclass
class Marked:
    source: str
    key: str
    kind: str
    text: str


@dataclass
class _Page(html.parser.HTMLParser):
    """Marked values, table rows by table id, and every attribute, from an HTML text."""

    marked: list[Marked] = field(default_factory=list)
    tables: dict[str, list[list[str]]] = field(default_factory=dict)
    attributes: list[tuple[str, str, str]] = field(default_factory=list)
    tags: Counter[str] = field(default_factory=Counter)
    _open: list[tuple[dict[str, str], list[str]]] = field(default_factory=list)
    _table: list[str] = field(default_factory=list)
    _cell: list[str] | None = None

    def __post_init__(self) -> None:
        super().__init__(convert_charrefs=True)

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        values = {name: value or "" for name, value in attrs}
        self.tags[tag] += 1
        self.attributes += [(tag, name, value) for name, value in values.items()]
        if tag == "table":
            self._table.append(values.get("id", ""))
            self.tables.setdefault(values.get("id", ""), [])
        elif tag == "tr" and self._table:
            self.tables[self._table[-1]].append([])
        elif tag == "td" and self._table:
            self._cell = []
        if tag == "span" and "data-from" in values:
            self._open.append((values, []))

    def handle_endtag(self, tag: str) -> None:
        if tag == "span" and self._open:
            values, text = self._open.pop()
            self.marked.append(
                Marked(values["data-from"], values["data-key"], values["data-type"], "".join(text))
            )
        elif tag == "td" and self._cell is not None:
            self.tables[self._table[-1]][-1].append("".join(self._cell).strip())
            self._cell = None
        elif tag == "table" and self._table:
            self._table.pop()

    def handle_data(self, data: str) -> None:
        for _values, text in self._open:
            text.append(data)
        if self._cell is not None:
            self._cell.append(data)


def parse(text: str) -> _Page:
    page = _Page()
    page.feed(text)
    page.close()
    return page


# --------------------------------------------------------------------------- independent references
class References:
    """Values computed here from the files, without corpusprep code."""

    def __init__(self, output: Path) -> None:
        from tokenizers import Tokenizer

        self.manifest = json.loads((output / "manifest.json").read_text(encoding="utf-8"))
        self.rows = pq.read_table(output / "ledger.parquet").to_pylist()
        self.by_id = {row["record_id"]: row for row in self.rows}
        tokenizer = Tokenizer.from_file(str(output / "tokenizer.json"))
        specials = [tokenizer.token_to_id(t) for t in ("<eod>", "<pad>", "<bod>", "<unk>")]
        self.specials = {token for token in specials if token is not None}
        self.output = output
        self._counts: dict[str, np.ndarray] = {}

    def manifest_value(self, key: str) -> Any:
        value: Any = self.manifest
        parts = key.split(".")
        for index, part in enumerate(parts):
            if part == "length" and index == len(parts) - 1 and isinstance(value, list):
                return len(value)
            value = value[int(part)] if isinstance(value, list) else value[part]
        return value

    def token_counts(self, split: str) -> np.ndarray:
        if split not in self._counts:
            length = self.manifest["windows"]["length"]
            windows = [
                np.load(self.output / shard["file"], allow_pickle=False)
                for shard in self.manifest["splits"][split]["shards"]
            ]
            stacked = np.concatenate(windows)
            stream = np.concatenate([stacked[:, :length].ravel(), stacked[-1:, length]])
            counts = np.bincount(stream.astype(np.int64))
            counts[[t for t in self.specials if t < len(counts)]] = 0
            self._counts[split] = counts
        return self._counts[split]

    def ledger_value(self, key: str) -> Any:
        rows = self.rows
        kind, _, rest = key.partition(":")
        if kind == "rows":
            return len(rows)
        if kind == "status":
            return sum(row["status"] == rest for row in rows)
        if kind == "reason":
            return sum(row["status"] == "rejected" and row["reason"].split(":")[0] == rest for row in rows)
        if kind == "clusters":
            return len({row["cluster"] for row in rows if row["cluster"] is not None})
        if kind == "cluster-size":
            return sum(row["cluster"] == rest for row in rows)
        if kind == "similarities":
            return sum(row["similarity"] is not None for row in rows)
        tokens = [row["tokens"] for row in rows if row["status"] == "kept" and row["split"] == rest]
        if kind == "split-documents":
            return len(tokens)
        if kind == "split-tokens":
            return sum(tokens)
        if kind == "tokens-min":
            return min(tokens)
        if kind == "tokens-max":
            return max(tokens)
        if kind == "tokens-median":
            return float(np.median(tokens))
        if kind == "row":
            record, _, column = rest.rpartition(":")
            return self.by_id[record][column]
        raise AssertionError(f"the page uses a ledger key this test does not know: {key}")

    def shard_value(self, key: str) -> Any:
        kind, _, split = key.partition(":")
        counts = self.token_counts(split)
        if kind == "text-tokens":
            return int(counts.sum())
        if kind == "distinct-ids":
            return int(np.count_nonzero(counts))
        raise AssertionError(f"the page uses a shard key this test does not know: {key}")

    def value(self, item: Marked) -> Any:
        if item.source == "manifest":
            return self.manifest_value(item.key)
        if item.source == "ledger":
            return self.ledger_value(item.key)
        if item.source == "shards":
            return self.shard_value(item.key)
        raise AssertionError(f"unknown data-from {item.source!r}")


def shown_equals(item: Marked, expected: Any) -> bool:
    if item.kind == "count":
        return int(item.text.replace(",", "")) == expected
    if item.kind == "int":
        return int(item.text) == expected
    if item.kind == "fixed":
        decimals = len(item.text.partition(".")[2])
        return float(item.text) == round(float(expected), decimals)
    if item.kind == "json":
        return bool(json.loads(item.text) == expected)
    if item.kind == "text":
        # a fraction the manifest holds as a float is printed with 4 decimals
        if isinstance(expected, float):
            return float(item.text) == round(expected, 4)
        return item.text == str(expected)
    raise AssertionError(f"unknown data-type {item.kind!r}")


# --------------------------------------------------------------------------- numbers
def test_every_marked_number_equals_manifest_ledger_and_shards(demo: Demo) -> None:
    """Source: manifest.json via json, ledger.parquet via pyarrow, shards via numpy.load + np.bincount."""
    page = parse(demo.report.read_text(encoding="utf-8"))
    references = References(demo.output)
    wrong = [
        (item.source, item.key, item.text, references.value(item))
        for item in page.marked
        if not shown_equals(item, references.value(item))
    ]
    assert wrong == []
    keys = {(item.source, item.key) for item in page.marked}
    splits = ("train", "validation", "test")
    required = {("manifest", f"ledger.by_status.{s}") for s in references.manifest["ledger"]["by_status"]}
    required |= {("ledger", f"status:{s}") for s in ("kept", "exact_copy", "near_copy", "empty", "rejected")}
    required |= {("manifest", f"splits.{s}.{k}") for s in splits for k in ("documents", "tokens", "windows")}
    required |= {("ledger", f"split-tokens:{s}") for s in splits} | {
        ("shards", f"text-tokens:{s}") for s in splits
    }
    required |= {
        ("manifest", f"inputs.files.{i}.xxh3_128") for i in range(references.manifest["inputs"]["count"])
    }
    required |= {
        ("ledger", "clusters"),
        ("manifest", "definition_hash"),
        ("manifest", "definition.near.threshold"),
    }
    assert required <= keys, sorted(required - keys)
    assert len(page.marked) > 1000


def test_the_number_check_catches_an_altered_value(demo: Demo) -> None:
    """Source: the demo page with one marked count changed by hand; the comparison must flag exactly it."""
    text = demo.report.read_text(encoding="utf-8")
    marker = 'data-key="splits.train.tokens" data-type="count">'
    start = text.index(marker) + len(marker)
    end = text.index("<", start)
    altered = text[:start] + f"{int(text[start:end].replace(',', '')) + 1:,}" + text[end:]
    references = References(demo.output)
    wrong = [item.key for item in parse(altered).marked if not shown_equals(item, references.value(item))]
    assert wrong == ["splits.train.tokens"]


VARIANT = """
[read]
id_field = "id"
group_field = "thread"
fallback_encoding = "cp1252"
max_rejected_fraction = 0.05
[near]
enabled = false
[tokenizer]
kind = "bytes"
[pack]
length = 64
tail = "drop"
windows_per_shard = 100
"""


@pytest.fixture(scope="module")
def variant(demo: Demo, tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The demo archive through VARIANT: several shards per split, a dropped tail."""
    folder = tmp_path_factory.mktemp("variant")
    definition = folder / "variant.toml"
    definition.write_text(VARIANT, encoding="utf-8")
    output = folder / "variant"
    run_pipeline(load_definition(definition).with_folders(input=demo.archive, output=output))
    return output


def test_numbers_hold_without_near_step_with_bytes_and_a_dropped_tail(variant: Path) -> None:
    """Source: as above (json, pyarrow, numpy) for another definition: no clusters, bytes, tail dropped."""
    output = variant
    text = build_report(output)
    page = parse(text)
    references = References(output)
    assert [item.key for item in page.marked if not shown_equals(item, references.value(item))] == []
    assert "The near-duplicate step was off" in text and "fig-clusters" not in text
    assert page.tags["svg"] == len(FIGURES) - 1
    dropped = sum(split["dropped_tokens"] for split in references.manifest["splits"].values())
    assert dropped > 0
    shard_tokens = sum(references.shard_value(f"text-tokens:{s}") for s in ("train", "validation", "test"))
    ledger_tokens = sum(references.ledger_value(f"split-tokens:{s}") for s in ("train", "validation", "test"))
    assert ledger_tokens - dropped <= shard_tokens < ledger_tokens


@pytest.mark.parametrize("chunk_rows", [1, 7, 1024])
def test_token_counts_per_id_equal_numpy_over_the_rebuilt_stream(variant: Path, chunk_rows: int) -> None:
    """Source: numpy.load + np.bincount of the stream rebuilt as the manifest states it (window[:-1] of
    every window, then the last window's last token), per token id; blocks of 1 and 7 windows put block
    edges everywhere, and the variant has several shards per split, so shard edges are crossed too."""
    references = References(variant)
    vocab = int(references.manifest["tokenizer"]["vocab_size"])
    for split, info in references.manifest["splits"].items():
        assert len(info["shards"]) > 1
        expected = np.zeros(vocab, dtype=np.int64)
        counted = references.token_counts(split)
        expected[: len(counted)] = counted
        assert np.array_equal(token_frequencies(variant, split, chunk_rows=chunk_rows), expected), split


def test_shard_token_counts_agree_with_the_ledger(demo: Demo) -> None:
    """Source: numpy.load of the shards against the ledger's tokens column (pyarrow); tail pad drops none."""
    references = References(demo.output)
    for split in ("train", "validation", "test"):
        assert references.shard_value(f"text-tokens:{split}") == references.ledger_value(
            f"split-tokens:{split}"
        )


# --------------------------------------------------------------------------- tables
def test_rejected_records_show_file_line_and_reason(demo: Demo) -> None:
    """Source: fixtures/ferry_planted.json, the generator's list of planted rejections."""
    planted = json.loads((ROOT / "fixtures" / "ferry_planted.json").read_text(encoding="utf-8"))["planted"]
    rejections = [item for item in planted if item["kind"] == "rejected"]
    rows = parse(demo.report.read_text(encoding="utf-8")).tables["rejected"]
    shown = {(row[0], None if row[1] == "—" else int(row[1]), row[2].split(":")[0]) for row in rows if row}
    assert len(rejections) == 8
    for item in rejections:
        assert (item["source"], item["line"], item["reason"]) in shown


def test_cluster_excerpts_are_the_representatives_input_text(demo: Demo) -> None:
    """Source: the raw input file of each representative in the generated archive."""
    planted = json.loads((ROOT / "fixtures" / "ferry_planted.json").read_text(encoding="utf-8"))["planted"]
    altered = {item["source"] for item in planted if item["kind"] in ("fix", "encoding")}
    page = demo.report.read_text(encoding="utf-8")
    rows = [row for row in parse(page).tables["clusters"] if row]  # the header row has no td
    assert len(rows) == 10
    compared = 0
    for row in rows:
        source, excerpt = row[1], row[5]
        assert excerpt.endswith("decoded text hashes to the ledger's text_hash")
        text = (
            excerpt.removesuffix("decoded text hashes to the ledger's text_hash").rstrip().removesuffix("…")
        )
        if source in altered or not source.endswith(".txt"):
            continue
        raw = unicodedata.normalize("NFC", (demo.archive / source).read_text(encoding="utf-8"))
        assert raw.replace("\r\n", "\n").startswith(text), source
        compared += 1
    assert compared >= 5


def test_audit_result_is_shown(demo: Demo) -> None:
    """Source: the audit's own JSON result (json), saved beside the output."""
    page = demo.report.read_text(encoding="utf-8")
    assert f'data-audit="outcome">{demo.audit["outcome"]}</strong>' in page
    checks = parse(page).tables["audit-checks"]
    assert [(row[0], row[1]) for row in checks if row] == [
        (c["name"], c["status"]) for c in demo.audit["checks"]
    ]
    assert "No audit result was found" in demo.plain and "fig-audit" not in demo.plain


@dataclass(frozen=True)
class Damaged:
    page: Path
    audit: dict[str, Any]


@pytest.fixture(scope="module")
def damaged(demo: Demo, tmp_path_factory: pytest.TempPathFactory) -> Damaged:
    """A copy whose manifest lists a wrong shard hash, its audit result (--audit FILE) and its page."""
    folder = tmp_path_factory.mktemp("damaged")
    copy = folder / "damaged"
    shutil.copytree(demo.output, copy)
    manifest = json.loads((copy / "manifest.json").read_text(encoding="utf-8"))
    manifest["splits"]["test"]["shards"][0]["xxh3_128"] = "0" * 32
    (copy / "manifest.json").write_text(json.dumps(manifest, indent=2), encoding="utf-8")
    result = audit_output(copy, AuditConfig(skip_ngrams=True)).to_json()
    saved = folder / "result.json"
    saved.write_text(json.dumps(result), encoding="utf-8")
    return Damaged(page=write_report(copy, folder / "page.html", config=_config(audit=saved)), audit=result)


def test_damage_found_by_the_audit_appears_with_its_counts(damaged: Damaged) -> None:
    """Source: the audit's JSON result (json) for a copy whose manifest lists a wrong shard hash."""
    assert damaged.audit["outcome"] == "damaged" and damaged.audit["findings"]
    page = damaged.page.read_text(encoding="utf-8")
    assert 'data-audit="outcome">damaged</strong>' in page
    assert 'aria-label="fig-audit"' in page
    for kind, item in damaged.audit["findings"].items():
        assert f'data-audit="findings.{kind}.count">{item["count"]:,}</span>' in page


def _config(**changes: Any) -> Any:
    from corpusprep.report import ReportConfig

    return ReportConfig(**changes)


# --------------------------------------------------------------------------- files and determinism
def test_page_is_self_contained_and_small(demo: Demo) -> None:
    """Source: the page's own attributes via html.parser."""
    text = demo.report.read_text(encoding="utf-8")
    page = parse(text)
    assert page.tags["script"] == 0 and page.tags["img"] == 0 and page.tags["link"] == 0
    for tag, name, value in page.attributes:
        if name in ("src", "href", "xlink:href"):
            assert value.startswith("#"), (tag, name, value)
    namespaces = {"http://www.w3.org/2000/svg", "http://www.w3.org/1999/xlink"}
    linked = {
        value
        for _tag, name, value in page.attributes
        if "http" in value and name not in ("xmlns", "xmlns:xlink")
    }
    assert linked == set()
    assert {value for _tag, name, value in page.attributes if name.startswith("xmlns")} <= namespaces
    assert page.tags["svg"] == len(FIGURES)
    ids = [value for _tag, name, value in page.attributes if name == "id"]
    assert len(ids) == len(set(ids))
    assert len(text.encode("utf-8")) < 3_000_000


def test_same_folder_gives_byte_identical_pages(demo: Demo, tmp_path: Path) -> None:
    """Source: two builds of the demo output and one of a byte copy of it elsewhere."""
    first = demo.report.read_bytes()
    assert write_report(demo.output, tmp_path / "again.html").read_bytes() == first
    elsewhere = tmp_path / "moved" / demo.output.name
    shutil.copytree(demo.output, elsewhere)
    shutil.copy(
        demo.output.with_name(demo.output.name + ".audit.json"),
        elsewhere.with_name(elsewhere.name + ".audit.json"),
    )
    copied = elsewhere.with_name(elsewhere.name + ".audit.json")
    shutil.copystat(demo.output.with_name(demo.output.name + ".audit.json"), copied)
    assert write_report(elsewhere, tmp_path / "moved.html").read_bytes() == first


def _listing(folder: Path) -> dict[str, bytes]:
    return {
        str(path.relative_to(folder)): path.read_bytes()
        for path in sorted(folder.rglob("*"))
        if path.is_file()
    }


def test_cli_writes_beside_the_output_and_leaves_it_unchanged(demo: Demo, tmp_path: Path) -> None:
    """Source: the folder's bytes before and after, and the audit (skip n-grams) of the result."""
    copy = tmp_path / "out"
    shutil.copytree(demo.output, copy)
    before = _listing(copy)
    result = CliRunner().invoke(app, ["report", str(copy)])
    assert result.exit_code == 0, result.output
    assert default_report_path(copy) == tmp_path / "out.report.html"
    assert (tmp_path / "out.report.html").stat().st_size > 0
    assert _listing(copy) == before
    inside = CliRunner().invoke(app, ["report", str(copy), "--to", str(copy / "report.html")])
    assert inside.exit_code == 0, inside.output
    assert audit_output(copy, AuditConfig(skip_ngrams=True)).outcome == "clean"


def test_cli_refuses_a_listed_file_and_a_folder_without_manifest(demo: Demo, tmp_path: Path) -> None:
    """Source: the manifest's bytes before and after; exit codes documented in corpusprep/cli.py."""
    copy = tmp_path / "out"
    shutil.copytree(demo.output, copy)
    before = (copy / "manifest.json").read_bytes()
    result = CliRunner().invoke(app, ["report", str(copy), "--to", str(copy / "manifest.json")])
    assert result.exit_code == EXIT_USAGE
    assert (copy / "manifest.json").read_bytes() == before
    empty = tmp_path / "empty"
    empty.mkdir()
    assert CliRunner().invoke(app, ["report", str(empty)]).exit_code == EXIT_USAGE


# --------------------------------------------------------------------------- a real browser
needs_chromium = pytest.mark.skipif(
    not (CHROMIUM.is_file() and CHROMEDRIVER.is_file()),
    reason="needs /usr/bin/chromium and /usr/bin/chromedriver (Debian packages chromium and chromium-driver)",
)


@dataclass(frozen=True)
class Visit:
    console: list[dict[str, Any]]
    requests: list[str]
    figures: dict[str, tuple[float, float]]
    screenshot: bytes


class WebDriver:
    """A minimal W3C WebDriver client for chromedriver, over HTTP with urllib."""

    def __init__(self, base: str, session: str) -> None:
        self.base, self.session = base, session

    def call(self, method: str, path: str, body: Any = None) -> Any:
        data = None if body is None else json.dumps(body).encode("utf-8")
        request = urllib.request.Request(
            f"{self.base}/session/{self.session}{path}", data=data, method=method,
            headers={"Content-Type": "application/json"},
        )  # fmt: skip
        with urllib.request.urlopen(request, timeout=60) as response:
            return json.loads(response.read())["value"]


def _free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        port: int = probe.getsockname()[1]
        return port


@pytest.fixture(scope="module")
def browser(tmp_path_factory: pytest.TempPathFactory) -> Iterator[WebDriver]:
    port = _free_port()
    driver = subprocess.Popen(
        [str(CHROMEDRIVER), f"--port={port}"], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL
    )
    base = f"http://127.0.0.1:{port}"
    try:
        for _attempt in range(100):
            try:
                with urllib.request.urlopen(f"{base}/status", timeout=2) as response:
                    if json.loads(response.read())["value"]["ready"]:
                        break
            except (urllib.error.URLError, ConnectionError):
                time.sleep(0.1)
        profile = tmp_path_factory.mktemp("chromium-profile")
        arguments = [
            "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
            "--disable-background-networking", "--disable-component-update", "--disable-sync",
            "--disable-default-apps", "--window-size=1280,1600", f"--user-data-dir={profile}",
        ]  # fmt: skip
        capabilities = {
            "browserName": "chrome",
            "goog:chromeOptions": {"binary": str(CHROMIUM), "args": arguments},
            "goog:loggingPrefs": {"browser": "ALL", "performance": "ALL"},
        }
        body = json.dumps({"capabilities": {"alwaysMatch": capabilities}}).encode("utf-8")
        request = urllib.request.Request(
            f"{base}/session", data=body, method="POST", headers={"Content-Type": "application/json"}
        )
        with urllib.request.urlopen(request, timeout=120) as response:
            session = json.loads(response.read())["value"]["sessionId"]
        client = WebDriver(base, session)
        yield client
        client.call("DELETE", "")
    finally:
        driver.terminate()
        driver.wait(timeout=30)


def visit(browser: WebDriver, page: Path) -> Visit:
    browser.call("POST", "/se/log", {"type": "performance"})  # drop entries of earlier visits
    browser.call("POST", "/se/log", {"type": "browser"})
    url = page.resolve().as_uri()
    browser.call("POST", "/url", {"url": url})
    script = (
        "return Array.from(document.querySelectorAll('figure svg')).map(s => {"
        " const r = s.getBoundingClientRect();"
        " return [s.id || s.getAttribute('aria-label'), r.width, r.height]; });"
    )
    figures = {
        name: (width, height)
        for name, width, height in browser.call("POST", "/execute/sync", {"script": script, "args": []})
    }
    time.sleep(0.5)  # let late console messages and requests reach the logs
    console = browser.call("POST", "/se/log", {"type": "browser"})
    requests = []  # anything the page asked for, and any network request at all (Chromium's own pages aside)
    for entry in browser.call("POST", "/se/log", {"type": "performance"}):
        message = json.loads(entry["message"])["message"]
        if message["method"] == "Network.requestWillBeSent":
            params = message["params"]
            requested = params["request"]["url"]
            from_page = params.get("documentURL") == url and requested != url
            if from_page or requested.startswith(NETWORK_SCHEMES):
                requests.append(requested)
    screenshot = base64.b64decode(browser.call("GET", "/screenshot"))
    return Visit(console=console, requests=requests, figures=figures, screenshot=screenshot)


def _png_size(data: bytes) -> tuple[int, int]:
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and data[12:16] == b"IHDR"  # PNG spec (RFC 2083) §3.1, §4.1.1
    return int.from_bytes(data[16:20], "big"), int.from_bytes(data[20:24], "big")


@needs_chromium
@pytest.mark.parametrize("which", ["demo", "damaged"])
def test_page_opens_in_chromium_without_errors_or_requests(
    which: str, demo: Demo, damaged: Damaged, browser: WebDriver, tmp_path: Path
) -> None:
    """Source: Chromium's browser and performance logs, element rectangles and a screenshot."""
    page, figures = (demo.report, FIGURES) if which == "demo" else (damaged.page, (*FIGURES, "fig-audit"))
    seen = visit(browser, page)
    assert seen.console == []
    assert seen.requests == []
    assert sorted(seen.figures) == sorted(figures)
    for name, (width, height) in seen.figures.items():
        assert width > 100 and height > 50, name
    width, height = _png_size(seen.screenshot)
    assert width > 0 and height > 0
    (tmp_path / "report.png").write_bytes(seen.screenshot)


@needs_chromium
def test_the_browser_harness_catches_requests_and_console_errors(browser: WebDriver, tmp_path: Path) -> None:
    """Source: a planted page with an outside image and a console.error; the harness must see both."""
    planted = tmp_path / "planted.html"
    planted.write_text(
        '<!DOCTYPE html><html><body><figure><svg width="10" height="10"></svg></figure>'
        '<img src="http://127.0.0.1:9/planted.png">'
        '<script>console.error("planted error")</script></body></html>',
        encoding="utf-8",
    )
    seen = visit(browser, planted)
    assert "http://127.0.0.1:9/planted.png" in seen.requests
    assert any("planted error" in entry["message"] and entry["level"] == "SEVERE" for entry in seen.console)
