"""Build a real benchmark corpus from text that Debian packages install.

::

    python bench/make_corpus.py TARGET [--scale N] [--seed S]

writes

``TARGET/base/pydoc/``
    the reStructuredText sources of the Python 3.11 documentation
    (``/usr/share/doc/python3.11-doc/html/_sources/**/*.txt``, package
    ``python3.11-doc``), one file per page, copied byte for byte;
``TARGET/base/licenses/``
    every ``/usr/share/doc/*/copyright`` (as ``packages/PACKAGE.copyright.txt``)
    and every ``/usr/share/common-licenses/*`` (package ``base-files``, as
    ``common/NAME.txt``), copied as raw bytes: some are not UTF-8, and many are
    exact or near copies of one another, as on any real machine;
``TARGET/copies-K/`` for K = 1..N
    a perturbed copy of every file of ``base/``: words deleted, doubled,
    swapped or replaced at a rate that cycles through 0.5 %, 1 %, 2 %, 4 % and
    8 % from file to file, and about one paragraph in twenty turned into
    mojibake (its UTF-8 bytes read as cp1252, the five bytes cp1252 leaves
    undefined read as Latin-1; a paragraph of plain ASCII looks the same).

A usual target is ``bench/corpora/debian`` (ignored by git). A missing source
folder stops the build with exit code 3 and a message naming the package.

So the corpus is N + 1 times the base, full of near copies at known edit
rates. Every choice comes from a ``random.Random`` seeded with the seed, the
copy number and the file's path, so the output is the same on every run and
does not depend on the order files are written. What ``base/licenses/``
holds depends on the packages installed on the machine. Only the Python
standard library is used. Existing ``base/`` and ``copies-*`` folders of
TARGET are replaced; nothing else in TARGET is touched.
"""

from __future__ import annotations

import argparse
import codecs
import glob
import os
import random
import re
import shutil
import sys
from collections.abc import Iterator
from pathlib import Path

PYDOC_PACKAGE = "python3.11-doc"
PYDOC_SOURCES = Path("/usr/share/doc/python3.11-doc/html/_sources")
COMMON_LICENSES_PACKAGE = "base-files"
COMMON_LICENSES = Path("/usr/share/common-licenses")
PACKAGE_COPYRIGHTS = "/usr/share/doc/*/copyright"
EDIT_RATES = (0.005, 0.01, 0.02, 0.04, 0.08)
MOJIBAKE_PARAGRAPH_SHARE = 0.05
EXIT_MISSING_SOURCE = 3

_WHITESPACE_RUN = re.compile(r"(\s+)")
_PARAGRAPH_BREAK = re.compile(r"(\n[ \t]*\n)")
_CP1252_UNDEFINED_AS_LATIN1 = "bench-cp1252-undefined-as-latin1"


def _latin1_for_undefined(error: UnicodeError) -> tuple[str, int]:
    if not isinstance(error, UnicodeDecodeError):
        raise error
    return error.object[error.start : error.end].decode("latin-1"), error.end


codecs.register_error(_CP1252_UNDEFINED_AS_LATIN1, _latin1_for_undefined)


class MissingSource(Exception):
    """A source folder is absent; the message names the Debian package that provides it."""


def as_mojibake(text: str) -> str:
    """``text`` as it looks when its UTF-8 bytes are read as cp1252.

    >>> as_mojibake("café – Á")
    'cafÃ© â€“ Ã\\x81'
    """
    return text.encode("utf-8", "surrogateescape").decode("cp1252", _CP1252_UNDEFINED_AS_LATIN1)


def edit_words(text: str, rate: float, rng: random.Random) -> str:
    """Delete, double, swap or replace about ``rate`` of the words; whitespace is kept.

    >>> edit_words("one two three", 0.0, random.Random(0))
    'one two three'
    """
    parts = _WHITESPACE_RUN.split(text)
    positions = [i for i in range(0, len(parts), 2) if parts[i]]
    count = round(len(positions) * rate)
    if count == 0:
        return text
    vocabulary = [parts[i] for i in positions]
    for index in sorted(rng.sample(positions, count)):
        action = rng.randrange(4)
        if action == 0:
            parts[index] = ""
        elif action == 1:
            parts[index] = parts[index] + " " + parts[index]
        elif action == 2 and index + 2 < len(parts):
            parts[index], parts[index + 2] = parts[index + 2], parts[index]
        else:
            parts[index] = rng.choice(vocabulary)
    return "".join(parts)


