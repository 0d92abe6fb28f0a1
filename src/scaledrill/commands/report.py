"""`scaledrill report PATH`: one self-contained HTML page of every result under PATH (scaledrill.report)."""

from pathlib import Path

from scaledrill.errors import ConfigError
from scaledrill.report import _root, build_sections
from scaledrill.report.html import page


def report_verb(cfg, run_dir: Path) -> None:
    """Write the report page and print its path; `run_dir` (Hydra's) is not used."""
    root, results = _root(cfg)
    debug = cfg.debug
    sections = build_sections(root, results, debug)
    out = Path(str(cfg.out)).expanduser() if cfg.out else root / "report.html"
    if not out.parent.is_dir():
        raise ConfigError("out", "must be a file in an existing directory", str(out))
    out.write_text(page(f"scaledrill report: {root.resolve().name}", str(root), sections), encoding="utf-8")
    print(out)
