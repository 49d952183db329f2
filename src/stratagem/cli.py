"""The ``stratagem`` command: ``demo``, ``report`` and ``render``.

``stratagem demo`` copies the quickstart notebook into a working folder and opens JupyterLab on it.
``stratagem report DATA ...`` runs one analysis on a CSV or Parquet file and writes a self-contained
HTML report. ``stratagem render NOTEBOOK.ipynb`` turns a notebook into an HTML page that shows every
stratagem widget as its static snapshot, readable offline.

Bad input (an unreadable file, an unknown option, anything :func:`stratagem.analyze` rejects) ends
the command with exit code 2 and a one-line message on standard error, never a traceback.
"""

from __future__ import annotations

import argparse
import filecmp
import os
import secrets
import shutil
import signal
import socket
import subprocess
import sys
import time
import urllib.error
import urllib.request
from collections.abc import Sequence
from pathlib import Path

__all__ = ["main", "quickstart_source", "copy_quickstart", "read_table", "parse_bins"]

QUICKSTART = "quickstart.ipynb"
USAGE_ERROR = 2


class CommandError(Exception):
    """Bad input to a command: printed as one line, exit code 2."""


class _Parser(argparse.ArgumentParser):
    """argparse, but a bad option gives one line (no usage block) and exit code 2."""

    def error(self, message: str):  # noqa: D401 - argparse's hook
        self.exit(USAGE_ERROR, f"{self.prog}: error: {message} (see {self.prog} --help)\n")


# -- demo --------------------------------------------------------------------------------------------
def quickstart_source() -> Path:
    """Path of the quickstart notebook shipped with stratagem.

    A wheel carries it as ``stratagem/gallery/quickstart.ipynb``; an editable install reads the
    repository's ``gallery/`` folder.
    """
    packaged = Path(__file__).resolve().parent / "gallery" / QUICKSTART
    if packaged.is_file():
        return packaged
    repo = Path(__file__).resolve().parents[2] / "gallery" / QUICKSTART
    if repo.is_file():
        return repo
    raise CommandError(
        f"the quickstart notebook is not in this installation (looked for {packaged} and {repo}); "
        "reinstall stratagem with 'pip install stratagem'"
    )


def copy_quickstart(folder: Path) -> tuple[Path, str]:
    """Copy the quickstart into ``folder`` unless the user already has an edited copy there.

    Returns the notebook's path and one line saying what was done. An existing copy that differs
    from the shipped one is the user's work: it is kept, never overwritten.
    """
    source = quickstart_source()
    folder.mkdir(parents=True, exist_ok=True)
    target = folder / QUICKSTART
    if not target.exists():
        shutil.copyfile(source, target)
        return target, f"Copied the quickstart notebook to {target}."
    if filecmp.cmp(source, target, shallow=False):
        return target, f"Using the quickstart notebook at {target}."
    return target, (
        f"Kept your edited copy of {target} (not overwritten); delete or rename it to get a fresh "
        "copy, or pass --dir with another folder."
    )


def _free_port(preferred: int = 8888) -> int:
    for port in [preferred, 0]:
        with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
            try:
                s.bind(("127.0.0.1", port))
            except OSError:
                continue
            return s.getsockname()[1]
    raise CommandError("no free TCP port found; pass --port with a free port")


def _port_in_use(port: int) -> bool:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        try:
            s.bind(("127.0.0.1", port))
        except OSError:
            return True
    return False


def _lab_command(folder: Path, port: int, token: str, browser: bool) -> list[str]:
    cmd = [
        sys.executable, "-m", "jupyterlab", QUICKSTART,
        "--ServerApp.ip=127.0.0.1",
        f"--ServerApp.port={port}",
        "--ServerApp.port_retries=0",
        f"--ServerApp.root_dir={folder}",
        f"--IdentityProvider.token={token}",
    ]
    if not browser:
        cmd.append("--no-browser")
    if hasattr(os, "geteuid") and os.geteuid() == 0:
        cmd.append("--allow-root")  # JupyterLab refuses to start as root without it
    return cmd


def _wait_ready(url: str, proc: subprocess.Popen, timeout: float) -> bool:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline and proc.poll() is None:
        try:
            with urllib.request.urlopen(url, timeout=2) as response:
                if response.status == 200:
                    return True
        except (urllib.error.URLError, ConnectionError, OSError):
            pass
        time.sleep(0.3)
    return False


