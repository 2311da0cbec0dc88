"""Walking the input folder: which paths are inputs, in which order, and symbolic links.

Paths are relative to the input folder and ``/``-separated. A name that is not
valid UTF-8 is shown with each undecodable byte written ``\\xHH``; control
characters are written the same way and a backslash is doubled, so the shown
path (the ledger's ``source``) is printable and different files never share it.

Globs (``include`` / ``exclude``) match the whole shown path, case-sensitively:
``*`` matches any run of characters except ``/`` (a leading dot included),
``?`` one such character, ``[abc]`` / ``[!abc]`` one character of a set, and a
``**`` segment any number of folders (zero included): ``**/*.txt`` matches
``a.txt`` and ``x/y/a.txt``. A pattern ending in ``/`` matches folders, and is
used for dataset folders written by HF ``datasets`` ``save_to_disk``
(``**/`` matches all of them, the input folder itself included).

Symbolic links:

* a link that resolves outside the input folder is never followed: it gives a
  ``link_outside_input`` row (for a file link, when its path matches
  ``include``; for a folder link, always);
* a folder link that resolves inside is not descended: its files are read at
  their real paths, once. If it leads back to a folder that contains it, it
  is a cycle and gives a ``link_loop`` row;
* a file link that resolves inside is read under the link's path, unless the
  real file is itself an input or an earlier link (in path order) leads to it:
  every real file is read at most once;
* a link that cannot be resolved (a cycle of links: ``link_loop``; a missing
  target: ``unreadable``) gives a row when its path matches ``include``.

Only regular files are opened; a FIFO, socket or device matching ``include``
gives an ``unreadable`` row. A folder that cannot be listed gives an
``unreadable`` row whatever the patterns.
"""

from __future__ import annotations

import errno
import os
import re
import stat
from collections.abc import Callable
from dataclasses import dataclass

__all__ = ["Entry", "compile_globs", "glob_to_regex", "list_entries", "shown_name"]

SAVED_DATASET_MARKERS = ("state.json", "dataset_info.json")
DATASET_DICT_MARKER = "dataset_dict.json"


def shown_name(name: str) -> str:
    """A file name (as ``os`` gives it, undecodable bytes as surrogates) in printable form.

    >>> shown_name("caf\\udcc3.txt")
    'caf\\\\xc3.txt'
    >>> shown_name("a\\\\b\\nc")
    'a\\\\\\\\b\\\\x0ac'
    """
    parts = []
    for char in name:
        code = ord(char)
        if 0xDC80 <= code <= 0xDCFF:
            parts.append(f"\\x{code - 0xDC00:02x}")
        elif code < 0x20 or code == 0x7F:
            parts.append(f"\\x{code:02x}")
        elif char == "\\":
            parts.append("\\\\")
        else:
            parts.append(char)
    return "".join(parts)


def glob_to_regex(pattern: str) -> str:
    """The regular expression (for ``re.fullmatch``) of one glob pattern.

    Raises ``ValueError`` for an absolute or empty pattern, or ``.``/``..`` segments.

    >>> import re
    >>> every_txt = glob_to_regex("**/*.txt")
    >>> bool(re.fullmatch(every_txt, "a.txt")), bool(re.fullmatch(every_txt, "x/y/a.txt"))
    (True, True)
    >>> bool(re.fullmatch(glob_to_regex("*.txt"), "x/a.txt"))
    False
    >>> bool(re.fullmatch(glob_to_regex("**/"), "")), bool(re.fullmatch(glob_to_regex("**/"), "d/e/"))
    (True, True)
    """
    if not pattern:
        raise ValueError("an empty pattern matches nothing")
    if pattern.startswith("/"):
        raise ValueError(f"{pattern!r}: patterns are relative to the input folder; remove the leading '/'")
    segments = pattern.split("/")
    if any(segment in (".", "..") for segment in segments):
        raise ValueError(f"{pattern!r}: '.' and '..' segments are not allowed")
    last = len(segments) - 1
    pieces = []
    for index, segment in enumerate(segments):
        if segment == "**":
            pieces.append(".*" if index == last else "(?:[^/]+/)*")
            continue
        pieces.append(_segment_regex(segment))
        if index != last:
            pieces.append("/")
    return "".join(pieces)


def _segment_regex(segment: str) -> str:
    pieces = []
    index = 0
    while index < len(segment):
        char = segment[index]
        if char == "*":
            pieces.append("[^/]*")
        elif char == "?":
            pieces.append("[^/]")
        elif char == "[" and (close := _class_end(segment, index)) > 0:
            body = segment[index + 1 : close]
            negate = body.startswith("!")
            body = body[1:] if negate else body
            escaped = body.replace("\\", "\\\\").replace("^", "\\^").replace("[", "\\[")
            pieces.append(f"[{'^/' if negate else ''}{escaped}]")
            index = close
        else:
            pieces.append(re.escape(char))
        index += 1
    return "".join(pieces)


def _class_end(segment: str, start: int) -> int:
    """Index of the ``]`` closing the class opened at ``start``, or -1."""
    index = start + 1
    if index < len(segment) and segment[index] == "!":
        index += 1
    if index < len(segment) and segment[index] == "]":
        index += 1
    close = segment.find("]", index)
    return close


def compile_globs(patterns: tuple[str, ...]) -> re.Pattern[str] | None:
    """One regular expression matching any of ``patterns`` (None when there are none)."""
    if not patterns:
        return None
    return re.compile("|".join(f"(?:{glob_to_regex(pattern)})" for pattern in patterns), re.DOTALL)


