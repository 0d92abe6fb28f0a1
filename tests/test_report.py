"""The HTML report: every kind of directory renders its figures and tables, self-contained."""

import json
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from omegaconf import OmegaConf

from conftest import composed
from scaledrill.commands.report import report_verb
from scaledrill.errors import ConfigError
from scaledrill.forecast import CAUTION, forecast_json, project_rungs, validate
from scaledrill.forecast.project import compare_to_baseline, project_baseline
from scaledrill.report import find_results
from scaledrill.telemetry.store import RunStore

ROOT = Path(__file__).resolve().parents[1]
LAYERS = ("conv1.weight", "conv2.weight", "head.weight")


class Page(HTMLParser):
    """Sections with their images and table captions, and every outside reference."""

    def __init__(self, text: str):
        super().__init__()
        self.sections, self.external, self._caption, self._current = {}, [], False, None
        self.classes = []
        self.feed(text)

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        for name in ("src", "href"):
            value = attrs.get(name)
            if value is not None and not value.startswith(("data:", "#")):
                self.external.append(value)
        if tag == "section":
            self._current = attrs["id"]
            self.sections[self._current] = {"imgs": [], "captions": []}
        elif tag == "img":
            self.sections[self._current]["imgs"].append(attrs)
        elif tag == "caption":
            self._caption = True
            self.sections[self._current]["captions"].append("")
        elif tag == "tr" and "class" in attrs:
            self.classes.append(attrs["class"])
        elif tag in ("link", "script", "iframe"):
            self.external.append(tag)

    def handle_endtag(self, tag):
        if tag == "caption":
            self._caption = False

    def handle_data(self, data):
        if self._caption:
            self.sections[self._current]["captions"][-1] += data


def render(path: Path, tmp_path: Path) -> tuple[str, Page]:
    report_verb(OmegaConf.create({"path": str(path), "out": None, "debug": False}), tmp_path)
    text = (path / "report.html").read_text(encoding="utf-8")
    return text, Page(text)


def pngs(section: dict) -> list[dict]:
    imgs = section["imgs"]
    assert all(i["src"].startswith("data:image/png;base64,") and len(i["src"]) > 2000 and i["alt"] for i in imgs)
    return imgs


# ------------------------------------------------------------------ synthetic directories


def make_run(directory: Path, steps: int = 30, compression: bool = True, summary_extra: dict | None = None) -> Path:
    directory.mkdir(parents=True)
    store = RunStore(directory / "run.sqlite", flush_every=7)
    store.start("run", "task: digits\n")
    for step in range(1, steps + 1):
        values = {"loss": 2.3 / step, "lr": 0.1 * min(1, step / 5), "grad_norm": 3.0 / step, "grad_norm_clipped": 1.0,
                  "b_simple": 40.0 + step, "critical_batch": 60.0 + step}  # fmt: skip
        if compression:
            values |= {"cosine_to_exact": 0.9, "rel_error_to_exact": 0.3, "wire_bytes_per_worker": 1024.0}
        store.log_scalars(step, values)
        if step % 5 == 0:
            store.log_layers(step, {n: {"weight_norm": 1.0, "update_ratio": 1e-3 * (i + 1) * step, "trust_ratio": 0.5}
                                    for i, n in enumerate(LAYERS)})  # fmt: skip
    store.log_event(20, "grad_spike", {"factor": 4.0})
    store.close()
    summary = {"workers": 8, "procs": 1, "micro_batch": 16, "accum": 1, "global_batch": 128, "task": "digits",
               "final_loss": 2.3 / steps, "eval": {"accuracy": 0.91}, "diverged": False,
               "eval_history": {"10": {"accuracy": 0.5}, "20": {"accuracy": 0.8}, "30": {"accuracy": 0.91}}}  # fmt: skip
    (directory / "summary.json").write_text(json.dumps(summary | (summary_extra or {})))
    (directory / "incident-20.json").write_text(json.dumps({"step": 20, "reason": "grad_spike",
                                                            "first_layer": "conv2.weight"}))  # fmt: skip
    return directory


