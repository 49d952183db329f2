"""The README's example runs as written, and its set-up section gives exactly two commands."""

import re
from pathlib import Path

import stratagem as sg

README = Path(__file__).resolve().parents[1] / "README.md"


def test_first_analysis_example_runs(tmp_path, monkeypatch):
    text = README.read_text(encoding="utf-8")
    code = re.search(r"## A first analysis\n\n```python\n(.*?)```", text, re.S).group(1)
    monkeypatch.chdir(tmp_path)
    namespace: dict = {}
    exec(compile(code, "README.md", "exec"), namespace)  # the README's own example, run as a user would
    a = namespace["a"]
    assert len(a.strata) == 4 and a.spec.method == "aipw"
    again = sg.analyze(sg.demo_data(), a.spec)
    assert a.strata["estimate"].equals(again.strata["estimate"])
    assert (tmp_path / "report.html").stat().st_size > 1000


def test_setup_section_has_two_commands_and_ci_runs_the_test_one():
    text = README.read_text(encoding="utf-8")
    setup = text.split("## Set-up on a fresh machine", 1)[1].split("\n## ", 1)[0]
    commands = re.findall(r"```bash\n(.*?)\n```", setup, re.S)
    assert len(commands) == 2
    assert "stratagem demo" in commands[0]
    ci = (README.parent / ".ci" / "run").read_text(encoding="utf-8")
    assert commands[1] in ci
