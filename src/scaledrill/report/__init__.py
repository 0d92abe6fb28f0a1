"""`scaledrill report PATH`: one self-contained HTML page of every result under PATH.

Why one file: a report is passed around, attached to tickets and archived; with
figures inlined as data URIs and the stylesheet in the page, it opens anywhere
without the run directory or a network.

How:
1. Find the result directories: PATH itself if it holds a result file
   (summary.json, check.json, replay.json, ladder.json, forecast.json), else its
   subdirectories, a few levels down, stopping at the first that hold one (so a
   ladder's own rung runs are not listed again).
2. Build one section per result file, in that order within a directory.
3. Write the page (default PATH/report.html) and print its path.
"""

import sqlite3
from pathlib import Path

from omegaconf import OmegaConf

from scaledrill.errors import ConfigError
from scaledrill.report.html import Section, absent
from scaledrill.report.sections import BUILDERS

SEARCH_DEPTH = 3


def find_results(root: Path, depth: int = SEARCH_DEPTH) -> list[tuple[str, Path]]:
    """Step 1: (result file name, directory) pairs under `root`, in path order."""
    here = [(name, root) for name in BUILDERS if (root / name).is_file()]
    if here or depth == 0:
        return here
    found = []
    for child in sorted(p for p in root.iterdir() if p.is_dir() and not p.name.startswith(".")):
        found += find_results(child, depth - 1)
    return found


def _section(name: str, directory: Path, root: Path, debug: bool) -> Section:
    """Step 2, for one file; a file that cannot be read becomes a note, not a crash."""
    source = str(directory.relative_to(root)) if directory != root else "."
    try:
        return BUILDERS[name](directory, source)
    except (sqlite3.Error, KeyError, TypeError, ValueError, IndexError) as err:
        if debug:
            raise
        broken = Section(name.removesuffix(".json"), f"Unreadable {name}", source)
        broken.blocks.append(absent([f"a readable {name} ({err.__class__.__name__}: {err})"]))
        return broken


def _root(cfg) -> tuple[Path, list[tuple[str, Path]]]:
    if OmegaConf.is_missing(cfg, "path") or not cfg.path:
        raise ConfigError("path", "is required: the run, check, replay, ladder or forecast directory to report on")
    path = Path(str(cfg.path)).expanduser()
    if path.is_file() and path.name in BUILDERS:  # one result file: just that one
        return path.parent, [(path.name, path.parent)]
    if not path.is_dir():
        raise ConfigError("path", "must be an existing directory (or one of its result files)", str(path))
    results = find_results(path)
    if not results:
        raise ConfigError("path", f"holds none of {', '.join(BUILDERS)} (looked {SEARCH_DEPTH} levels down)", str(path))
    return path, results