def make_check(directory: Path, ok: bool) -> Path:
    directory.mkdir(parents=True)
    layers = [{"layer": n, "max_abs": 1e-7, "max_rel": 1e-6, "tolerance": 1e-5, "ok": True} for n in LAYERS]
    bad = [{"layer": "head.weight", "max_abs": 0.2, "max_rel": 0.4, "tolerance": 1e-5, "ok": ok}]
    doc = {"verdict": "match" if ok else "mismatch", "tolerance_rule": "1e-5 * sqrt(k)",
           "paths": [{"name": "accumulation", "ok": True, "layers": layers,
                      "trajectory": {"steps": 5, "max_abs": 1e-6, "tolerance": 1e-4, "ok": True}},
                     {"name": "virtual workers", "ok": ok, "layers": bad, "trajectory": None}],
           "diagnosis": [] if ok else [{"cause": "batch norm over the whole batch", "evidence": "only BN layers differ",
                                        "fix": "set task.model.group_size"}]}  # fmt: skip
    (directory / "check.json").write_text(json.dumps(doc))
    return directory


def make_replay(directory: Path) -> Path:
    make_run(directory / "original", steps=20, compression=False)
    for name in ("base", "lower_lr"):
        make_run(directory / "variants" / name, steps=20, compression=False)
    (directory / "cluster_log.csv").write_text("step,loss,grad_norm\n" + "".join(
        f"{s},{2.0 / s:.4f},{1.0 + s / 10:.3f}\n" for s in range(1, 21)))  # fmt: skip
    doc = {"checkpoint": "original/checkpoints/step-10.pt", "from_step": 10, "cluster_log": "cluster_log.csv",
           "departure_step": 14, "variants": [
               {"name": n, "overrides": ["optim.lr=0.05"] if n != "base" else [], "run_dir": f"variants/{n}",
                "final_loss": 0.1, "diverged": False} for n in ("base", "lower_lr")]}  # fmt: skip
    (directory / "replay.json").write_text(json.dumps(doc))
    return directory


def make_ladder(directory: Path) -> Path:
    directory.mkdir(parents=True)
    s_min, b_noise = 100.0, 512.0  # S = S_min (1 + B_noise / B)
    rungs = [{"global_batch": b, "lr": 0.1 * b / 64, "steps_to_target": round(s_min * (1 + b_noise / b)),
              "samples_to_target": None, "final_metric": 0.9, "diverged": False, "noise_scale": 500.0,
              "wall_seconds": 3.0, "regime": "perfect scaling", "run_dir": f"rung-{b}"} for b in (64, 256, 1024)]
    rungs.append(rungs[-1] | {"global_batch": 4096, "steps_to_target": None, "diverged": True, "regime": None})
    search = {str(r["global_batch"]): {"best_lr": r["lr"], "window": [r["lr"] / 2, r["lr"] * 2], "samples_spent": 9000,
              "trials": [{"lr": r["lr"] * f, "reached": f < 4, "diverged": f >= 4, "pruned": False, "steps": 50}
                         for f in (0.25, 1, 4)]} for r in rungs}  # fmt: skip
    doc = {"grow": "workers", "rungs": rungs, "search": search,
           "fit": {"s_min": s_min, "e_min": s_min * b_noise, "b_noise": b_noise, "b_crit": b_noise}}  # fmt: skip
    (directory / "ladder.json").write_text(json.dumps(doc))
    return directory


def make_forecast(directory: Path) -> Path:
    directory.mkdir(parents=True, exist_ok=True)
    cluster = validate(composed("forecast", "example"))
    rungs = [{"global_batch": 256, "steps_to_target": 4000}, {"global_batch": 4096, "steps_to_target": 600},
             {"global_batch": 65536, "steps_to_target": None}]  # fmt: skip
    rows = project_rungs(cluster, rungs, 2e9, 4e8, None)
    (directory / "forecast.json").write_text(json.dumps(forecast_json(cluster, rows, 2e9, 4e8, None, {"x": "y"})))
    return directory


# ------------------------------------------------------------------ one kind at a time


