"""Register the schemas (config/schema.py, config/verbs_schema.py) in Hydra's ConfigStore.

Importing this module is enough: the CLI, replay's re-composition (config/overrides.py)
and the tests import it before they compose. Each group's YAML options start from
`base_<...>` of their group; the verbs' YAML roots start from `base_run` and their own.
"""

from hydra.core.config_store import ConfigStore
from omegaconf import OmegaConf

from scaledrill.config.schema import GROUPS, RunConfig, TaskConfig
from scaledrill.config.verbs_schema import AdoptRoot, CheckRoot, ClusterConfig, ForecastRoot, LadderRoot, ReplayRoot, ReportRoot


HELP = {  # `scaledrill VERB --help` in our words; the CLI passes app_name and header per verb
    "app_name": "scaledrill",
    "header": "",
    "footer": "",
    "template": "${hydra.help.header}\n\nusage: ${hydra.help.app_name} [key=value ...]   (Hydra overrides: key=value changes a "
                "key, +key=value adds one, group=option picks an option, -m sweeps comma-separated values)\n\n"
                "== Option groups (group=option; base_* are the schemas the options build on) ==\n$APP_CONFIG_GROUPS\n"
                "== This verb's configuration with its defaults ==\n$CONFIG\n"
                "Every key's type and default: scaledrill/config/schema.py and verbs_schema.py; the rules on their values: "
                "scaledrill/config/rules.py; each verb: the README.",
}


def register() -> None:
    store = ConfigStore.instance()
    store.store(group="hydra/help", name="scaledrill", node=HELP)
    for group, schemas in GROUPS.items():
        for name, node in schemas.items():
            if node is TaskConfig:  # stored untyped, so `~task.model` can swap in a model of the user's own
                node = OmegaConf.to_container(OmegaConf.structured(TaskConfig))
            store.store(group=group, name=name, node=node)
    store.store(group="forecast", name="base_cluster", node=ClusterConfig)
    store.store(name="base_run", node=RunConfig)
    store.store(name="base_check", node=CheckRoot)  # a run's root and the verb's own keys
    store.store(name="base_ladder", node=LadderRoot)
    store.store(name="base_replay", node=ReplayRoot)
    store.store(name="base_adopt", node=AdoptRoot)
    store.store(name="base_forecast", node=ForecastRoot)
    store.store(name="base_report", node=ReportRoot)


register()
