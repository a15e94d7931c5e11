"""Which files are inputs, and reading one: the one rule of check, convert, audit and the service's inbox (shell).

Owns:

- the folder rule (:func:`find_inputs`): a folder is read to any depth, one folder listed at a
  time (iteratively: no recursion limit), each folder's entries in name order; symbolic links to
  folders are not followed. A file named on the command line is always read.
- the skip rule (:func:`skip_reason`): in a folder, a file is an input when its name fits what
  would read it -- a ``[maps]`` pattern matches it, or it ends in ``.json`` (a ``dlco-result/1``
  export), or, with a default field map (``map``, ``--map``), in an extension of that map's
  format (CSV: ``.csv``, ``.tsv``; legacy HL7 v2: ``.hl7``, ``.er7``). Everything else is skipped
  and counted, never an error: hidden names (``.``), a writer's temporary names (``.tmp``,
  ``.part``, ...), anything that is not a regular file, and other names (``README.txt``,
  ``Thumbs.db``, a stray ``bridge.toml``).
- the size-limited read (:func:`read_input`) and the guard that keeps one file from stopping
  the others (:func:`each_input`): any exception met on one file becomes that file's error.

README.md ("Folders") and ``--help`` state the same rule; ``tests/test_inputs.py`` checks it.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path, PurePath
from typing import TypeVar

from bridge.errors import InputError, ProcessingFailed, UnreadableInput
from bridge.tables.field_map_model import MapChoice

# A writer's names for a file it has not finished (never read; the finished file gets its own name).
TEMPORARY_SUFFIXES = (".tmp", ".part", ".partial", ".crdownload", ".filepart")
# The extensions of what each reader reads, for files found in a folder (compared in lower case).
EXTENSIONS = {"dlco-result/1": (".json",), "csv": (".csv", ".tsv"), "hl7v2": (".hl7", ".er7")}
HIDDEN, TEMPORARY, NOT_A_FILE, NOT_AN_EXPORT = "hidden", "temporary", "not a regular file", "not an export"
FOLDER_RULE = (
    "a folder is read to any depth; in it, a file is read when a [maps] pattern matches its name or it ends "
    "in .json (with a default map: .csv/.tsv or .hl7/.er7 for the map's format); other files are skipped "
    "and counted (README.txt, Thumbs.db, bridge.toml, hidden and temporary names)"
)

R = TypeVar("R")


@dataclass(frozen=True, slots=True)
class Found:
    """A file met while looking for inputs; ``skipped`` says why it is not read (None: it is an input)."""

    path: Path
    skipped: str | None = None


def in_progress(name: str) -> bool:
    """A hidden name or a writer's temporary one: a file that may still be written (never read)."""
    return name.startswith(".") or name.lower().endswith(TEMPORARY_SUFFIXES)


def is_input(relative: PurePath, maps: MapChoice) -> bool:
    """Whether a file at ``relative`` below a folder is an input by the rule (not in a hidden folder)."""
    return not any(part.startswith(".") for part in relative.parts[:-1]) and skip_reason(relative.name, maps) is None


def skip_reason(name: str, maps: MapChoice) -> str | None:
    """Why a file called ``name``, found in a folder, is not an input (None: it is one)."""
    if name.startswith("."):
        return HIDDEN
    if name.lower().endswith(TEMPORARY_SUFFIXES):
        return TEMPORARY
    if maps.by_name(name) is not None:
        return None  # the site named a pattern for it: whatever its extension
    extensions = EXTENSIONS["dlco-result/1"] if maps.default is None else EXTENSIONS[maps.default.format]
    return None if name.lower().endswith(extensions) else NOT_AN_EXPORT


def find_inputs(paths: Iterable[Path], maps: MapChoice) -> Iterator[Found]:
    """Every file under ``paths``, each an input or skipped with its reason, in a stable order.

    A path that is not a folder is yielded as an input (reading it says whether it exists). A
    folder that cannot be listed is yielded as an input too, so that reading it becomes that
    path's error rather than a crash or a silence.
    """
    for top in paths:
        if not top.is_dir():
            yield Found(top)
            continue
        folders = [top]
        while folders:
            folder = folders.pop()
            try:
                with os.scandir(folder) as listing:
                    entries = sorted(listing, key=lambda e: e.name)
            except OSError:
                yield Found(folder)
                continue
            below = []
            for entry in entries:
                path = Path(entry.path)
                if entry.is_dir(follow_symlinks=False):
                    if entry.name.startswith("."):
                        yield Found(path, HIDDEN)
                    else:
                        below.append(path)
                elif entry.is_symlink() and entry.is_dir():
                    yield Found(path, "a link to a folder (not followed)")
                elif not entry.is_file():
                    yield Found(path, NOT_A_FILE)
                else:
                    yield Found(path, skip_reason(entry.name, maps))
            folders.extend(reversed(below))  # the first sub-folder is listed next: name order throughout


def read_input(path: Path, limit: int) -> bytes:
    """The bytes of one input; unreadable, or larger than ``limit`` bytes, is an :class:`UnreadableInput`."""
    try:
        with open(path, "rb") as handle:
            size = os.fstat(handle.fileno()).st_size
            if size > limit:
                raise UnreadableInput("(file)", f"at most {limit} bytes, got {size}", str(path))
            data = handle.read(limit + 1)
    except OSError as exc:
        raise UnreadableInput("(file)", f"a readable file ({exc.strerror or exc})", str(path)) from exc
    if len(data) > limit:  # it grew while being read
        raise UnreadableInput("(file)", f"at most {limit} bytes, got more", str(path))
    return data


def each_input(path: Path, limit: int, work: Callable[[bytes], Iterable[R]]) -> Iterator[R | InputError]:
    """``work`` on the bytes of ``path``: its results, or the file's one error; never raises for the file.

    An :class:`InputError` names the path; any other exception is a defect of the bridge, reported
    for this file alone (:class:`ProcessingFailed`), so that one file never stops the others.
    """
    try:
        yield from work(read_input(path, limit))
    except InputError as exc:
        yield exc.with_source(str(path))
    except Exception as exc:  # one file must never stop the others
        yield ProcessingFailed.wrapping(exc, str(path))
