"""A column name is data, never code: source scan for eval/exec and formulas, and hostile names.

Two halves (common practice, no source): a static scan of the package's Python source that forbids
dynamic code (``eval``, ``exec``, ``compile``, ``__import__``, pandas ``eval``/``query``) and
formula interfaces (patsy, ``statsmodels.formula``, ``from_formula``, strings built with ``~``);
and analyses of tables whose column names and levels are Python, formula and markup code, run
under an audit hook that fails the test if anything is compiled, executed or spawned.
"""

from __future__ import annotations

import ast
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hardening_helpers import method_params, random_table

import stratagem as sg

PACKAGE = Path(sg.__file__).resolve().parent
SOURCES = sorted(PACKAGE.rglob("*.py"))

FORBIDDEN_CALLS = {"eval", "exec", "compile", "__import__", "execfile"}
FORBIDDEN_METHODS = {"eval", "query", "from_formula", "dmatrix", "dmatrices"}
FORBIDDEN_MODULES = ("patsy", "statsmodels.formula", "formulaic", "numexpr", "pickle", "marshal")

HOSTILE = [
    "__import__('os').system('touch pwned')",
    "y ~ x + I(1/0)",
    "exec(\"raise SystemExit\")",
    "{0.__class__.__mro__}",
    "C(grp, Treatment('a'))",
    "np.log(x) + Q('z')",
    "<script>window.pwned=1</script>",
    "'\"; DROP TABLE t; --",
]


# -- static scan ----------------------------------------------------------------------------------


def _violations(path: Path) -> list[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    found = []
    where = lambda node: f"{path.name}:{node.lineno}"  # noqa: E731
    for node in ast.walk(tree):
        if isinstance(node, ast.Call):
            f = node.func
            if isinstance(f, ast.Name) and f.id in FORBIDDEN_CALLS:
                found.append(f"{where(node)} calls {f.id}()")
            if isinstance(f, ast.Attribute) and f.attr in FORBIDDEN_METHODS:
                found.append(f"{where(node)} calls .{f.attr}()")
            if isinstance(f, ast.Attribute) and f.attr in FORBIDDEN_CALLS and getattr(f.value, "id", "") in (
                "builtins", "__builtins__"
            ):
                found.append(f"{where(node)} calls builtins.{f.attr}()")
            if isinstance(f, ast.Name) and f.id in ("getattr", "setattr") and len(node.args) >= 2:
                name = node.args[1]
                if isinstance(name, ast.Constant) and name.value in FORBIDDEN_CALLS:
                    found.append(f"{where(node)} reaches {name.value} through {f.id}")
        if isinstance(node, (ast.Import, ast.ImportFrom)):
            names = [a.name for a in node.names]
            if isinstance(node, ast.ImportFrom) and node.module:
                names.append(node.module)
            for name in names:
                if name.startswith(FORBIDDEN_MODULES):
                    found.append(f"{where(node)} imports {name}")
        if isinstance(node, ast.JoinedStr):  # f-string: a formula is "~" next to interpolated names
            text = "".join(v.value for v in node.values if isinstance(v, ast.Constant))
            if "~" in text and any(isinstance(v, ast.FormattedValue) for v in node.values):
                found.append(f"{where(node)} builds a formula-like f-string {text!r}")
        if isinstance(node, ast.BinOp) and isinstance(node.op, (ast.Add, ast.Mod)):
            for side in (node.left, node.right):
                if isinstance(side, ast.Constant) and isinstance(side.value, str) and " ~ " in side.value:
                    found.append(f"{where(node)} concatenates a formula string {side.value!r}")
        if isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute) and node.func.attr == "format":
            base = node.func.value
            if isinstance(base, ast.Constant) and isinstance(base.value, str) and "~" in base.value:
                found.append(f"{where(node)} formats a formula string {base.value!r}")
    return found


def test_the_scan_sees_the_whole_package():
    names = {p.name for p in SOURCES}
    assert {"analysis.py", "frame.py", "spec.py", "crude.py"} <= names
    assert len(SOURCES) >= 10


@pytest.mark.parametrize("path", SOURCES, ids=lambda p: str(p.relative_to(PACKAGE)))
def test_source_has_no_dynamic_code_or_formulas(path):
    assert _violations(path) == []