def run_demo(args: argparse.Namespace) -> int:
    folder = Path(args.dir).expanduser().resolve()
    notebook, message = copy_quickstart(folder)
    print(message, flush=True)
    if args.port is not None:
        if not 1 <= args.port <= 65535:
            raise CommandError(f"--port must be from 1 to 65535; got {args.port}")
        if _port_in_use(args.port):
            raise CommandError(f"port {args.port} is already in use; pass --port with a free port")
        port = args.port
    else:
        port = _free_port()
    token = secrets.token_hex(16)
    base = f"http://127.0.0.1:{port}"
    url = f"{base}/lab/tree/{notebook.name}?token={token}"
    proc = subprocess.Popen(_lab_command(folder, port, token, not args.no_browser), cwd=folder)

    def stop(signum, frame):  # a terminated demo takes its JupyterLab with it
        raise KeyboardInterrupt

    previous = signal.signal(signal.SIGTERM, stop)
    try:
        ready = _wait_ready(f"{base}/api/status?token={token}", proc, timeout=120)
        if proc.poll() is not None:
            print(f"stratagem: error: JupyterLab stopped (exit code {proc.returncode})",
                  file=sys.stderr)
            return 1
        state = "is running" if ready else "is starting (not answering yet)"
        print(f"JupyterLab {state} on the quickstart notebook:\n  {url}\n"
              "Press Ctrl-C to stop it.", flush=True)
        return proc.wait()
    except KeyboardInterrupt:
        return 0
    finally:
        signal.signal(signal.SIGTERM, previous)
        if proc.poll() is None:
            proc.terminate()
            try:
                proc.wait(timeout=15)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait()


# -- report ------------------------------------------------------------------------------------------
def read_table(path: str):
    """Read a CSV (``.csv``, ``.tsv``, ``.txt``, optionally gzipped) or Parquet file."""
    import pandas as pd

    p = Path(path)
    if not p.is_file():
        raise CommandError(f"data file {path!r} does not exist; give the path of a CSV or Parquet file")
    name = p.name.lower()
    try:
        if name.endswith((".parquet", ".pq")):
            return pd.read_parquet(p)
        if name.endswith((".tsv", ".tsv.gz", ".tab")):
            return pd.read_csv(p, sep="\t")
        return pd.read_csv(p)
    except ImportError as exc:
        raise CommandError(f"cannot read {path!r}: {exc}; install pyarrow to read Parquet") from None
    except Exception as exc:  # any reader failure is bad input, reported in one line
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise CommandError(f"cannot read {path!r} as a table: {first}") from None


def _names(text: str | None) -> tuple:
    if not text:
        return ()
    return tuple(part.strip() for part in text.split(",") if part.strip())


def parse_bins(items: Sequence[str] | None) -> dict:
    """``["age=4", "bmi=18.5:25:30"]`` -> ``{"age": 4, "bmi": (18.5, 25.0, 30.0)}``.

    Each item is ``column=count`` (quantile bins) or ``column=e1:e2:...`` (bin edges); items may
    also be joined by commas.
    """
    out: dict = {}
    for item in items or ():
        for part in item.split(","):
            if not part.strip():
                continue
            column, eq, rule = part.partition("=")
            column, rule = column.strip(), rule.strip()
            if not eq or not column or not rule:
                raise CommandError(
                    f"--bins {part!r} must look like column=4 (quantile bins) or column=40:60:80 (edges)"
                )
            try:
                out[column] = (tuple(float(v) for v in rule.split(":")) if ":" in rule else int(rule))
            except ValueError:
                raise CommandError(
                    f"--bins {part!r}: {rule!r} is neither a whole number of bins nor edges like 40:60:80"
                ) from None
    return out


def _exposed_level(text: str | None):
    if text is None:
        return None
    try:
        return int(text)
    except ValueError:
        try:
            return float(text)
        except ValueError:
            return text


def _bootstrap_bar(total: int):
    """A tqdm bar on stderr fed by analyze()'s progress fractions."""
    from tqdm import tqdm

    bar = tqdm(total=total, desc="bootstrap", unit="replicate", file=sys.stderr, leave=False)

    def progress(fraction: float) -> None:
        bar.update(max(0, round(fraction * total) - bar.n))

    return bar, progress


