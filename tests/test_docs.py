import subprocess
import sys
from pathlib import Path

from tests.conftest import ROOT


def test_cli_doc_matches_the_typer_app(tmp_path: Path):
    out = tmp_path / "cli.md"
    subprocess.run([sys.executable, "-m", "typer", "coldindex.cli", "utils", "docs", "--name",
                    "coldindex", "--output", str(out)], check=True, capture_output=True)
    assert out.read_text() == (ROOT / "docs" / "cli.md").read_text(), (
        "docs/cli.md drifted from the CLI; regenerate it with `python -m typer coldindex.cli "
        "utils docs --name coldindex --output docs/cli.md`")


def test_readme_commands_match_ci():
    readme = (ROOT / "README.md").read_text()
    ci = (ROOT / ".ci" / "run").read_text()
    test_cmd = next(line for line in ci.splitlines() if "pytest" in line).strip()
    assert test_cmd in readme
    assert "coldindex demo" in readme