def test_run_report_has_every_curve_heatmap_and_table(tmp_path, capsys):
    run = make_run(tmp_path / "run")
    text, page = render(run, tmp_path)
    assert capsys.readouterr().out.strip() == str(run / "report.html")
    (section,) = page.sections.values()
    alts = [i["alt"] for i in pngs(section)]
    # loss, lr, grad norm, noise scale, eval metrics, the update-ratio heatmap; compression fidelity, bytes and
    # the trust ratio are constant in make_run, so each is one sentence instead of a flat picture
    assert len(alts) == 6 and not any("Compression" in a or "Bytes" in a or "trust" in a for a in alts)
    assert "Per-layer trust ratio: 0.5 in every one of 3 layers at every one of 6 logged steps" in text
    assert "Compression fidelity: cosine_to_exact 0.9 at every one of 30 logged steps; rel_error_to_exact 0.3" in text
    assert "wire_bytes_per_worker 1024 at every one of 30 logged steps" in text
    assert "Finished" not in text or "Diverged" not in text
    assert any("grad_norm, grad_norm_clipped" in a for a in alts)
    assert any("update / weight norm (3 layers × 6 steps)" in a for a in alts)
    assert section["captions"] == ["Run summary", "Final evaluation", "Events the run recorded",
                                   "Incidents (divergence records)"]  # fmt: skip
    assert "grad_spike" in text and "conv2.weight" in text and "Not recorded here" not in text
    assert page.external == []


def test_an_incident_names_the_worker_that_blew_up(tmp_path):
    run = make_run(tmp_path / "run")
    workers = {"step": 20, "rule": "median/MAD", "loss": [1.0, 1.1, 162.0, 0.9], "grad_norm": [0.9, 1.0, 1442.0, 0.8],
               "outliers": [{"worker": 2, "loss": 162.0, "grad_norm": 1442.0, "samples": [464, 465, 362, 17],
                             "worst_samples": [{"index": 362, "loss": 1287.8}, {"index": 15, "loss": 1.6}]}]}
    (run / "incident-20.json").write_text(json.dumps({"step": 20, "reason": "loss rise", "workers": workers}))
    text, page = render(run, tmp_path)
    (section,) = page.sections.values()
    assert section["captions"][-1].startswith("Which worker blew up")
    assert "362 (loss 1288)" in text and "464 465 362 17" in text


def test_a_bare_run_says_what_is_absent(tmp_path):
    run = tmp_path / "bare"
    run.mkdir()
    (run / "summary.json").write_text(json.dumps({"final_loss": 1.5, "diverged": True, "stop_reason": "nan loss"}))
    text, page = render(run, tmp_path)
    (section,) = page.sections.values()
    assert section["imgs"] == [] and section["captions"] == ["Run summary"]
    assert "Not recorded here: run.sqlite (no curves)." in text
    assert "Diverged (nan loss)." in text and 'class="tag poor">diverged<' in text


@pytest.mark.parametrize("ok", [True, False])
def test_check_report_colours_each_layer_and_shows_diagnosis(tmp_path, ok):
    text, page = render(make_check(tmp_path / "check", ok), tmp_path)
    (section,) = page.sections.values()
    assert section["imgs"] == []
    assert section["captions"][:2] == ["Gradient of each path vs the true large batch, per layer",
                                       "Parameter trajectory after several steps"]  # fmt: skip
    # four layer rows and one trajectory row; the head layer of the second path is outside when not ok
    assert page.classes == ["ok"] * 3 + ["ok" if ok else "bad"] + ["ok"]
    assert ("Diagnosis: likely causes of the mismatch" in section["captions"]) is not ok
    assert ("verdict: mismatch" in text) is not ok and ("set task.model.group_size" in text) is not ok
    sentence = ("Every one of 2 gradient paths (accumulation, virtual workers) matches the true large-batch gradient"
                if ok else "Mismatch on virtual workers of 2 gradient paths (accumulation, virtual workers); likely "
                "cause: batch norm over the whole batch.")  # fmt: skip
    assert sentence in text.split('<section')[0]  # in the summary at the top


def test_replay_report_overlays_variants_original_and_cluster_log(tmp_path):
    text, page = render(make_replay(tmp_path / "replay"), tmp_path)
    assert list(page.sections) == ["replay"]  # the variant and original runs are not listed again
    section = page.sections["replay"]
    alts = [i["alt"] for i in pngs(section)]
    assert alts == ["loss of run before step 10, base, lower_lr, cluster log against step, resume and departure marked",
                    "global gradient norm of run before step 10, base, lower_lr, cluster log against step, resume and "
                    "departure marked"]  # fmt: skip
    assert section["captions"] == ["Variants resumed at step 10 from original/checkpoints/step-10.pt"]
    assert "optim.lr=0.05" in text and "Not recorded here" not in text
    assert "the unchanged replay departs from the cluster log at step 14" in text


