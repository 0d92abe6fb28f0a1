"""The report as a reader sees it: rendered by headless Chromium, with no broken image, no
horizontal scrolling, no console error, and every section present.

How: a copy of the page gets a small probe script at the top of <head>; it records
console errors and failed loads as they happen and, once the page has loaded, the
images that did not decode (naturalWidth 0), whether the document is wider than
the window, and the section ids, into a <pre id="probe"> node. Chromium's
--dump-dom prints the DOM after load, and the test reads the probe from it. The
screenshot is kept under runs/browser/ for a person to look at. The report itself
holds no script; only the copy does.
"""

import json
import re
import shutil
import subprocess
from pathlib import Path

import pytest
from omegaconf import OmegaConf

from conftest import ROOT, make_config
from scaledrill.commands.check import check_verb
from scaledrill.commands.forecast import forecast_verb
from scaledrill.commands.ladder import ladder_verb
from scaledrill.commands.report import report_verb
from scaledrill.train.run import run_verb

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
pytestmark = pytest.mark.skipif(CHROMIUM is None, reason="chromium is not installed (make test installs it as root)")
WIDTH = 1280
ARTIFACTS = ROOT / "runs" / "browser"

PROBE = """<script>
(function () {
  var errors = [];
  var original = console.error;
  console.error = function () { errors.push([].slice.call(arguments).join(" ")); original.apply(console, arguments); };
  window.addEventListener("error", function (e) {
    errors.push(e.message || ("failed to load " + (e.target && (e.target.alt || e.target.src || e.target.tagName))));
  }, true);
  window.addEventListener("load", function () {
    var root = document.documentElement;
    var all = [].slice.call(document.querySelectorAll("body *"));
    var probe = {
      errors: errors,
      broken: [].slice.call(document.images).filter(function (i) { return !i.complete || i.naturalWidth === 0; })
                .map(function (i) { return i.alt; }),
      images: document.images.length,
      scrollWidth: root.scrollWidth, innerWidth: window.innerWidth,
      wide: all.filter(function (e) { return e.getBoundingClientRect().right > window.innerWidth + 1 && !e.closest(".wide"); })
               .slice(0, 5).map(function (e) { return e.tagName + "." + e.className; }),
      sections: [].slice.call(document.querySelectorAll("section")).map(function (s) { return s.id; }),
      summary: [].slice.call(document.querySelectorAll("#summary li")).map(function (li) { return li.textContent; })
    };
    var out = document.createElement("pre");
    out.id = "probe";
    out.textContent = JSON.stringify(probe);
    document.body.appendChild(out);
  });
})();
</script>"""


def chromium(*args: str) -> str:
    done = subprocess.run([CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--hide-scrollbars",
                           f"--window-size={WIDTH},4000", "--virtual-time-budget=10000", *args],
                          capture_output=True, text=True, timeout=120, check=False)  # fmt: skip
    assert done.returncode == 0, done.stderr[-2000:]
    return done.stdout


def probe(page: Path, shot: Path | None = None) -> dict:
    """Load a probed copy of `page` in Chromium; what the probe saw, and a screenshot if asked."""
    copy = page.with_name(page.stem + ".probed.html")
    copy.write_text(page.read_text(encoding="utf-8").replace("<head>", "<head>" + PROBE, 1), encoding="utf-8")
    dom = chromium("--dump-dom", copy.as_uri())
    found = re.search(r'<pre id="probe">(.*?)</pre>', dom, re.DOTALL)
    assert found, f"the probe never ran (page did not load?):\n{dom[:500]}"
    if shot is not None:
        chromium(f"--screenshot={shot}", page.as_uri())
    return json.loads(found.group(1).replace("&quot;", '"').replace("&lt;", "<").replace("&gt;", ">").replace("&amp;", "&"))


def real_results(top: Path) -> None:
    """A small run, check, ladder and forecast, made by the verbs a user runs (fast settings)."""
    quad = ("task=quadratic", "task.data.dim=16", "optim.momentum=0", "layout.micro_batch=2", "train.progress=false")
    run_verb(make_config(*quad, "layout.workers=4", "train.steps=30", "optim.lr=0.5"), top / "run")
    check_verb(make_config("task=teacher", "task.model.hidden=16", "layout.workers=4", "layout.micro_batch=4",
                           "layout.accum=2", "check.paths=[accumulation,fused]", "check.steps=2", name="check"),
               top / "check")  # fmt: skip
    ladder_verb(make_config(*quad, "layout.workers=4", "optim.lr=0.5", "telemetry.layer_every=0", "train.eval_every=0",
                            "ladder.rungs=3", "ladder.goal.value=0.05", "ladder.check_every=2",
                            "ladder.max_steps=60", name="ladder"), top / "ladder")  # fmt: skip
    forecast_verb(make_config("task=digits", f"forecast.ladder={top / 'ladder'}", name="forecast"), top / "forecast")


def test_the_report_of_a_run_check_ladder_and_forecast_renders_cleanly(tmp_path):
    top = tmp_path / "results"
    real_results(top)
    report_verb(OmegaConf.create({"path": str(top), "out": None, "debug": False}), tmp_path)
    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    shot = ARTIFACTS / "report.png"
    seen = probe(top / "report.html", shot)
    assert seen["errors"] == [] and seen["broken"] == [], seen
    assert seen["scrollWidth"] <= seen["innerWidth"] == WIDTH and seen["wide"] == [], seen
    # question order: plumbing, where scaling breaks, what it costs, the run
    assert seen["sections"] == ["check-check", "ladder-ladder", "forecast-forecast", "run-run"], seen
    assert len(seen["summary"]) == 4 and all(len(line) > 40 for line in seen["summary"]), seen
    assert seen["images"] >= 4  # ladder scaling and forecast bars, run loss and more
    assert shot.stat().st_size > 50_000  # a real picture of a long page, not an empty frame
    shutil.copy(top / "report.html", ARTIFACTS / "report.html")


def test_the_probe_sees_a_broken_image_an_overflow_and_a_console_error(tmp_path):
    # the checks above can fail: a page with each fault is caught by the same probe
    page = tmp_path / "bad.html"
    page.write_text('<!DOCTYPE html><html><head><title>t</title></head><body><section id="a">'
                    '<img alt="broken" src="data:image/png;base64,AAAA"><div style="width:3000px">wide</div>'
                    '<script>console.error("boom")</script></section></body></html>')  # fmt: skip
    seen = probe(page)
    assert seen["broken"] == ["broken"] and seen["scrollWidth"] > WIDTH
    assert any("boom" in e for e in seen["errors"]) and seen["sections"] == ["a"]
