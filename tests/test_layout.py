import pytest

from scaledrill.config.rules import check_layout
from scaledrill.errors import ConfigError
from scaledrill.layout import Layout


def test_global_batch_and_worker_ids():
    layout = Layout(workers=64, procs=4, micro_batch=8, accum=2, backend="gloo")
    assert layout.global_batch == 64 * 8 * 2
    assert layout.per_proc == 16
    assert list(layout.worker_ids(2)) == list(range(32, 48))
    assert "B=1024" in layout.describe()


@pytest.mark.parametrize(
    "fields, key",
    [
        (dict(workers=6, procs=4), "layout.workers"),
        (dict(workers=0), "layout.workers"),
        (dict(micro_batch=-1), "layout.micro_batch"),
        (dict(accum=1.5), "layout.accum"),
        (dict(backend="nccl"), "layout.backend"),
        (dict(procs=2, workers=4), "layout.procs"),  # local backend hosts one process
    ],
)
def test_bad_layouts_name_the_key(fields, key):
    base = dict(workers=8, procs=1, micro_batch=4, accum=1, backend="local")
    with pytest.raises(ConfigError) as err:
        check_layout({**base, **fields})  # config/rules.py: a Layout holds what it is given
    assert err.value.key == key
    assert str(err.value).startswith(key)