def run_report(args: argparse.Namespace) -> int:
    import stratagem as sg

    data = read_table(args.data)
    fields = dict(
        exposure=args.exposure,
        outcome=args.outcome,
        confounders=_names(args.confounders),
        strata=_names(args.strata),
        bins=parse_bins(args.bins),
        level=args.level,
        interval=args.interval,
        n_boot=args.n_boot,
        seed=args.seed,
    )
    for key in ("method", "measure", "counts"):
        if getattr(args, key) is not None:
            fields[key] = getattr(args, key)
    if args.exposed_level is not None:
        fields["exposed_level"] = _exposed_level(args.exposed_level)
    bar, progress = (None, None)
    if args.interval == "bootstrap" and not args.quiet:
        bar, progress = _bootstrap_bar(args.n_boot)
    try:
        analysis = sg.analyze(data, progress=progress, **fields)
    finally:
        if bar is not None:
            bar.close()
    from .report import to_html

    out = Path(args.output)
    try:
        to_html(analysis, out, data_name=Path(args.data).stem)
    except OSError as exc:
        raise CommandError(f"cannot write {str(out)!r}: {exc.strerror or exc}") from None
    if not args.quiet:
        o = analysis.overall
        print(f"Wrote {out} ({analysis.spec.method}, {analysis.spec.measure}, "
              f"{len(analysis.strata)} strata, overall {o['estimate']:.4g} "
              f"({o['ci_low']:.4g} to {o['ci_high']:.4g})).")
    return 0


# -- render ------------------------------------------------------------------------------------------
def run_render(args: argparse.Namespace) -> int:
    from .report import render_notebook

    src = Path(args.notebook)
    if not src.is_file():
        raise CommandError(f"notebook {args.notebook!r} does not exist; give the path of an .ipynb file")
    out = Path(args.output) if args.output else src.with_suffix(".html")
    try:
        render_notebook(src, out)
    except OSError as exc:
        raise CommandError(f"cannot write {str(out)!r}: {exc.strerror or exc}") from None
    if not args.quiet:
        print(f"Wrote {out}.")
    return 0


# -- entry point -------------------------------------------------------------------------------------
def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="stratagem",
        description="Effect-modification analysis: demo notebook, HTML reports, rendered notebooks.",
    )
    sub = parser.add_subparsers(dest="command", metavar="{demo,report,render}", parser_class=_Parser)
    sub.required = True

    demo = sub.add_parser("demo", help="open JupyterLab on the quickstart notebook")
    demo.add_argument("--no-browser", action="store_true", help="do not open a web browser")
    demo.add_argument("--port", type=int, default=None, help="port for JupyterLab (default: 8888 or a free one)")
    demo.add_argument("--dir", default="stratagem-demo",
                      help="working folder for the notebook (default: ./stratagem-demo)")
    demo.set_defaults(run=run_demo)

    rep = sub.add_parser("report", help="analyse a CSV or Parquet file and write an HTML report")
    rep.add_argument("data", help="CSV (.csv, .tsv) or Parquet (.parquet) file, one row per individual")
    rep.add_argument("--exposure", required=True, help="binary exposure column")
    rep.add_argument("--outcome", required=True, help="binary or numeric outcome column")
    rep.add_argument("--confounders", help="comma-separated confounder columns, e.g. age,district")
    rep.add_argument("--strata", help="comma-separated modifier columns, e.g. sex,age")
    rep.add_argument("--method", help="crude, mantel-haenszel, standardization, ipw, aipw or exact")
    rep.add_argument("--measure", help="rd, rr, or or md")
    rep.add_argument("--bins", action="append",
                     help="bins of a numeric modifier: age=4 (quantiles) or age=40:60:80 (edges); repeatable")
    rep.add_argument("--level", type=float, default=0.95, help="confidence level (default 0.95)")
    rep.add_argument("--interval", default="wald", help="wald (default) or bootstrap")
    rep.add_argument("--n-boot", type=int, default=1000, help="bootstrap replicates (default 1000)")
    rep.add_argument("--seed", type=int, default=0, help="random state of the bootstrap (default 0)")
    rep.add_argument("--counts", help="column of frequencies, for tables of counts")
    rep.add_argument("--exposed-level", help="value of the exposure column that means exposed")
    rep.add_argument("-o", "--output", default="report.html", help="HTML file to write (default report.html)")
    rep.add_argument("-q", "--quiet", action="store_true", help="no progress bar or summary line")
    rep.set_defaults(run=run_report)

    ren = sub.add_parser("render", help="render a notebook to offline HTML with widget snapshots")
    ren.add_argument("notebook", help="the .ipynb file")
    ren.add_argument("-o", "--output", help="HTML file to write (default: the notebook's name with .html)")
    ren.add_argument("-q", "--quiet", action="store_true", help="no summary line")
    ren.set_defaults(run=run_render)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the ``stratagem`` command; returns the exit code (2 for bad input)."""
    from .errors import StratagemError

    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.run(args) or 0)
    except (CommandError, StratagemError) as exc:
        message = " ".join(str(exc).split())
        print(f"stratagem {args.command}: error: {message}", file=sys.stderr)
        return USAGE_ERROR
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    sys.exit(main())