def test_the_scan_catches_what_it_forbids(tmp_path):
    """The scanner itself must fail on each forbidden pattern (else the scan proves nothing)."""
    bad = [
        "eval(name)",
        "exec(code)",
        "compile(src, 'f', 'exec')",
        "__import__(mod)",
        "df.query(f'{col} > 0')",
        "df.eval(expr)",
        "import patsy",
        "from statsmodels.formula.api import glm",
        "f = f'{outcome} ~ {exposure}'",
        "f = outcome + ' ~ ' + exposure",
        "f = '{} ~ {}'.format(outcome, exposure)",
        "sm.GLM.from_formula(f, df)",
        "getattr(builtins, 'eval')(x)",
    ]
    for line in bad:
        path = tmp_path / "probe.py"
        path.write_text(line + "\n", encoding="utf-8")
        assert _violations(path), f"the scan missed: {line}"


# -- hostile names, under an audit hook -----------------------------------------------------------

_ARMED = {"on": False, "events": []}
SPAWN = ("os.system", "os.exec", "os.posix_spawn", "os.spawn", "subprocess.Popen", "os.fork", "pty.spawn")
MARKERS = ("__import__", "I(1/0)", "SystemExit", "__mro__", "Treatment(", "Q('z')", "pwned", "DROP TABLE")


def _code_text(event, args) -> str:
    """What an exec/compile audit event would run: source text, or a code object's names and constants."""
    if not args:
        return ""
    obj = args[0]
    if hasattr(obj, "co_consts"):
        parts = [obj.co_filename, *obj.co_names]
        parts += [c if isinstance(c, str) else _code_text(event, (c,)) for c in obj.co_consts
                  if isinstance(c, str) or hasattr(c, "co_consts")]
        return " ".join(parts)
    if isinstance(obj, bytes):
        return obj.decode("utf-8", "replace")
    return obj if isinstance(obj, str) else ast.dump(obj) if isinstance(obj, ast.AST) else repr(obj)


def _hook(event, args):
    """Record process spawning, and any compiled or executed code that carries text from the data.

    Libraries compile small pieces of their own code at run time (``collections.namedtuple`` for
    ``DataFrame.itertuples``, lazy imports); those carry none of the hostile text and are allowed.
    """
    if not _ARMED["on"]:
        return
    if event.startswith(SPAWN):
        _ARMED["events"].append((event, repr(args)[:200]))
    elif event in ("exec", "compile"):
        text = _code_text(event, args)
        if any(marker in text for marker in MARKERS):
            _ARMED["events"].append((event, text[:200]))
    elif event == "open" and args and "pwned" in str(args[0]):
        _ARMED["events"].append((event, str(args[0])))


sys.addaudithook(_hook)  # cannot be removed; it records only while a test arms it


class Armed:
    """Record code execution, compilation and process spawning while the block runs."""

    def __enter__(self):
        _ARMED["events"] = []
        _ARMED["on"] = True
        return _ARMED["events"]

    def __exit__(self, *exc):
        _ARMED["on"] = False
        return False


def _hostile_table(random_state=0, binary=True):
    df = random_table(random_state, binary=binary, levels=3)
    levels = {"lvl_a": HOSTILE[0], "lvl_b": HOSTILE[6], "lvl_c": HOSTILE[1]}
    names = {"x": HOSTILE[0], "y": HOSTILE[1], "c1": HOSTILE[2], "c2": HOSTILE[4], "m": HOSTILE[6],
             "y0": HOSTILE[5], "y1": HOSTILE[7]}
    hostile = df.assign(m=df["m"].map(levels), c2=df["c2"].map({"p": HOSTILE[3], "q": HOSTILE[5],
                                                                 "r": HOSTILE[7]}))
    return df, hostile.rename(columns=names), names, levels


def _fields(method, measure, names):
    f = dict(exposure=names["x"], outcome=names["y"], strata=(names["m"],), method=method, measure=measure)
    if method == "exact":
        f["potential_outcomes"] = (names["y0"], names["y1"])
    elif method != "crude":
        f["confounders"] = (names["c1"], names["c2"])
    return f


