"""The wheel: built from this tree, installed (not editable) into a fresh environment, and
run there, proving that the sql/ templates ship inside it as bigpanel/sql.

Offline: the build uses the hatchling installed beside the tests (no build isolation), and
the fresh environment sees the test environment's installed dependencies through a .pth
file (a venv's --system-site-packages would only reach the base interpreter's, which lacks
them). Paths in a .pth file are added as plain entries, so an editable install of bigpanel
in the test environment stays invisible there."""

from __future__ import annotations

import os
import subprocess
import sys
import sysconfig
import zipfile
from pathlib import Path

import pyarrow.parquet as pq

from checkup_data import make_panel

REPO = Path(__file__).resolve().parent.parent


def _run(args: list[str], cwd: Path, env: dict[str, str] | None = None) -> subprocess.CompletedProcess:
    done = subprocess.run(args, cwd=cwd, env=env, capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, f"{args[:4]} failed:\n{done.stdout}\n{done.stderr}"
    return done


def test_wheel_installs_and_runs_the_checkup(tmp_path):
    dist = tmp_path / "dist"
    _run([sys.executable, "-m", "build", "--wheel", "--no-isolation", "--outdir", str(dist), str(REPO)], cwd=tmp_path)
    (wheel,) = dist.glob("bigpanel-*.whl")
    names = zipfile.ZipFile(wheel).namelist()
    templates = sorted(p.name for p in (REPO / "sql").glob("*.sql"))
    assert sorted(n.removeprefix("bigpanel/sql/") for n in names if n.startswith("bigpanel/sql/")) == templates
    assert not any(n.startswith(("tests/", "sql/")) for n in names)

    venv = tmp_path / "venv"
    _run([sys.executable, "-m", "venv", "--without-pip", str(venv)], cwd=tmp_path)
    python = venv / "bin" / "python"
    _run([sys.executable, "-m", "pip", "--python", str(python), "install", "--no-deps", "--no-index", "--quiet", str(wheel)],
         cwd=tmp_path)
    purelib = Path(_run([str(python), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"], cwd=tmp_path).stdout.strip())
    ours = {sysconfig.get_paths()["purelib"], sysconfig.get_paths()["platlib"]}
    (purelib / "test_dependencies.pth").write_text("\n".join(sorted(ours)) + "\n")

    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "PYTHONHOME", "VIRTUAL_ENV")}
    where = _run([str(python), "-c", "import bigpanel, bigpanel.sqlbuild as s; print(bigpanel.__file__); print(s._template_dir())"],
                 cwd=tmp_path, env=env).stdout.split()
    assert all(Path(p).is_relative_to(venv) for p in where), where

    pq.write_table(make_panel(seed=4), tmp_path / "depots.parquet")
    done = _run([str(venv / "bin" / "bigpanel"), "checkup", "depots.parquet", "--unit", "depot", "--period", "month"],
                cwd=tmp_path, env=env)
    assert done.stdout.startswith("Panel checkup of depots.parquet")
    assert "constant within every unit): region." in done.stdout
