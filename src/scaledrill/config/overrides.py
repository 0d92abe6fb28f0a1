"""Recover command-line overrides that rebuild a saved, resolved run configuration.

Why: a run directory keeps `config.yaml`, the resolved configuration, but a replay
must compose new variants the way Hydra would (`optim=lamb` swaps a whole group
and re-resolves `${optim.lr}` inside `scaling`). So it needs overrides, not values.

How:
1. For each config group the saved config holds (`optim`, `task`, ...), pick the
   option file whose literal values agree with the saved node the most.
2. Compose with those choices; find the first key (in the saved order) whose
   value differs, add `key=value` (`+key=value` when the key is new, `~key` when
   the saved config lacks it) and compose again. One key at a time, so a value
   that follows from an interpolation (`scaling.base_lr: ${optim.lr}`) is not
   pinned on its own.
3. Stop when the composition equals the saved config; give up, with a
   CheckpointError, if it never does.

A run composed with config directories of the user's own (`--config-dir`,
`hydra.searchpath`) is rebuilt with them: Hydra records them in the run's
`.hydra/hydra.yaml` (`search_dirs`), their groups' option files count in step 1,
and every composition gets the same search path (`searchpath_override`).
"""

from contextlib import contextmanager
from pathlib import Path

from hydra import compose, initialize_config_dir
from hydra.core.global_hydra import GlobalHydra
from omegaconf import OmegaConf, open_dict

import scaledrill.config.store  # noqa: F401  (the schemas, before any composition)
from scaledrill.config.schema import GROUPS
from scaledrill.errors import CheckpointError

CONFIG_DIR = Path(__file__).resolve().parents[1] / "conf"
IGNORED = ("resume", "hydra")  # set by the caller, or never part of a run's own config


@contextmanager
def hydra_session():
    """Hydra's compose needs an initialised config search path; inside a verb it already is."""
    if GlobalHydra.instance().is_initialized():
        yield
        return
    with initialize_config_dir(str(CONFIG_DIR), version_base=None):
        yield


def search_dirs(run_dir: Path) -> list[Path]:
    """Config directories beyond the shipped conf/ the run in `run_dir` was composed with (empty if unknown)."""
    recorded = Path(run_dir) / ".hydra" / "hydra.yaml"
    if not recorded.is_file():
        return []
    try:
        sources = OmegaConf.load(recorded).hydra.runtime.config_sources
    except Exception:  # an unreadable record: rebuild from conf/ alone
        return []
    out = []
    for source in sources:
        path = Path(str(source.get("path", "")))
        if source.get("schema") == "file" and path.is_dir() and path.resolve() != CONFIG_DIR:
            out.append(path.resolve())
    return out


def searchpath_override(dirs) -> list[str]:
    """The override that puts `dirs` on Hydra's config search path (none when there are none)."""
    return [f"hydra.searchpath={render([f'file://{d}' for d in dirs])}"] if dirs else []


def compose_run(overrides: list[str]):
    """The `run` config of these overrides (call inside hydra_session)."""
    return compose("run", overrides=list(overrides))


def leaves(node, prefix: str = "") -> dict:
    """Dotted key -> value of every non-dict value (lists are values; an empty dict is a value)."""
    if isinstance(node, dict) and node:
        out = {}
        for key, value in node.items():
            out.update(leaves(value, f"{prefix}{key}."))
        return out
    return {prefix[:-1]: node}


def render(value) -> str:
    """A value in Hydra's override syntax."""
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, float)):
        return repr(value)
    if isinstance(value, (list, tuple)):
        return "[" + ",".join(render(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{" + ",".join(f"{k}:{render(v)}" for k, v in value.items()) + "}"
    return "'" + str(value).replace("\\", "\\\\").replace("'", "\\'") + "'"


def _plain(cfg) -> dict:
    data = OmegaConf.to_container(cfg, resolve=True, throw_on_missing=False)
    return {k: v for k, v in data.items() if k not in IGNORED}


def _group_choices(saved: dict, dirs=()) -> list[str]:
    """Step 1: the option of each group closest to the saved node (literal values only)."""
    choices = []
    roots = [CONFIG_DIR, *dirs]
    names = sorted({p.name for root in roots for p in root.iterdir() if p.is_dir() and p.name in saved})
    for name in names:
        mine = leaves(saved[name])
        best, best_score = None, None
        for option in sorted(o for root in roots for o in (root / name).glob("*.yaml")):
            theirs = leaves(_option_values(name, option))
            score = sum(1 for k, v in theirs.items() if k in mine and mine[k] == v) - len(set(theirs) - set(mine))
            if best_score is None or score > best_score:
                best, best_score = option.stem, score
        if best is not None:
            choices.append(f"{name}={best}")
    return choices


def _option_values(group: str, option: Path) -> dict:
    """An option file's values over the schema its defaults list names (the file holds only what differs)."""
    raw = OmegaConf.load(option)
    values = OmegaConf.create({})
    for name in raw.get("defaults", []):
        if name in GROUPS.get(group, {}):
            values = OmegaConf.structured(GROUPS[group][name])
    with open_dict(raw):
        raw.pop("defaults", None)
    return OmegaConf.to_container(OmegaConf.merge(values, raw), resolve=False)


def rebuild_overrides(saved: dict, where: str = "config.yaml", dirs=()) -> list[str]:
    """Overrides whose composition equals `saved` (a resolved run config, as a dict) key for key;
    `dirs`: the run's own config directories (search_dirs), whose search path leads the list."""
    saved = {k: v for k, v in saved.items() if k not in IGNORED}
    target = leaves(saved)
    overrides = [*searchpath_override(dirs), *_group_choices(saved, dirs)]
    with hydra_session():
        for _ in range(len(target) + 50):
            try:
                have = leaves(_plain(compose_run(overrides)))
            except Exception as err:  # an option or key the configs no longer have
                raise CheckpointError(
                    f"{where}: cannot rebuild its configuration from the config directories "
                    f"{[str(d) for d in (CONFIG_DIR, *dirs)]} ({type(err).__name__}: {err})"
                ) from None
            step = _first_difference(target, have)  # step 2
            if step is None:
                return overrides  # step 3
            overrides += _replace_subtree(step, have, saved)
    raise CheckpointError(
        f"{where}: cannot rebuild its configuration from the config directories "
        f"{[str(d) for d in (CONFIG_DIR, *dirs)]} (still differs after {overrides})"
    )


def _first_difference(target: dict, have: dict) -> str | None:
    for key, value in target.items():
        if key not in have:
            return f"+{key}={render(value)}"
        if have[key] != value and not (_nan(value) and _nan(have[key])):
            return f"{key}={render(value)}"
    for key in have:
        if key not in target and not any(t.startswith(key + ".") for t in target):
            return f"~{key}"
    return None


def _replace_subtree(step: str, have: dict, saved: dict) -> list[str]:
    """Hydra cannot delete a key whose value is null (`~task.model.group_size` says it does not
    exist), as when a user's model replaces a task's: then replace the whole parent node instead."""
    key = step[1:]
    if not step.startswith("~") or have.get(key) is not None or "." not in key:
        return [step]
    parent = key.rsplit(".", 1)[0]
    node = saved
    for part in parent.split("."):
        node = node.get(part) if isinstance(node, dict) else None
    if not isinstance(node, dict):
        return [step]
    return [f"~{parent}", f"+{parent}={render(node)}"]


def _nan(value) -> bool:
    return isinstance(value, float) and value != value
