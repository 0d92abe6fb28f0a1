"""Keys that do not exist: a misspelt key, a renamed one, an option a group does not have.

Why: Hydra refuses `train.epochs=90` in its own words and accepts `+train.epochs=90`
(an addition) without complaint; either way the user learns nothing about the
keys that do exist. Here both become one ConfigError naming the key, the nearest
valid keys (difflib) and, for a key this project renamed, the new name.
"""

import dataclasses
import difflib
import re

from omegaconf import DictConfig, OmegaConf

from scaledrill.config.schema import TaskConfig
from scaledrill.errors import ConfigError

# old key -> its new name; refused with a message naming the new key
RENAMED = {
    "optim.trust_clip": "optim.trust_cap",
    "sync.start_step": "sync.exact_until",
    "sync.min_compression": "sync.min_saving",
    "sync.bucket_mib": "sync.bucket_kib (KiB: 16384 is 16 MiB)",
    "ladder.target.metric": "ladder.goal.metric",
    "ladder.target.value": "ladder.goal.value",
    "ladder.target.mode": "ladder.goal.reached_when",
    "ladder.target": "ladder.goal",  # after its keys: the first match names the new key
    "ladder.mode": "ladder.grow",
    "recipe": "the preset group scenario (+scenario=NAME)",
}
RENAMED_GROUPS = {"recipe": "scenario"}
UNTYPED = {"task": TaskConfig}  # composed without its dataclass (config/store.py); its keys are still these


def renamed(key: str) -> ConfigError | None:
    """The error for a key this project renamed (or a key under it); None for any other key."""
    for old, new in RENAMED.items():
        if key == old or key.startswith(old + "."):
            return ConfigError(key, f"was renamed: use {new}")
    return None


def unknown_key(key: str, known: list[str]) -> ConfigError:
    """The error for `key`, which does not exist; `known` are the keys beside it."""
    if renamed(key) is not None:
        return renamed(key)
    parent = key.rpartition(".")[0]
    full = [f"{parent}.{k}" if parent else k for k in known]
    near = difflib.get_close_matches(key, full, n=3, cutoff=0.6)
    hint = f"did you mean {' or '.join(near)}? " if near else ""
    where = f"{parent} has" if parent else "the top level has"
    return ConfigError(key, f"no such key; {hint}{where} {', '.join(sorted(known)) or 'no keys'}")


def unknown_option(group: str, option: str, options: list[str]) -> ConfigError:
    if group in RENAMED_GROUPS:
        return ConfigError(group, f"the preset group was renamed: use +{RENAMED_GROUPS[group]}={option}")
    shown = sorted(o for o in options if not o.startswith("base_"))  # the schemas themselves are no presets
    near = difflib.get_close_matches(option, shown, n=1)
    hint = f"did you mean {group}={near[0]}? " if near else ""
    return ConfigError(group, f"no option {option!r}; {hint}choose one of {', '.join(shown)}")


def schema_keys(node, path: str = "") -> list[str] | None:
    """The keys the dataclass behind `node` declares; None for an open node (a task's model, data, loss)."""
    kind = OmegaConf.get_type(node)
    if not dataclasses.is_dataclass(kind):
        kind = UNTYPED.get(path)
    return [f.name for f in dataclasses.fields(kind)] if kind else None


def refuse_unknown(cfg, prefix: str = "") -> None:
    """Raise ConfigError for the first key a schema does not declare (an addition like +train.epochs=90)."""
    known = schema_keys(cfg, prefix[:-1])
    for key in cfg.keys():
        if key == "hydra" and not prefix:
            continue
        if known is not None and key not in known:
            raise unknown_key(f"{prefix}{key}", known)
        value = cfg._get_node(key)
        if isinstance(value, DictConfig) and not value._is_missing() and not value._is_none():
            refuse_unknown(value, f"{prefix}{key}.")


TYPE_WORDS = {"Integer": "a whole number", "Float": "a number", "bool": "true or false"}


def composition_error(err: Exception) -> ConfigError:
    """One ConfigError for an exception Hydra raised while composing the configuration."""
    from hydra.errors import MissingConfigException, OverrideParseException
    from omegaconf.errors import ConfigKeyError, OmegaConfBaseException, ValidationError

    if isinstance(err, MissingConfigException) and err.missing_cfg_file and "/" in err.missing_cfg_file:
        group, _, option = err.missing_cfg_file.rpartition("/")
        return unknown_option(group, option, list(err.options or []))
    if isinstance(err, OverrideParseException):
        return ConfigError(err.override or "overrides", "cannot be read as key=value (Hydra's override syntax)")
    cause = err
    while cause is not None and not (isinstance(cause, OmegaConfBaseException) and getattr(cause, "full_key", None)):
        cause = cause.__cause__ or cause.__context__
    if cause is None:
        first = str(err).strip().splitlines()[0] if str(err).strip() else type(err).__name__
        return ConfigError("overrides", f"cannot compose the configuration: {first}")
    key, kind = cause.full_key, cause.object_type
    typed = re.search(r"override '([^']+)'", str(err))  # the key as given, when its parent is what is missing
    if typed and renamed(typed.group(1)) is not None:
        return renamed(typed.group(1))
    if isinstance(cause, (ConfigKeyError, AttributeError)):
        if dataclasses.is_dataclass(kind):
            return unknown_key(key, [f.name for f in dataclasses.fields(kind)])
        parent = key.rpartition(".")[0]
        return ConfigError(key, f"no such key; {parent} takes the arguments of its own _target_: add one with +{key}=VALUE")
    if isinstance(cause, ValidationError):
        wanted = next((words for name, words in TYPE_WORDS.items() if name in str(cause)), "of the key's type")
        return ConfigError(key, f"must be {wanted}", getattr(cause, "value", None))
    return ConfigError(key, "does not fit the configuration schema (scaledrill/config/schema.py)")
