"""The Python API examples (README's "From Python", `calibrate.api`'s docstring) run
as saved scripts in a fresh interpreter, on the local engine, without an
``if __name__ == "__main__":`` guard."""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

import calibrate.api
from tests.synthetic import make_workspace

ROOT = Path(__file__).resolve().parents[1]


def readme_example() -> str:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text.split("### From Python", 1)[1]
    return re.search(r"```python\n(.*?)```", section, re.S).group(1)


def docstring_example() -> str:
    doc = calibrate.api.__doc__
    block = re.search(r"::\n\n((?:    .*\n|\n)+)", doc).group(1)
    return "\n".join(ln[4:] for ln in block.splitlines()).strip() + "\n"


def run_script(code: str, folder: Path) -> subprocess.CompletedProcess:
    """`code` saved as a script in `folder` (beside a small workspace called
    sample_data) and run there by a fresh interpreter."""
    make_workspace(folder / "sample_data")
    script = folder / "example.py"
    script.write_text(code, encoding="utf-8")
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    return subprocess.run([sys.executable, str(script)], cwd=folder, env=env,
                          capture_output=True, text=True, timeout=120)


def test_readme_example_runs_as_a_script(tmp_path):
    code = readme_example()
    assert 'open_session("sample_data")' in code and "__main__" not in code
    done = run_script(code, tmp_path)
    assert done.returncode == 0, done.stderr[-2000:]
    assert re.search(r"caught \d+ of 5 incidents with \d+ alerts over [\d.]+ scored days",
                     done.stdout), done.stdout
    assert (tmp_path / "alerts.csv").is_file()


def code_lines(code: str) -> list[str]:
    """Statements of `code` without comments and blank lines."""
    return [ln.split("  #")[0].rstrip() for ln in code.splitlines() if ln.strip()]


def test_api_docstring_example_is_the_tested_readme_example_shortened():
    # each docstring line is a line of the README example, in the same order: what
    # the script run above runs covers it (a second interpreter would add seconds)
    doc, readme = code_lines(docstring_example()), iter(code_lines(readme_example()))
    assert len(doc) >= 4 and all(line in readme for line in doc), doc
