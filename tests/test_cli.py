"""The ``stratagem`` command: demo (a real JupyterLab), report and render."""

from __future__ import annotations

import json
import os
import re
import signal
import socket
import subprocess
import sys
import time
import urllib.request
from html.parser import HTMLParser
from pathlib import Path

import pandas as pd
import pytest

import stratagem as sg
from stratagem import cli


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _jupyter_env(tmp_path: Path) -> dict:
    env = dict(os.environ)
    for name in ("CONFIG", "DATA", "RUNTIME"):
        env[f"JUPYTER_{name}_DIR"] = str(tmp_path / "jupyter" / name.lower())
    return env


# -- demo --------------------------------------------------------------------------------------------
def test_demo_serves_the_quickstart_notebook(tmp_path):
    port = _free_port()
    out = tmp_path / "demo.out"
    with open(out, "w") as stdout:
        proc = subprocess.Popen(
            [sys.executable, "-m", "stratagem.cli", "demo", "--no-browser", "--port", str(port)],
            cwd=tmp_path, stdout=stdout, stderr=subprocess.DEVNULL, env=_jupyter_env(tmp_path),
            start_new_session=True,
        )
    try:
        url = None
        deadline = time.monotonic() + 90
        while url is None and time.monotonic() < deadline and proc.poll() is None:
            found = re.search(r"http://127\.0\.0\.1:(\d+)/lab/tree/quickstart\.ipynb\?token=(\w+)",
                              out.read_text())
            if found:
                url = found
            else:
                time.sleep(0.5)
        assert url is not None, f"no URL printed; output: {out.read_text()!r}"
        assert int(url.group(1)) == port
        token = url.group(2)
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/api/status?token={token}", timeout=10) as r:
            assert r.status == 200
        with urllib.request.urlopen(
            f"http://127.0.0.1:{port}/api/contents/quickstart.ipynb?token={token}", timeout=10
        ) as r:
            served = json.load(r)
        assert served["type"] == "notebook"
        shipped = json.loads(cli.quickstart_source().read_text())
        assert len(served["content"]["cells"]) == len(shipped["cells"])
        assert (tmp_path / "stratagem-demo" / "quickstart.ipynb").is_file()
    finally:
        proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(timeout=30)
        except subprocess.TimeoutExpired:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()
    # JupyterLab went down with the demo command: nothing answers on the port any more.
    time.sleep(0.5)
    with socket.socket() as s, pytest.raises(ConnectionRefusedError):
        s.connect(("127.0.0.1", port))


def test_demo_keeps_an_edited_copy(tmp_path):
    folder = tmp_path / "work"
    path, message = cli.copy_quickstart(folder)
    assert "Copied" in message
    assert path.read_bytes() == cli.quickstart_source().read_bytes()
    _, message = cli.copy_quickstart(folder)
    assert "Using" in message
    path.write_text('{"cells": [], "metadata": {"mine": true}, "nbformat": 4, "nbformat_minor": 5}')
    _, message = cli.copy_quickstart(folder)
    assert "Kept your edited copy" in message
    assert "mine" in path.read_text()


def test_demo_rejects_a_busy_port(tmp_path, capsys):
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        s.listen()
        port = s.getsockname()[1]
        code = cli.main(["demo", "--no-browser", "--port", str(port), "--dir", str(tmp_path / "d")])
    assert code == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and f"port {port} is already in use" in err[0]


# -- report ------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def demo_csv(tmp_path_factory):
    path = tmp_path_factory.mktemp("data") / "demo.csv"
    sg.demo_data().to_csv(path, index=False)
    return path


class _Text(HTMLParser):
    def __init__(self):
        super().__init__()
        self.chunks = []

    def handle_data(self, data):
        self.chunks.append(data)


def test_report_on_the_demo_csv(demo_csv, tmp_path, capsys):
    out = tmp_path / "r.html"
    code = cli.main([
        "report", str(demo_csv), "--exposure", "visited", "--outcome", "on_target",
        "--strata", "lives_alone,age", "--bins", "age=3", "--method", "crude", "-o", str(out),
    ])
    assert code == 0
    assert f"Wrote {out}" in capsys.readouterr().out
    text = out.read_text(encoding="utf-8")
    expected = sg.analyze(pd.read_csv(demo_csv), exposure="visited", outcome="on_target",
                          strata=("lives_alone", "age"), bins={"age": 3}, method="crude")
    parser = _Text()
    parser.feed(text)
    body = " ".join(parser.chunks)
    for value in expected.strata["estimate"]:
        assert f"{value:.3f}" in body
    assert f"{expected.overall['estimate']:.3f}" in body
    assert "lives_alone" in body and "<svg" in text


