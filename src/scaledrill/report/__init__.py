"""`scaledrill report PATH`: one self-contained HTML page of every result under PATH.

Why one file: a report is passed around, attached to tickets and archived; with
figures inlined as data URIs and the stylesheet in the page, it opens anywhere
without the run directory or a network.

How:
1. Find the result directories: PATH itself if it holds a result file
   (summary.json, check.json, replay.json, ladder.json, forecast.json), else its
   subdirectories, a few levels down, stopping at the first that hold one (so a
   ladder's own rung runs are not listed again).
2. Build one section per result file, in that order within a directory; when
   two or more run directories are found (a Hydra multirun folder, or several
   run folders given as `path=[A,B,…]`), add a sweep section comparing them;
   when several ladders are parts of one (one job per rung), add the gathered ladder.
3. Write the page (default PATH/report.html; for several paths, their common
   parent) and print its path; sections appear in the reader's question order.
"""

import os
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
    directory, root = directory.resolve(), root.resolve()
    source = str(directory.relative_to(root)) if directory != root else "."
    try:
        return BUILDERS[name](directory, source)
    except (sqlite3.Error, KeyError, TypeError, ValueError, IndexError) as err:
        if debug:
            raise
        broken = Section(name.removesuffix(".json"), f"Unreadable {name}", source)
        broken.blocks.append(absent([f"a readable {name} ({err.__class__.__name__}: {err})"]))
        return broken


def _one_root(path: Path) -> list[tuple[str, Path]]:
    if path.is_file() and path.name in BUILDERS:  # one result file: just that one
        return [(path.name, path.parent)]
    if not path.is_dir():
        raise ConfigError("path", "must be an existing directory (or one of its result files)", str(path))
    results = find_results(path)
    if not results:
        raise ConfigError("path", f"holds none of {', '.join(BUILDERS)} (looked {SEARCH_DEPTH} levels down)", str(path))
    return results


def _root(cfg) -> tuple[Path, list[tuple[str, Path]]]:
    if OmegaConf.is_missing(cfg, "path") or not cfg.path:
        raise ConfigError("path", "is required: the run, check, replay, ladder or forecast directory to report on")
    given = cfg.path if OmegaConf.is_list(cfg.path) else [cfg.path]
    paths = [Path(str(p)).expanduser() for p in given]
    results = [found for path in paths for found in _one_root(path)]
    if len(paths) == 1:
        root = paths[0].parent if paths[0].is_file() else paths[0]
    else:
        root = Path(os.path.commonpath([p.resolve() for p in paths]))
    return root, results


def build_sections(root: Path, results: list[tuple[str, Path]], debug: bool) -> list[Section]:
    """Step 2: one section per result, and a sweep section over the runs when there are several."""
    sections = [_section(name, directory, root, debug) for name, directory in results]
    from scaledrill.report.sweep import gathered_ladder, sweep_section

    def where(d: Path) -> str:
        return str(d.resolve().relative_to(root.resolve())) if d.resolve() != root.resolve() else "."

    runs = [directory for name, directory in results if name == "summary.json"]
    if len(runs) >= 2:
        sections.append(sweep_section(runs, [where(d) for d in runs]))
    ladders = [directory for name, directory in results if name == "ladder.json"]
    if len(ladders) >= 2:
        whole = gathered_ladder(ladders, [where(d) for d in ladders])
        if whole is not None:  # the jobs' own sections would only repeat its rungs one by one
            sections = [s for s in sections if s.kind != "ladder"] + [whole]
    return sections
