"""The cluster-log parser: clear errors naming file and line, never a traceback; the departure step."""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from scaledrill.errors import DataError
from scaledrill.replay.cluster_log import ClusterLog, departure_step, parse_cluster_log, read_cluster_log


def test_reads_required_optional_and_ignores_other_columns(tmp_path):
    path = tmp_path / "job.csv"
    path.write_text("wall,step,loss,lr,grad_norm\n1.5,0,2.5,0.1,\n2.5,10,nan,0.2,3.0\n")
    log = read_cluster_log(path)
    assert log.steps.tolist() == [0, 10]
    assert log.loss[0] == 2.5 and math.isnan(log.loss[1])  # a diverged job logs nan: a number
    assert log.lr.tolist() == [0.1, 0.2]
    assert math.isnan(log.grad_norm[0]) and log.grad_norm[1] == 3.0  # empty optional cell = missing


@pytest.mark.parametrize(
    "text, message",
    [
        ("step,grad_norm\n0,1.0\n", "line 1: the header has no 'loss' column"),
        ("step,loss\n0,1.0\n1,abc\n", "line 3: loss 'abc' is not a number"),
        ("step,loss\n0,1.0\n5,0.9\n3,0.8\n", "line 4: step 3 is smaller than the step 5"),
        ("step,loss\n0,1.0\n1,0.9\n1,0.8\n", "line 4: step 1 repeats"),
        ("step,loss\n-2,1.0\n", "line 2: step -2 is negative"),
        ("step,loss\n1.5,1.0\n", "line 2: step '1.5' is not a whole number"),
        ("step,loss\n0,1.0,7\n", "line 2: 3 fields, but the header has 2"),
        ("step,loss\n0,\n", "line 2: the 'loss' cell is empty"),
        ("", "empty file"),
        ("step,loss\n", "a header but no data rows"),
    ],
)
def test_malformed_logs_name_the_file_and_line(tmp_path, text, message):
    path = tmp_path / "bad.csv"
    path.write_text(text)
    with pytest.raises(DataError) as err:
        read_cluster_log(path)
    assert str(path) in str(err.value) and message in str(err.value)


@settings(max_examples=300, deadline=None)
@given(st.text(alphabet=st.sampled_from(list("step,losgrad_n\n\r\"0123456789.-e x\x00")), max_size=120))
def test_fuzz_never_a_traceback(text):
    try:
        log = parse_cluster_log(text, "fuzz.csv")
    except DataError as err:
        assert str(err).startswith("fuzz.csv")
        return
    assert isinstance(log, ClusterLog) and len(log.steps) == len(log.loss) >= 1
    assert (np.diff(log.steps) > 0).all() and (log.steps >= 0).all()


@settings(max_examples=100, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 3), st.floats(allow_nan=False, width=32)), min_size=1, max_size=30))
def test_fuzz_valid_logs_read_back(gaps_and_losses):
    steps = np.cumsum([g + 1 for g, _ in gaps_and_losses]) - 1
    text = "step,loss\n" + "".join(f"{s},{x!r}\n" for s, (_, x) in zip(steps, gaps_and_losses))
    log = parse_cluster_log(text)
    assert log.steps.tolist() == steps.tolist()
    assert log.loss.tolist() == [float(x) for _, x in gaps_and_losses]


def test_departure_is_the_first_step_past_the_tolerance():
    steps = np.arange(0, 40)
    rehearsal = 2.0 * np.exp(-steps / 20)
    logged = rehearsal * np.where(steps < 25, 1.0 + 0.04 * np.sin(steps), 1.3)  # within 5 % until step 25
    log = ClusterLog("synthetic", steps[::2], logged[::2])  # the job logged every other step
    assert departure_step(log, steps, rehearsal, rtol=0.05) == 26  # 25 is not logged; 26 is the first logged past it
    assert departure_step(log, steps, rehearsal, rtol=0.5) is None
    nan_log = ClusterLog("synthetic", steps, np.where(steps < 30, rehearsal, np.nan))
    assert departure_step(nan_log, steps, rehearsal, rtol=0.05) == 30  # a NaN in only one of them departs