@pytest.mark.parametrize("method", method_params())
@pytest.mark.parametrize("binary", [True, False])
def test_hostile_column_names_are_never_evaluated_and_results_are_right(method, binary, tmp_path,
                                                                         monkeypatch):
    monkeypatch.chdir(tmp_path)  # if anything ran `touch pwned`, the file would appear here
    plain, hostile, names, levels = _hostile_table(binary=binary)
    measure = "rd" if binary else "md"
    plain_names = {k: k for k in names}
    expected = sg.analyze(plain, **_fields(method, measure, plain_names))  # also warms lazy imports
    sg.analyze(hostile, **_fields(method, measure, names))
    with Armed() as events:
        got = sg.analyze(hostile, **_fields(method, measure, names))
        got.to_markdown()
        got._repr_html_()
        text = got.recipe()
    assert events == [], f"code ran during the analysis: {events}"
    assert not (tmp_path / "pwned").exists()
    # Same numbers as with plain names; strata keep the hostile levels verbatim, in sorted order.
    cols = ["n", "n_exposed", "estimate", "se", "ci_low", "ci_high", "p_value"]
    inverse = {v: k for k, v in levels.items()}
    got_levels = list(got.strata[names["m"]])
    assert sorted(got_levels) == got_levels and set(got_levels) == set(levels.values())
    order = [list(expected.strata["m"]).index(inverse[v]) for v in got_levels]
    # (renamed confounder levels reorder indicator columns: equal to rounding, not bit for bit)
    np.testing.assert_allclose(got.strata[cols].to_numpy(float),
                               expected.strata[cols].to_numpy(float)[order], rtol=1e-10, atol=1e-13)
    np.testing.assert_allclose(got.overall[cols].to_numpy(float), expected.overall[cols].to_numpy(float),
                               rtol=1e-10, atol=1e-13)
    assert list(got.strata["status"]) == [expected.strata["status"][i] for i in order]
    _check_recipe(text, names)


def _check_recipe(text: str, names: dict) -> None:
    """The recipe is one call of sg.analyze whose column names are plain string literals."""
    tree = ast.parse(text)
    calls = [n for n in ast.walk(tree) if isinstance(n, ast.Call)]
    assert len(calls) == 1 and ast.unparse(calls[0].func) == "sg.analyze"
    identifiers = {n.id for n in ast.walk(tree) if isinstance(n, ast.Name)}
    assert identifiers <= {"sg", "df", "analysis"}
    literals = {n.value for n in ast.walk(tree) if isinstance(n, ast.Constant) and isinstance(n.value, str)}
    assert {names["x"], names["y"], names["m"]} <= literals


@pytest.mark.parametrize("method", method_params())
def test_recipe_with_hostile_names_runs_and_reproduces(method, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    _, hostile, names, _ = _hostile_table(random_state=3)
    a = sg.analyze(hostile, **_fields(method, "rd", names))
    namespace = {"df": hostile.copy()}
    exec(compile(a.recipe(), "<recipe>", "exec"), namespace)  # the test runs generated code on purpose
    b = namespace["analysis"]
    pd.testing.assert_frame_equal(a.to_frame(), b.to_frame())
    assert not (tmp_path / "pwned").exists()


def test_html_and_markdown_show_hostile_text_escaped():
    _, hostile, names, levels = _hostile_table()
    a = sg.analyze(hostile, **_fields("crude", "rd", names))
    page = a._repr_html_()
    assert "<script>" not in page and "&lt;script&gt;" in page
    assert "'os'" not in page or "&#x27;os&#x27;" in page or "__import__" in page
    md = a.to_markdown()
    assert HOSTILE[6] in md  # Markdown is text: shown literally (escaping is the renderer's job)


@pytest.mark.parametrize("name", HOSTILE)
def test_hostile_names_in_error_messages_are_quoted_not_run(name, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    df = pd.DataFrame({"x": [0, 1, 0, 1], "y": [0, 1, 1, 0]})
    with Armed() as events:
        with pytest.raises(sg.StratagemError) as info:
            sg.analyze(df, exposure="x", outcome="y", strata=(name,))
    assert repr(name) in str(info.value)
    assert events == []


def test_the_audit_hook_catches_evaluated_data(tmp_path, monkeypatch):
    """The hook must see code built from a hostile name (else its silence proves nothing)."""
    monkeypatch.chdir(tmp_path)
    with Armed() as events:
        exec(compile(f"x = {HOSTILE[1]!r}", "<probe>", "exec"), {})  # a string literal: harmless, but seen
    assert events, "the audit hook did not record compiled code carrying hostile text"