def test_ladder_report_with_forecast_beside_it(tmp_path):
    ladder = make_forecast(make_ladder(tmp_path / "ladder"))
    text, page = render(ladder, tmp_path)
    assert list(page.sections) == ["ladder", "forecast"]
    lad, fc = page.sections["ladder"], page.sections["forecast"]
    assert [i["alt"][:22] for i in pngs(lad)] == ["Steps to target agains", "Learning-rate trials a"]
    assert lad["captions"] == ["Rungs (grow: workers)", "Fit S = S_min(1 + B_noise/B) (McCandlish et al. 2018)",
                               "Learning-rate search per rung"]  # fmt: skip
    assert len(pngs(fc)) == 1 and "cheapest and fastest marked" in fc["imgs"][0]["alt"]
    assert fc["captions"] == ["Projection per rung", "Cluster as described", "Inputs of the projection",
                              "Where each input came from", "Rules of the model"]  # fmt: skip
    assert CAUTION in text and "not promises" in text and "A trial on the target hardware decides" in text
    assert page.classes.count("pick") >= 1 and page.classes.count("bad") == 1  # the diverged 4096 rung


def test_forecast_report_marks_cheapest_and_fastest_rows(tmp_path):
    directory = make_forecast(tmp_path / "fc")
    doc = json.loads((directory / "forecast.json").read_text())
    picks = [r["global_batch"] for r in doc["rungs"] if r["cheapest"] or r["fastest"]]
    text, page = render(directory, tmp_path)
    assert page.classes.count("pick") == len(picks) >= 1
    assert "65536" in text and "–" in text  # the rung that never reached the target has no cost


def test_forecast_report_leads_with_the_baseline_and_compares_every_row_to_it(tmp_path):
    cluster = validate(composed("forecast", "example"))
    rungs = [{"global_batch": 1024, "steps_to_target": 1250}, {"global_batch": 8192, "steps_to_target": 160}]
    rows = project_rungs(cluster, rungs, 2e9, 4e8, None)
    baseline = project_baseline(cluster, 256, 8, 5000, 2e9, 4e8, None)
    compare_to_baseline(rows, baseline)
    directory = tmp_path / "fc"
    directory.mkdir()
    doc = forecast_json(cluster, rows, 2e9, 4e8, None, {"x": "y"}, baseline=baseline)
    (directory / "forecast.json").write_text(json.dumps(doc))
    text, page = render(directory, tmp_path)
    assert page.sections["forecast"]["captions"][0] == "Projection per rung, the baseline first"
    assert "<th>speed-up vs baseline (×)</th>" in text and "<td>baseline</td>" in text
    fastest = next(r for r in rows if r["fastest"])
    # speed-up = baseline time / row time, independently recomputed from the two rows' own times
    assert fastest["speed_up"] == pytest.approx(baseline["time_to_target_s"] / fastest["time_to_target_s"])
    assert "the speed of the baseline (B=256 on 8 devices)" in text


# ------------------------------------------------------------------ a tree of results, errors, the CLI


def test_top_directory_renders_one_section_per_result(tmp_path):
    top = tmp_path / "demo"
    make_check(top / "check", False)
    make_ladder(top / "ladder")
    make_forecast(top / "forecast")
    make_run(top / "ladder" / "rung-64")  # inside the ladder: not a section of its own
    assert [(n, d.name) for n, d in find_results(top)] == [
        ("check.json", "check"), ("forecast.json", "forecast"), ("ladder.json", "ladder")]  # fmt: skip
    text, page = render(top, tmp_path)
    # in the order a reader asks: plumbing, where scaling breaks, what it costs
    assert list(page.sections) == ["check-check", "ladder-ladder", "forecast-forecast"]
    assert sum(len(s["imgs"]) for s in page.sections.values()) == 3
    assert all(f'href="#{sid}"' in text for sid in page.sections) and page.external == []


