"""Every Python example in README.md runs as written (a new user copies them)."""

import pathlib
import re

import pytest

README = pathlib.Path(__file__).resolve().parents[1] / "README.md"
BLOCKS = re.findall(r"```python\n(.*?)```", README.read_text(), flags=re.S)


@pytest.mark.parametrize("index", range(len(BLOCKS)))
def test_readme_example_runs(index, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    code = BLOCKS[index]
    exec(compile(code, f"README.md example {index + 1}", "exec"), {"__name__": "__readme__"})
    assert BLOCKS