def test_report_bootstrap_shows_progress(demo_csv, tmp_path, capsys):
    out = tmp_path / "b.html"
    code = cli.main([
        "report", str(demo_csv), "--exposure", "visited", "--outcome", "on_target",
        "--strata", "insulin", "--method", "crude", "--interval", "bootstrap", "--n-boot", "50",
        "-o", str(out),
    ])
    assert code == 0
    assert "bootstrap" in capsys.readouterr().err  # the tqdm bar
    assert "bootstrap" in out.read_text(encoding="utf-8")


def test_report_reads_parquet(demo_csv, tmp_path):
    pytest.importorskip("pyarrow")
    pq = tmp_path / "demo.parquet"
    pd.read_csv(demo_csv).to_parquet(pq)
    out = tmp_path / "p.html"
    assert cli.main(["report", str(pq), "--exposure", "visited", "--outcome", "on_target",
                     "--method", "crude", "-q", "-o", str(out)]) == 0
    assert out.stat().st_size > 0


@pytest.mark.parametrize(
    "args, message",
    [
        (["--exposure", "nope", "--outcome", "on_target"], "nope"),
        (["--exposure", "visited", "--outcome", "on_target", "--method", "magic"], "'method'"),
        (["--exposure", "visited", "--outcome", "on_target", "--bins", "age"], "--bins 'age'"),
        (["--exposure", "visited", "--outcome", "on_target", "--n-boot", "ten"], "--n-boot"),
        (["--outcome", "on_target"], "--exposure"),
    ],
)
def test_report_bad_input_exits_2_with_one_line(demo_csv, tmp_path, args, message):
    proc = subprocess.run(
        [sys.executable, "-m", "stratagem.cli", "report", str(demo_csv), *args,
         "-o", str(tmp_path / "x.html")],
        capture_output=True, text=True, timeout=120,
    )
    assert proc.returncode == 2
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1, proc.stderr
    assert message in lines[0]
    assert "Traceback" not in proc.stderr
    assert not (tmp_path / "x.html").exists()


def test_report_unreadable_file_exits_2(tmp_path, capsys):
    bad = tmp_path / "bad.parquet"
    bad.write_bytes(b"\x00not parquet at all")
    assert cli.main(["report", str(bad), "--exposure", "a", "--outcome", "b"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "bad.parquet" in err[0]
    assert cli.main(["report", str(tmp_path / "missing.csv"), "--exposure", "a", "--outcome", "b"]) == 2
    assert "does not exist" in capsys.readouterr().err


def test_parse_bins():
    assert cli.parse_bins(["age=4", "bmi=18.5:25:30,x=2"]) == {
        "age": 4, "bmi": (18.5, 25.0, 30.0), "x": 2}
    with pytest.raises(cli.CommandError, match="neither a whole number"):
        cli.parse_bins(["age=four"])


# -- render ------------------------------------------------------------------------------------------
def test_render_prefers_the_static_snapshot(tmp_path):
    import nbformat

    nb = nbformat.v4.new_notebook()
    cell = nbformat.v4.new_code_cell("Explorer(...)")
    cell.outputs = [nbformat.v4.new_output(
        "display_data",
        data={
            "application/vnd.jupyter.widget-view+json": {
                "model_id": "abc123", "version_major": 2, "version_minor": 1},
            "text/html": "<div class='sg-snapshot'>SNAPSHOT-TABLE risk difference</div>",
            "text/plain": "Explorer(...)",
        },
    )]
    nb.cells = [nbformat.v4.new_markdown_cell("# Title"), cell]
    src = tmp_path / "nb.ipynb"
    nbformat.write(nb, src)
    out = tmp_path / "nb.html"
    assert cli.main(["render", str(src), "-o", str(out), "-q"]) == 0
    text = out.read_text(encoding="utf-8")
    assert "SNAPSHOT-TABLE risk difference" in text
    assert "abc123" not in text  # no widget view placeholder that would need a kernel
    assert not re.search(r"<script[^>]+src=[\"']https?:", text)
    assert not re.search(r"<link[^>]+href=[\"']https?:", text)


def test_render_missing_notebook_exits_2(tmp_path, capsys):
    assert cli.main(["render", str(tmp_path / "none.ipynb")]) == 2
    assert "does not exist" in capsys.readouterr().err


def test_render_quickstart_shows_the_explorer_snapshot(tmp_path):
    import nbformat

    src = Path(cli.quickstart_source())
    nb = nbformat.read(src, as_version=4)
    snapshots = [o["data"]["text/html"] for c in nb.cells if c.cell_type == "code" for o in c.get("outputs", [])
                 if "application/vnd.jupyter.widget-view+json" in o.get("data", {})]
    if not snapshots:
        pytest.skip("the quickstart has no stored widget output")
    out = tmp_path / "q.html"
    assert cli.main(["render", str(src), "-o", str(out), "-q"]) == 0
    text = out.read_text(encoding="utf-8")
    assert 'class="sg-snapshot"' in text
    assert not re.search(r"<script[^>]+src=", text)
