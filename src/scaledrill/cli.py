"""The command line: `scaledrill VERB [overrides]`, each verb one Hydra app."""

import importlib
import os
import sys
from pathlib import Path

import hydra
from hydra.core.hydra_config import HydraConfig

import scaledrill.config.store  # noqa: F401  (the schemas, before any composition)
from scaledrill.config.keys import composition_error, refuse_unknown
from scaledrill.errors import ScaledrillError, WorkerFailed

CONFIG_DIR = str(Path(__file__).resolve().parent / "conf")  # shipped inside the package

# verb -> (what it does, the function that does it: module:function taking (cfg, output directory))
VERBS = {
    "run": ("train a recipe on the simulated layout", "run:run_command"),
    "recipe": ("print the scaled recipe without training", "recipe:recipe_verb"),
    "check": ("prove accumulation, virtual workers and processes match the true batch", "check:check_verb"),
    "replay": ("resume a checkpoint with overrides, side by side", "replay:replay_verb"),
    "adopt": ("turn a plain PyTorch checkpoint into a run directory to resume or replay", "adopt:adopt_verb"),
    "ladder": ("run the recipe across growing batch sizes", "ladder:ladder_verb"),
    "forecast": ("project step time, time-to-target and cost on a cluster", "forecast:forecast_verb"),
    "report": ("render the HTML report of a run directory", "report:report_verb"),
}

_started = False  # becomes True once a verb's own code runs; Hydra's errors come before


def _verb_function(verb: str):
    module, function = VERBS[verb][1].split(":")
    return getattr(importlib.import_module(f"scaledrill.commands.{module}"), function)


def _app(verb: str):
    function = _verb_function(verb)

    @hydra.main(version_base=None, config_path=CONFIG_DIR, config_name=verb)
    def app(cfg):
        global _started
        _started = True
        debug = cfg.debug or os.environ.get("SCALEDRILL_DEBUG") == "1"
        try:
            refuse_unknown(cfg)  # an addition (+train.epochs=90) that no schema declares
            result = function(cfg, Path(HydraConfig.get().runtime.output_dir))
        except ScaledrillError as err:
            if debug:
                raise
            print(f"scaledrill {verb}: error: {err}", file=sys.stderr)
            raise SystemExit(err.exit_code) from None
        except Exception as err:  # noqa: BLE001 - no traceback for a user; the same status as a failed rank
            if debug:
                raise
            print(f"scaledrill {verb}: error: {type(err).__name__}: {err} (unexpected: rerun with debug=true for the "
                  f"traceback, and report it unless it points into your own model, data or loss)", file=sys.stderr)
            raise SystemExit(WorkerFailed.exit_code) from None
        code = getattr(result, "exit_code", 0) if result is not None else 0
        if code:
            raise SystemExit(code)

    return app


def usage() -> str:
    lines = ["usage: scaledrill VERB [key=value ...]   (Hydra overrides; --cfg job, -m work)", ""]
    lines += [f"  {verb:<9} {text}" for verb, (text, _) in VERBS.items()]
    return "\n".join(lines)


def _claim_before_hydra(rest: list[str]) -> None:
    """Hydra writes RUN_DIR/.hydra/ before a verb runs: a directory the run may not use is refused
    here, first, so nothing in it changes (train/rundir.py)."""
    from scaledrill.dist.base import running_under_launcher
    from scaledrill.train.rundir import claim, resuming_from_argv, run_dir_from_argv

    run_dir = run_dir_from_argv(rest)
    if run_dir is None or running_under_launcher() or {"-m", "--multirun"} & set(rest):
        return
    try:
        claim(run_dir, resuming_from_argv(rest))
    except ScaledrillError as err:
        print(f"scaledrill run: error: {err}", file=sys.stderr)
        raise SystemExit(err.exit_code) from None


def main(argv: list[str] | None = None) -> None:
    argv = sys.argv[1:] if argv is None else argv
    if not argv or argv[0] in ("-h", "--help", "help"):
        print(usage())
        raise SystemExit(0 if argv else 2)
    verb, rest = argv[0], argv[1:]
    if not sys.stdout.isatty():
        os.environ.setdefault("COLUMNS", "160")  # tables in logs and pipes: do not squeeze them to 80 columns
    if verb not in VERBS:
        print(f"scaledrill: unknown verb {verb!r}\n\n{usage()}", file=sys.stderr)
        raise SystemExit(2)
    if verb == "report" and rest and "=" not in rest[0] and not rest[0].startswith("-"):
        paths = [a for a in rest if "=" not in a and not a.startswith("-")]
        rest = [a for a in rest if a not in paths]
        if len(paths) == 1:  # `scaledrill report PATH`
            rest.insert(0, f"path={paths[0]}")
        else:  # `scaledrill report RUN1 RUN2 …`: the runs side by side
            quoted = ",".join("'" + p.replace("\\", "\\\\").replace("'", "\\'") + "'" for p in paths)
            rest.insert(0, f"path=[{quoted}]")
    if verb == "run":
        _claim_before_hydra(rest)
    if {"--help", "-h"} & set(rest):  # Hydra's help, in our words (config/store.py)
        rest += ["hydra/help=scaledrill", f"hydra.help.app_name='scaledrill {verb}'",
                 f"hydra.help.header='scaledrill {verb}: {VERBS[verb][0]}'"]
    sys.argv = [f"scaledrill {verb}", *rest]
    os.environ["HYDRA_FULL_ERROR"] = "1"  # Hydra raises its errors to us instead of printing them in its words
    try:
        _app(verb)()
    except Exception as err:
        if _started or os.environ.get("SCALEDRILL_DEBUG") == "1":
            raise
        # composition failed (unknown key or option, wrong type): bad input, in our words
        print(f"scaledrill {verb}: error: {composition_error(err)}", file=sys.stderr)
        raise SystemExit(2) from None


if __name__ == "__main__":
    main()
