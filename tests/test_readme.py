"""Every Python example in README.md runs as written, as a script (a new user copies them)."""

import os
import pathlib
import re
import subprocess
import sys

import pytest

README = pathlib.Path(__file__).resolve().parents[1] / "README.md"
BLOCKS = re.findall(r"```python\n(.*?)```", README.read_text(), flags=re.S)


@pytest.mark.parametrize("index", range(len(BLOCKS)))
def test_readme_example_runs(index, tmp_path):
    # examples refer to files under scenarios/ as a user in the repository root would
    (tmp_path / "scenarios").symlink_to(README.parent / "scenarios")
    script = tmp_path / f"example_{index + 1}.py"
    script.write_text(BLOCKS[index])
    # PYTHONPATH: run this checkout's fieldplan, whatever else is installed.
    env = dict(os.environ, MPLBACKEND="Agg",
               PYTHONPATH=os.pathsep.join([str(README.parent), *filter(None, [os.environ.get("PYTHONPATH")])]))
    proc = subprocess.run([sys.executable, str(script)], cwd=tmp_path, env=env,
                          capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, f"README example {index + 1} failed:\n{proc.stderr[-3000:]}"
