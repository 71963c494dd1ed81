"""The README's Python example runs as written (examples in the docs are checked, as
SimPy's documentation does with its own examples)."""
import re
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def test_the_readme_python_example_runs(capsys, monkeypatch):
    readme = (ROOT / "README.md").read_text()
    [example] = re.findall(r"```python\n(.*?)```", readme, flags=re.S)
    monkeypatch.chdir(ROOT)
    exec(compile(example, "README.md", "exec"), {})
    printed = capsys.readouterr().out
    assert "recovering" in printed  # the trace's states
    assert "usual_care" in printed and "agrees" in printed  # the frontier and the verdict
