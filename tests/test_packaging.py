"""An installed wheel finds schemas/, broker-config/ and the bundled invented examples."""

from __future__ import annotations

import subprocess
import sys
import zipfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def test_wheel_carries_resources_and_finds_them(tmp_path: Path) -> None:
    subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "-q", "-w",
                    str(tmp_path), str(ROOT)], check=True, timeout=300)
    (wheel,) = tmp_path.glob("halfcycle-*.whl")
    site = tmp_path / "site"
    with zipfile.ZipFile(wheel) as z:
        z.extractall(site)
    schemas = sorted(p.name for p in (ROOT / "schemas").iterdir())
    code = (
        "import agent.resources as r, sys; "
        "print(r.schemas_dir()); print(r.broker_config_dir()); print(r.examples_dir()); "
        "print(','.join(sorted(p.name for p in r.schemas_dir().iterdir())))"
    )
    # -S: no site-packages, so not the editable install: the wheel's files alone.
    out = subprocess.run([sys.executable, "-S", "-c", code], capture_output=True, text=True,
                         check=True, env={"PYTHONPATH": str(site)}, cwd=tmp_path)
    schemas_dir, broker_dir, examples, names = out.stdout.splitlines()
    assert Path(schemas_dir) == site / "agent" / "_bundled" / "schemas"
    assert Path(broker_dir) == site / "agent" / "_bundled" / "broker-config"
    assert (Path(examples) / "invented-street.wav").is_file()
    assert names.split(",") == schemas
    # The page templates and their CSS/JS travel as package data (report --html, serve).
    with zipfile.ZipFile(wheel) as z:
        wheel_files = set(z.namelist())
    for part in ("agent/render/templates/base.html", "agent/render/templates/fleet.html",
                 "agent/render/static/hc.css", "agent/render/static/hc.js",
                 "agent/render/static/live.js"):
        assert part in wheel_files, part
