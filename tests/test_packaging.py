"""The built wheel installs into a fresh environment and runs the demo from there."""

import site
import subprocess
import sys
import sysconfig
from pathlib import Path

import pytest

from tests.conftest import ROOT


@pytest.mark.slow
def test_wheel_installs_and_runs_the_demo(tmp_path: Path):
    dist = tmp_path / "dist"
    subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation",
                    "-q", "-w", str(dist), str(ROOT)], check=True, capture_output=True)
    wheel = next(dist.glob("coldindex-*.whl"))
    env = tmp_path / "venv"
    subprocess.run([sys.executable, "-m", "venv", "--without-pip", str(env)], check=True)
    # Dependencies come from this environment's site-packages (a path entry, so the
    # editable install of the checkout is not picked up); the package itself from the wheel.
    purelib = Path(sysconfig.get_paths(vars={"base": str(env), "platbase": str(env)})["purelib"])
    purelib.mkdir(parents=True, exist_ok=True)
    (purelib / "deps.pth").write_text("\n".join(site.getsitepackages()) + "\n")
    py = env / "bin" / "python"
    subprocess.run([sys.executable, "-m", "pip", "install", "--no-deps", "-q", "--target",
                    str(purelib), str(wheel)], check=True, capture_output=True)
    where = subprocess.run([str(py), "-c", "import coldindex; print(coldindex.__file__)"],
                           check=True, capture_output=True, text=True, cwd=tmp_path).stdout
    assert str(purelib) in where
    out = subprocess.run([str(py), "-m", "coldindex.cli", "demo", str(tmp_path / "d"),
                          "--sims", "2", "--boot", "19"], capture_output=True, text=True,
                         cwd=tmp_path)
    assert out.returncode == 0, out.stdout + out.stderr
    assert (tmp_path / "d" / "release" / "release-1" / "report.html").is_file()