def perturb(data: bytes, rate: float, rng: random.Random) -> bytes:
    """A perturbed copy of a file's bytes (bytes that are not UTF-8 pass through unchanged)."""
    text = data.decode("utf-8", "surrogateescape")
    pieces = _PARAGRAPH_BREAK.split(text)
    for index in range(0, len(pieces), 2):
        piece = edit_words(pieces[index], rate, rng)
        if rng.random() < MOJIBAKE_PARAGRAPH_SHARE:
            piece = as_mojibake(piece)
        pieces[index] = piece
    return "".join(pieces).encode("utf-8", "surrogateescape")


def base_files() -> Iterator[tuple[str, Path]]:
    """``(path under base/, source file)`` for every base file, sorted, or raise :class:`MissingSource`."""
    if not PYDOC_SOURCES.is_dir():
        raise MissingSource(
            f"{PYDOC_SOURCES} is missing: install the Debian package {PYDOC_PACKAGE} "
            f"(apt-get install {PYDOC_PACKAGE})"
        )
    if not COMMON_LICENSES.is_dir():
        raise MissingSource(
            f"{COMMON_LICENSES} is missing: install the Debian package {COMMON_LICENSES_PACKAGE} "
            f"(apt-get install {COMMON_LICENSES_PACKAGE})"
        )
    copyrights = sorted(glob.glob(PACKAGE_COPYRIGHTS))
    if not copyrights:
        raise MissingSource(
            f"no {PACKAGE_COPYRIGHTS} found: is this a Debian system with packages installed?"
        )
    root = PYDOC_SOURCES.resolve()
    pages = []
    for folder, dirnames, filenames in os.walk(root):
        dirnames.sort()
        pages.extend(Path(folder) / name for name in sorted(filenames) if name.endswith(".txt"))
    for page in pages:
        yield "pydoc/" + page.relative_to(root).as_posix(), page
    for path in copyrights:
        yield f"licenses/packages/{Path(path).parent.name}.copyright.txt", Path(path)
    for path in sorted(COMMON_LICENSES.iterdir()):
        if path.is_file():
            yield f"licenses/common/{path.name}.txt", path


def _write_part(target: Path, name: str, files: dict[str, bytes]) -> tuple[int, int]:
    """Write ``files`` to ``target/name`` through a temporary folder; return (files, bytes)."""
    final = target / name
    building = target / f".building-{name}"
    if building.exists():
        shutil.rmtree(building)
    for relative in sorted(files):
        path = building / relative
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(files[relative])
    if final.exists():
        shutil.rmtree(final)
    building.rename(final)
    return len(files), sum(len(data) for data in files.values())


def _report(name: str, files: int, size: int) -> None:
    print(f"{name:<12} {files:>7} files {size / 1_000_000:>10.1f} MB", flush=True)


def build(target: Path, scale: int, seed: int) -> tuple[int, int]:
    """Build the corpus in ``target``; return the total (files, bytes)."""
    base = {relative: source.read_bytes() for relative, source in base_files()}
    target.mkdir(parents=True, exist_ok=True)
    for stale in sorted(target.glob("copies-*")):
        if stale.is_dir() and stale.name.removeprefix("copies-").isdigit():
            shutil.rmtree(stale)
    total_files, total_size = _write_part(target, "base", base)
    _report("base", total_files, total_size)
    for copy in range(1, scale + 1):
        copies = {}
        for index, relative in enumerate(sorted(base)):
            rate = EDIT_RATES[(index + copy) % len(EDIT_RATES)]
            rng = random.Random(f"{seed}:{copy}:{relative}")
            copies[relative] = perturb(base[relative], rate, rng)
        files, size = _write_part(target, f"copies-{copy}", copies)
        _report(f"copies-{copy}", files, size)
        total_files += files
        total_size += size
    _report("total", total_files, total_size)
    return total_files, total_size


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="Build a benchmark corpus from Debian-installed text.")
    parser.add_argument("target", type=Path, help="folder to write base/ and copies-K/ into")
    parser.add_argument("--scale", type=int, default=3, help="number of perturbed copies N (default 3)")
    parser.add_argument("--seed", type=int, default=0, help="seed of every random choice (default 0)")
    args = parser.parse_args(argv)
    if args.scale < 0:
        parser.error(f"--scale {args.scale}: must be 0 or more")
    try:
        build(args.target, args.scale, args.seed)
    except MissingSource as error:
        print(f"make_corpus: {error}", file=sys.stderr)
        return EXIT_MISSING_SOURCE
    return 0


if __name__ == "__main__":
    sys.exit(main())