@dataclass(frozen=True, slots=True)
class Entry:
    """One input found by the walk."""

    source: str
    """shown path relative to the input folder ("." for the folder itself)"""
    path: str
    """path to open (a real path for link targets)"""
    kind: str
    """"file", "saved_dataset" or "rejected\""""
    reason: str = ""
    """for kind "rejected": ledger reason with detail"""


@dataclass(frozen=True, slots=True)
class _Found:
    entry: Entry
    real: str  # real path of the file read; "" for rows that read nothing
    is_link: bool


def _matches(pattern: re.Pattern[str] | None, path: str) -> bool:
    return pattern is not None and pattern.fullmatch(path) is not None


def _is_saved_dataset(folder: str) -> bool:
    return all(os.path.isfile(os.path.join(folder, marker)) for marker in SAVED_DATASET_MARKERS)


def _inside(path: str, root: str) -> bool:
    return path == root or path.startswith(root.rstrip(os.sep) + os.sep)


def list_entries(root: str, include: tuple[str, ...], exclude: tuple[str, ...]) -> list[Entry]:
    """Every input under ``root`` in sorted order of the shown path.

    Raises ``OSError`` if ``root`` itself cannot be listed.
    """
    wanted = compile_globs(include)
    unwanted = compile_globs(exclude)

    def selected(path: str) -> bool:
        return _matches(wanted, path) and not _matches(unwanted, path)

    root_real = os.path.realpath(root)
    found: list[_Found] = []
    if _is_saved_dataset(root):
        if selected(""):
            found.append(_Found(Entry(".", root, "saved_dataset"), root_real, False))
        return [item.entry for item in found]
    # Each folder with its real path: folders are entered only through real (not linked) folders,
    # so a regular file's real path is its folder's real path and its name, with no realpath call.
    folders: list[tuple[str, str, str]] = [(root, "", root_real)]
    first = True
    while folders:
        folder, prefix, folder_real = folders.pop()
        try:
            with os.scandir(folder) as listing:
                children = sorted(listing, key=lambda child: child.name)
        except OSError as error:
            if first:
                raise
            reason = f"unreadable: cannot list folder ({error.strerror or error})"
            found.append(_Found(Entry(prefix.rstrip("/"), folder, "rejected", reason), "", False))
            continue
        first = False
        has_datasets = any(
            child.is_dir(follow_symlinks=False) and _is_saved_dataset(child.path) for child in children
        )
        for child in children:
            shown = prefix + shown_name(child.name)
            if child.name == DATASET_DICT_MARKER and has_datasets:
                continue  # metadata of a saved dataset dictionary, not a record file
            if child.is_symlink():
                item = _link(child.path, shown, root_real, selected)
                if item is not None:
                    found.append(item)
            elif child.is_dir(follow_symlinks=False):
                if _is_saved_dataset(child.path):
                    if selected(shown + "/"):
                        entry = Entry(shown, child.path, "saved_dataset")
                        found.append(_Found(entry, os.path.realpath(child.path), False))
                else:
                    folders.append((child.path, shown + "/", os.path.join(folder_real, child.name)))
            elif selected(shown):
                real = os.path.join(folder_real, child.name)
                found.append(_regular_or_not(child.path, shown, real, False))
    return _once_per_file(found)


def _regular_or_not(path: str, shown: str, real: str, is_link: bool) -> _Found:
    try:
        mode = os.stat(path).st_mode
    except OSError as error:
        return _Found(Entry(shown, path, "rejected", f"unreadable: {error.strerror or error}"), "", is_link)
    if not stat.S_ISREG(mode):
        return _Found(Entry(shown, path, "rejected", "unreadable: not a regular file"), "", is_link)
    return _Found(Entry(shown, real, "file"), real, is_link)


def _link(path: str, shown: str, root_real: str, selected: Callable[[str], bool]) -> _Found | None:
    try:
        target = os.path.realpath(path, strict=True)
    except OSError as error:
        if not selected(shown):
            return None
        if error.errno == errno.ELOOP:
            reason = "link_loop: the link leads back to itself (a cycle of links)"
            return _Found(Entry(shown, path, "rejected", reason), "", True)
        detail = "the link's target does not exist" if error.errno == errno.ENOENT else str(error.strerror)
        return _Found(Entry(shown, path, "rejected", f"unreadable: {detail}"), "", True)
    is_folder = os.path.isdir(target)
    if not _inside(target, root_real):
        if is_folder or selected(shown):
            reason = "link_outside_input: the link leads outside the input folder"
            return _Found(Entry(shown, path, "rejected", reason), "", True)
        return None
    if is_folder:
        parent = os.path.realpath(os.path.dirname(path))
        if _inside(parent, target):
            rel = os.path.relpath(target, root_real).replace(os.sep, "/")
            reason = f"link_loop: the link leads back to the folder {shown_name(rel)!r} that contains it"
            return _Found(Entry(shown, path, "rejected", reason), "", True)
        return None  # its files are read at their real paths
    if not selected(shown):
        return None
    return _regular_or_not(target, shown, target, True)


def _once_per_file(found: list[_Found]) -> list[Entry]:
    """Sort by shown path and keep one entry per real file: the real path first, else the first link."""
    found = sorted(found, key=lambda item: item.entry.source)
    direct = {item.real for item in found if item.real and not item.is_link}
    seen: set[str] = set()
    kept = []
    for item in found:
        if item.real:
            if item.is_link and item.real in direct:
                continue
            if item.real in seen:
                continue
            seen.add(item.real)
        kept.append(item.entry)
    return kept