def test_unreadable_file_becomes_a_note(tmp_path):
    directory = tmp_path / "broken"
    directory.mkdir()
    (directory / "check.json").write_text("{not json")
    text, page = render(directory, tmp_path)
    assert "check.json could not be read" in text and len(page.sections) == 1


@pytest.mark.parametrize("path", ["missing", "empty"])
def test_bad_path_names_the_key(tmp_path, path):
    (tmp_path / "empty").mkdir()
    with pytest.raises(ConfigError) as err:
        report_verb(OmegaConf.create({"path": str(tmp_path / path), "out": None}), tmp_path)
    assert err.value.key == "path"


def test_cli_writes_only_the_report(tmp_path):
    import subprocess
    import sys

    run = make_check(tmp_path / "run", ok=True)  # no figures: this test is about the command line
    before = sorted(p.name for p in run.iterdir())
    done = subprocess.run([sys.executable, "-m", "scaledrill.cli", "report", str(run)], cwd=tmp_path, capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip().endswith("report.html")
    assert sorted(p.name for p in run.iterdir()) == sorted([*before, "report.html"])
    assert sorted(p.name for p in tmp_path.iterdir()) == ["run"]  # no Hydra folder or log in the cwd
    bad = subprocess.run([sys.executable, "-m", "scaledrill.cli", "report", str(tmp_path / "nowhere")], cwd=tmp_path,
                         capture_output=True, text=True)
    assert bad.returncode == 2 and "path: must be an existing directory" in bad.stderr
    assert not (tmp_path / "nowhere").exists()


def test_replay_report_names_a_malformed_cluster_log_instead_of_drawing_it(tmp_path):
    directory = make_replay(tmp_path / "replay")
    (directory / "cluster_log.csv").write_text("step,loss\n1,2.0\n3,1.5\n2,1.4\n")  # steps must increase
    text, page = render(directory, tmp_path)
    alts = [i["alt"] for i in pngs(page.sections["replay"])]
    assert alts and all("cluster log" not in a for a in alts)
    assert "Not recorded here: cluster log" in text and "line 4" in text


# ------------------------------------------------------------------ sweeps


def make_multirun(top: Path, lrs=(0.05, 0.1, 0.4)) -> Path:
    """Hydra's multirun layout: top/DATE/TIME/N/ with .hydra/overrides.yaml; the last lr diverges."""
    base = top / "2026-01-01" / "10-00-00"
    for n, lr in enumerate(lrs):
        bad = n == len(lrs) - 1
        run = make_run(base / str(n), steps=20, compression=False,
                       summary_extra={"final_loss": float("nan") if bad else 0.5 / (n + 1), "diverged": bad,
                                      "stop_reason": "loss spike at step 12: far above" if bad else None,
                                      "steps": 12 if bad else 20})  # fmt: skip
        (run / ".hydra").mkdir()
        (run / ".hydra" / "overrides.yaml").write_text(f"- task=digits\n- optim.lr={lr}\n- train.progress=false\n")
    (base / "multirun.yaml").write_text("hydra: {}\n")
    return top


def test_a_multirun_folder_is_compared_side_by_side(tmp_path):
    text, page = render(make_multirun(tmp_path / "multirun"), tmp_path)
    assert next(iter(page.sections)) == "sweep"  # before the three run sections
    sweep = page.sections["sweep"]
    # only the key that differs between the runs is a column; task=digits is the same everywhere
    assert "<th>optim.lr</th>" in text and "<th>task</th>" not in text
    assert sweep["captions"] == ["The runs side by side (swept keys as columns; best and unstable marked)"]
    # rows in run order 0, 1, 2: final losses 0.5, 0.25, NaN → the best is run 1, run 2 diverged
    assert page.classes[:2] == ["pick", "bad"]  # (a plain row has no class)
    assert '<tr class="pick"><td>2026-01-01/10-00-00/1</td>' in text and '<tr class="bad"><td>2026-01-01/10-00-00/2<' in text
    assert "3 runs over optim.lr: best optim.lr=0.1 (final training loss 0.25); unstable: optim.lr=0.4." in text
    assert [i["alt"] for i in pngs(sweep)] == ["Training loss of 3 runs against step, overlaid"]


def test_several_run_folders_compare_on_the_config_keys_that_differ(tmp_path):
    for name, lr in (("a", 0.1), ("b", 0.2)):
        make_run(tmp_path / name, steps=10, compression=False)
        (tmp_path / name / "config.yaml").write_text(f"optim:\n  lr: {lr}\n  name: sgd\ntrain:\n  seed: 0\n")
    cfg = OmegaConf.create({"path": [str(tmp_path / "a"), str(tmp_path / "b")], "out": None, "debug": False})
    report_verb(cfg, tmp_path)
    text = (tmp_path / "report.html").read_text(encoding="utf-8")  # the common parent of the two
    assert "2 runs over optim.lr: best" in text and "<th>optim.name</th>" not in text


def test_one_rung_jobs_are_gathered_into_one_ladder_but_two_recipes_are_not(tmp_path):
    whole = json.loads((make_ladder(tmp_path / "whole") / "ladder.json").read_text())
    jobs = tmp_path / "multirun" / "2026-01-01" / "10-00-00"
    for n, rung in enumerate(whole["rungs"]):
        (jobs / str(n) / ".hydra").mkdir(parents=True)
        (jobs / str(n) / ".hydra" / "overrides.yaml").write_text(f"- optim=sgd\n- ladder.batches=[{rung['global_batch']}]\n")
        (jobs / str(n) / "ladder.json").write_text(json.dumps(dict(whole, rungs=[rung], fit=None, search=None)))
    text, page = render(tmp_path / "multirun", tmp_path)
    assert list(page.sections) == ["ladder-2026-01-01-10-00-00"]  # the jobs' own one-rung sections are dropped
    assert len(page.sections["ladder-2026-01-01-10-00-00"]["imgs"]) == 1  # steps vs batch with the fit
    # the synthetic rungs follow S = 100(1 + 512/B) exactly, so the gathered fit finds B_crit = 512
    assert "Gathered from 4 jobs. Critical batch ≈ 512 samples" in text

    make_ladder(tmp_path / "two" / "sgd")
    make_ladder(tmp_path / "two" / "lamb")  # the same batches with another optimizer: two ladders, not one
    text, page = render(tmp_path / "two", tmp_path)
    assert "Gathered" not in text and len(page.sections) == 2


def test_cli_reports_several_run_folders_side_by_side(tmp_path):
    import subprocess
    import sys

    for name, lr in (("lr 0.1", 0.1), ("lr-0.2", 0.2)):  # a space in a path survives the list override
        make_run(tmp_path / name, steps=10, compression=False)
        (tmp_path / name / "config.yaml").write_text(f"optim:\n  lr: {lr}\n")
    done = subprocess.run([sys.executable, "-m", "scaledrill.cli", "report", str(tmp_path / "lr 0.1"),
                           str(tmp_path / "lr-0.2")], cwd=tmp_path, capture_output=True, text=True, check=False)  # fmt: skip
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == str(tmp_path / "report.html")
    text = (tmp_path / "report.html").read_text(encoding="utf-8")
    assert "Sweep of 2 runs" in text and "<th>optim.lr</th>" in text


@pytest.mark.parametrize("low, high", [(30.0, 45.0), (41.0, 70.0), (8.0, 4096.0), (1e-3, 2e-2)])
def test_log_axes_label_plain_numbers_that_do_not_crowd(low, high):
    from matplotlib.figure import Figure

    from scaledrill.report.figures import readable_log

    ax = Figure().subplots()
    ax.set_yscale("log")
    ax.set_ylim(low, high)
    readable_log(ax, "y")
    ticks = [t for t in ax.get_yticks() if low <= t <= high]
    labels = [ax.yaxis.get_major_formatter()(t, i) for i, t in enumerate(ticks)]
    assert 3 <= len(ticks) <= 7 and all("×" not in lab for lab in labels), labels  # 0.002, 50, 4096: plain
    # neighbours at least 10% apart on the log scale: labels of ~8 pt on a ~250 px axis do not touch
    gaps = np.diff(np.log10(ticks)) / np.log10(high / low)
    assert gaps.min() > 0.1, (ticks, labels)
    assert ax.yaxis.get_minor_formatter()(ticks[0] * 1.5, 0) == ""  # no minor labels at all
