"""Spec validation: TOML text -> Spec, and every way a spec can be wrong.

Every bad spec must raise metricc.SpecError (a ValueError) with a compiler-style message
``path:line:col: error: [table] key: reason``. Checks that need numbers (singular metric,
signature) run in metricc/geometry.py, so bad specs are loaded through metricc.load with the
NumPy backend (no compiler needed), which runs the whole validation.
"""
from __future__ import annotations

import importlib.util
import io
import json
import os
import re
import shutil
import subprocess
import time
import tokenize
from pathlib import Path

import numpy as np
import pytest

import metricc
from metricc import SpecError
from metricc.spec import parse_spec

ROOT = Path(__file__).resolve().parent.parent
SPECS = ROOT / "specs"
TIME_LIMIT = 10.0

HEAD = '''name = "probe"
summary = "a spec written by the tests"
coordinates = ["t", "r"]
signature = "-+"'''
PARAMETERS = '[parameters]\nM = 1.0'
DEFINE = '[define]\nf = "1 - 2*M/r"'
METRIC = '[metric]\nt.t = "-f"\nr.r = "1/f"'
DOMAIN = '[domain]\noutside = "r - 2*M"'
DEFAULT = object()


def make(head=DEFAULT, parameters=DEFAULT, define=DEFAULT, metric=DEFAULT, domain=DEFAULT,
         events=None, extra=None) -> str:
    """A valid 2-d spec (t, r) unless a part is replaced; None drops a part."""
    parts = [HEAD if head is DEFAULT else head,
             extra,
             PARAMETERS if parameters is DEFAULT else parameters,
             DEFINE if define is DEFAULT else define,
             METRIC if metric is DEFAULT else metric,
             DOMAIN if domain is DEFAULT else domain,
             events]
    return "\n\n".join(p for p in parts if p is not None) + "\n"


def metric_with(rr: str) -> str:
    return f'[metric]\nt.t = "-f"\nr.r = {json.dumps(rr)}'


def line_no(text: str, prefix: str, after: str | None = None) -> int:
    """1-based number of the first line starting with ``prefix`` (after the line ``after``)."""
    lines = text.splitlines()
    start = 0
    if after is not None:
        start = next(i for i, ln in enumerate(lines) if ln.strip() == after) + 1
    for i in range(start, len(lines)):
        if lines[i].lstrip().startswith(prefix):
            return i + 1
    raise AssertionError(f"{prefix!r} not in text")


def col_of(text: str, line: int, token: str) -> int:
    """1-based column of ``token`` on line ``line``."""
    return text.splitlines()[line - 1].index(token) + 1


def expected_first_line(err: SpecError) -> str:
    where = err.path
    if err.line is not None:
        where += f":{err.line}"
        if err.column is not None:
            where += f":{err.column}"
    # keys that are not plain names are quoted as repr writes them (issue 12: one line)
    key = err.key if err.key is None or re.fullmatch(r"[A-Za-z0-9_.-]+", err.key) else repr(err.key)
    if err.table is not None and err.key is not None:
        place = f"[{err.table}] {key}: "
    elif err.table is not None:
        place = f"[{err.table}]: "
    elif err.key is not None:
        place = f"{key}: "
    else:
        place = ""
    return f"{where}: error: {place}{err.reason}"


def load_bad(tmp_path: Path, text: str, filename: str = "bad_spec.toml") -> tuple[SpecError, Path]:
    path = tmp_path / filename
    path.write_text(text, encoding="utf-8")
    t0 = time.perf_counter()
    with pytest.raises(SpecError) as info:
        metricc.load(path, backend="numpy")
    assert time.perf_counter() - t0 < TIME_LIMIT
    return info.value, path


def check_message(err: SpecError, path: Path, table, key, fragment: str) -> None:
    assert isinstance(err, ValueError)
    assert err.path == str(path)
    first = str(err).splitlines()[0]
    assert first == expected_first_line(err)
    assert first.startswith(str(path) + ":")
    assert fragment in err.reason, err.reason
    if table is not None:
        assert err.table == table
        assert f"[{table}]" in first
    if key is not None:
        assert err.key == key
        assert f"{key}: " in first or f"{key!r}: " in first
    assert "Traceback" not in str(err)


# -- the base spec is valid (so every bad case fails for its own reason) ------------------------
def test_base_spec_is_valid():
    spec = parse_spec(make())
    assert spec.name == "probe"
    assert spec.coordinates == ("t", "r")
    assert spec.dim == 2
    assert spec.signature == "-+"
    assert spec.parameters == (("M", 1.0),)
    assert [k for k, _ in spec.defines] == ["f"]
    assert [ij for ij, _ in spec.metric] == [(0, 0), (1, 1)]
    assert spec.line_element is None
    k = metricc.loads(make(), backend="numpy")
    assert k.signature == (1, 1)
    g = k.metric(np.array([0.0, 4.0]))
    assert g[0, 0] == pytest.approx(-(1 - 2 / 4.0))
    assert g[1, 1] == pytest.approx(1 / (1 - 2 / 4.0))
    assert g[0, 1] == 0.0


@pytest.mark.parametrize("name", sorted(p.stem for p in SPECS.glob("*.toml")))
def test_shipped_specs_parse(name):
    spec = metricc.load_spec(SPECS / f"{name}.toml")
    assert spec.name == name
    assert 2 <= spec.dim <= 8


# -- bad specs -----------------------------------------------------------------------------
BAD = [
    # (id, text, table, key, fragment of the reason)
    ("toml-syntax", make(extra='oops = "unterminated'), None, None, "TOML"),
    ("toml-duplicate-key", make(metric='[metric]\nt.t = "-f"\nt.t = "-1"\nr.r = "1/f"'),
     None, None, "TOML"),
    ("unknown-name-suggests", make(define='[define]\nf = "1 - 2*M/r"\nSigma = "r^2"',
                                   metric=metric_with("Sigmq/r^2")),
     "metric", "r.r", "did you mean 'Sigma'?"),
    ("unknown-name-in-define", make(define='[define]\nf = "1 - 2*Mass/r"'),
     "define", "f", "unknown name 'Mass'"),
    ("cyclic-define", make(define='[define]\nf = "1 - 2*M/r + 0*g"\ng = "f"'),
     "define", "f", "'g'"),
    ("self-define", make(define='[define]\nf = "1 - 2*M/r + 0*f"'),
     "define", "f", "itself"),
    ("forward-define", make(define='[define]\nf = "h"\nh = "1 - 2*M/r"'),
     "define", "f", "later"),
    ("pair-twice", make(metric='[metric]\nt.t = "-f"\nr.r = "1/f"\nt.r = "0.1"\nr.t = "0.1"'),
     "metric", "r.t", "twice"),
    ("unknown-coordinate-second", make(metric='[metric]\nt.t = "-f"\nr.x = "1/f"'),
     "metric", "r.x", "'x' is not a coordinate"),
    ("unknown-coordinate-first", make(metric='[metric]\nt.t = "-f"\nx.r = "1/f"'),
     "metric", None, "'x' is not a coordinate"),
    ("three-part-key", make(metric='[metric]\nt.t = "-f"\nr.r.r = "1/f"'),
     "metric", None, "two coordinates"),
    ("duplicate-coordinate", make(head=HEAD.replace('["t", "r"]', '["t", "t"]')),
     None, "coordinates", "twice"),
    ("coordinate-not-identifier", make(head=HEAD.replace('["t", "r"]', '["t", "2r"]')),
     None, "coordinates", "identifier"),
    ("parameter-not-identifier", make(parameters='[parameters]\nM = 1.0\n"a b" = 2.0'),
     "parameters", "a b", "identifier"),
    ("parameter-dash", make(parameters='[parameters]\nM = 1.0\nm-2 = 2.0'),
     "parameters", "m-2", "identifier"),
    ("parameter-is-coordinate", make(parameters='[parameters]\nM = 1.0\nr = 2.0'),
     "parameters", "r", "coordinate"),
    ("define-is-parameter", make(define='[define]\nM = "2"\nf = "1 - 2*M/r"'),
     "define", "M", "parameter"),
    ("define-is-coordinate", make(define='[define]\nt = "2"\nf = "1 - 2*M/r"'),
     "define", "t", "coordinate"),
    ("c-keyword-parameter", make(parameters='[parameters]\nM = 1.0\nint = 2.0'),
     "parameters", "int", "C keyword"),
    ("c-keyword-define", make(define='[define]\nf = "1 - 2*M/r"\ndouble = "f"'),
     "define", "double", "C keyword"),
    ("c-keyword-coordinate", make(head=HEAD.replace('["t", "r"]', '["t", "for"]')),
     None, "coordinates", "C keyword"),
    ("c-macro-NULL", make(parameters='[parameters]\nM = 1.0\nNULL = 0.0'),
     "parameters", "NULL", "macro"),
    ("c-macro-errno", make(define='[define]\nf = "1 - 2*M/r"\nerrno = "1"'),
     "define", "errno", "macro"),
    ("c-macro-M_PI", make(parameters='[parameters]\nM = 1.0\nM_PI = 3.14'),
     "parameters", "M_PI", "macro"),
    ("reserved-function-name", make(define='[define]\nf = "1 - 2*M/r"\nsqrt = "r"'),
     "define", "sqrt", "reserved"),
    ("reserved-pi", make(parameters='[parameters]\nM = 1.0\npi = 3.0'),
     "parameters", "pi", "reserved"),
    ("default-nan", make(parameters='[parameters]\nM = nan'), "parameters", "M", "finite"),
    ("default-inf", make(parameters='[parameters]\nM = inf'), "parameters", "M", "finite"),
    ("default-minus-inf", make(parameters='[parameters]\nM = -inf'), "parameters", "M",
     "finite"),
    ("default-string", make(parameters='[parameters]\nM = "1.0"'), "parameters", "M",
     "number"),
    ("default-bool", make(parameters='[parameters]\nM = true'), "parameters", "M", "number"),
    ("default-list", make(parameters='[parameters]\nM = [1.0]'), "parameters", "M", "number"),
    ("dimension-1", make(head=HEAD.replace('["t", "r"]', '["r"]').replace('"-+"', '"+"'),
                         metric='[metric]\nr.r = "1/f"'),
     None, "coordinates", "out of range"),
    ("dimension-9", make(head=HEAD.replace('["t", "r"]', json.dumps(list("tabcdeghr")))
                         .replace("signature", "#"),
                         metric='[metric]\nt.t = "-f"\nr.r = "1/f"'),
     None, "coordinates", "out of range"),
    ("line-element-cubic", make(metric=None, extra='line_element = "dt^3 + dr^2"'),
     None, "line_element", "quadratic"),
    ("line-element-linear-term", make(metric=None, extra='line_element = "dt*r + dr^2"'),
     None, "line_element", "homogeneous"),
    ("line-element-sin", make(metric=None, extra='line_element = "-sin(dt) + dr^2"'),
     None, "line_element", "quadratic"),
    ("line-element-constant", make(metric=None, extra='line_element = "1 - dt^2 + dr^2"'),
     None, "line_element", "homogeneous"),
    ("line-element-unknown-differential", make(metric=None,
                                               extra='line_element = "-dt^2 + dx^2"'),
     None, "line_element", "unknown name 'dx'"),
    ("metric-and-line-element", make(extra='line_element = "-f*dt^2 + dr^2/f"'),
     None, None, "exactly one"),
    ("neither-metric-nor-line-element", make(metric=None), None, None, "exactly one"),
    ("empty-metric", make(metric="[metric]"), None, "metric", "empty"),
    ("unknown-top-level-key", make(extra='metrik = "x"'), None, "metrik",
     "did you mean 'metric'?"),
    ("unknown-top-level-table", make(events='[event]\nhorizon = "r - 2.1*M"'), None, "event",
     "unknown key"),
    ("missing-name", make(head=HEAD.replace('name = "probe"\n', '')), None, None, "name"),
    ("bad-spec-name", make(head=HEAD.replace('"probe"', '"Probe-1"')), None, "name",
     "[a-z]"),
    ("overlong-expression", make(metric=metric_with("1/f" + " + 0*r" * 4000)),
     "metric", "r.r", "longer"),
    ("deep-nesting", make(metric=metric_with("(" * 150 + "1/f" + ")" * 150)),
     "metric", "r.r", "nested"),
    ("huge-exponent", make(metric=metric_with("1/f + 0*r^100000")), "metric", "r.r",
     "exponent"),
    ("power-tower", make(metric=metric_with("1/f + 0*2^2^2^2^2^2")), "metric", "r.r",
     "exponent"),
    ("huge-literal", make(metric=metric_with("1/f + 1" + "0" * 60)), "metric", "r.r",
     "number"),
    ("huge-literal-exponent", make(metric=metric_with("1/f + 1e999")), "metric", "r.r",
     "number"),
    ("sqrt-of-negative", make(metric=metric_with("1/f + sqrt(-1)")), "metric", "r.r",
     "not real"),
    ("log-of-negative", make(define='[define]\nf = "1 - 2*M/r + log(-2)"'), "define", "f",
     "not real"),
    ("division-by-zero", make(metric=metric_with("1/f + 1/0")), "metric", "r.r", "zero"),
    ("division-by-zero-expression", make(metric=metric_with("1/f + r/(2 - 2*1)")),
     "metric", "r.r", "zero"),
    ("zero-to-negative-power", make(metric=metric_with("1/f + 0^-1")), "metric", "r.r",
     "zero"),
    ("implicit-multiplication", make(metric=metric_with("1/f + 2r")), "metric", "r.r",
     "2*r"),
    ("unknown-function", make(metric=metric_with("1/f + sinn(r)")), "metric", "r.r",
     "did you mean 'sin'?"),
    ("wrong-arity", make(metric=metric_with("1/f + atan2(r)")), "metric", "r.r", "argument"),
    ("function-as-value", make(metric=metric_with("1/f + cos")), "metric", "r.r",
     "function"),
    ("differential-in-metric", make(metric=metric_with("1/f + dt")), "metric", "r.r",
     "line_element"),
    ("expression-not-string", make(metric='[metric]\nt.t = "-f"\nr.r = true'),
     "metric", "r.r", "expression"),
    ("empty-expression", make(metric=metric_with("   ")), "metric", "r.r", "empty"),
    ("singular-metric-absent-pair", make(metric='[metric]\nt.t = "-f"'), None, "metric",
     "singular"),
    ("singular-metric", make(metric=metric_with("0*r")), None, "metric", "singular"),
    ("wrong-signature", make(head=HEAD.replace('"-+"', '"++"')), None, "signature",
     "eigenvalues"),
    ("signature-length", make(head=HEAD.replace('"-+"', '"-++"')), None, "signature",
     "coordinates"),
    ("signature-characters", make(head=HEAD.replace('"-+"', '"-x"')), None, "signature",
     "'+' and '-'"),
    ("empty-domain", make(domain='[domain]\nnowhere = "-1 - r^2"'), "domain", "nowhere",
     "never finite and > 0"),
    ("reserved-event-name", make(events='[events]\ndone = "r - 2.1*M"'), "events", "done",
     "reserved"),
    ("event-name-not-identifier", make(events='[events]\n"a-b" = "r - 2.1*M"'), "events",
     "a-b", "identifier"),
    ("domain-unknown-name", make(domain='[domain]\noutside = "r - 2*Mass"'), "domain",
     "outside", "unknown name 'Mass'"),
    ("summary-not-string", make(head=HEAD.replace('"a spec written by the tests"', "3")),
     None, "summary", "string"),
]


@pytest.mark.parametrize("text, table, key, fragment",
                         [pytest.param(*case[1:], id=case[0]) for case in BAD])
def test_bad_spec_raises_spec_error(tmp_path, text, table, key, fragment):
    err, path = load_bad(tmp_path, text)
    check_message(err, path, table, key, fragment)


def test_bad_list_is_big_and_distinct():
    ids = [case[0] for case in BAD]
    assert len(set(ids)) == len(ids) >= 25
    assert len({case[1] for case in BAD}) == len(BAD)


def test_spec_error_from_string_names_string_path():
    with pytest.raises(SpecError) as info:
        parse_spec(make(metric=metric_with("Sigmq")))
    assert info.value.path == "<string>"
    assert str(info.value).startswith("<string>:")
    with pytest.raises(SpecError) as info:
        metricc.loads(make(metric=metric_with("Sigmq")), backend="numpy", path="mine.toml")
    assert str(info.value).startswith("mine.toml:")


def test_numeric_checks_come_from_generate():
    from metricc.pipeline import generate
    spec = parse_spec(make(metric=metric_with("0*r")))      # valid syntax and names
    with pytest.raises(SpecError) as info:
        generate(spec, ("numpy",))
    assert "singular" in info.value.reason
    spec = parse_spec(make(head=HEAD.replace('"-+"', '"--"')))
    with pytest.raises(SpecError) as info:
        generate(spec, ("numpy",))
    assert info.value.key == "signature"


def test_unreadable_and_non_utf8_files(tmp_path):
    with pytest.raises(SpecError) as info:
        metricc.load(tmp_path / "missing.toml", backend="numpy")
    assert str(tmp_path / "missing.toml") in str(info.value)
    path = tmp_path / "latin1.toml"
    path.write_bytes(make().replace("the tests", "t\xe9sts").encode("latin-1"))
    with pytest.raises(SpecError) as info:
        metricc.load(path, backend="numpy")
    assert "UTF-8" in info.value.reason


# -- regressions: bugs found while writing these tests, now fixed ----------------------------
@pytest.mark.parametrize("rr", ["1/f + 1e300*1e300", "1/f + (2^64)^64",
                                "1/f + 1/(1e-300*1e-300)"])
def test_constant_beyond_double_range_is_spec_error(tmp_path, rr):
    err, path = load_bad(tmp_path, make(metric=metric_with(rr)))
    check_message(err, path, "metric", "r.r", "")


@pytest.mark.filterwarnings("ignore:Casting complex values")
@pytest.mark.parametrize("rr", ["1/f + (-8)^(1/3)", "1/f + (-1)^(1/4)", "1/f + (-2)^pi"])
def test_negative_base_fractional_power_is_not_real(tmp_path, rr):
    err, path = load_bad(tmp_path, make(metric=metric_with(rr)))
    check_message(err, path, "metric", "r.r", "not real")


def test_unknown_first_coordinate_names_whole_key(tmp_path):
    text = make(metric='[metric]\nt.t = "-f"\nx.r = "1/f"')
    err, path = load_bad(tmp_path, text)
    check_message(err, path, "metric", "x.r", "'x' is not a coordinate")
    line = line_no(text, "x.r")
    assert (err.line, err.column) == (line, col_of(text, line, "1/f"))


def test_define_colliding_with_parameter_after_its_use(tmp_path):
    text = make(define='[define]\nf = "1 - 2*M/r"\nM = "2"')
    err, path = load_bad(tmp_path, text)
    check_message(err, path, "define", "M", "parameter")
    assert err.line == line_no(text, "M = \"2\"")


# -- locations: line and column -----------------------------------------------------------
def test_location_unknown_name_in_metric(tmp_path):
    text = make(define='[define]\nf = "1 - 2*M/r"\nSigma = "r^2"',
                metric='[metric]\nt.t = "-f"\nr.r = "1/f + 0*Sigmq"')
    err, path = load_bad(tmp_path, text, "located.toml")
    line = line_no(text, "r.r")
    assert err.line == line
    assert err.column == col_of(text, line, "Sigmq")
    assert str(err).startswith(f"{path}:{line}:{err.column}: error: [metric] r.r: ")
    assert "located.toml" in str(err)
    assert "did you mean 'Sigma'?" in str(err)
    # the context shows the line with a caret under the column
    src, caret = err.context.splitlines()
    assert src == text.splitlines()[line - 1]
    assert caret.index("^") == err.column - 1


def test_location_forward_define(tmp_path):
    text = make(define='[define]\nf = "1 - 2*M/r + 0*h"\nh = "r"')
    err, path = load_bad(tmp_path, text)
    line = line_no(text, "f =")
    assert (err.table, err.key) == ("define", "f")
    assert (err.line, err.column) == (line, col_of(text, line, "h\""))


def test_location_parameter_default(tmp_path):
    text = make(parameters='[parameters]\nQ = 0.5\nM = nan')
    err, path = load_bad(tmp_path, text)
    line = line_no(text, "M = nan")
    assert (err.table, err.key, err.line) == ("parameters", "M", line)
    assert err.column == col_of(text, line, "nan")


def test_location_unknown_top_level_key(tmp_path):
    text = make(extra='# a comment\nmetrik = "x"')
    err, path = load_bad(tmp_path, text)
    assert err.key == "metrik"
    assert err.line == line_no(text, "metrik")


def test_location_toml_syntax_error(tmp_path):
    text = make(metric='[metric]\nt.t = "-f"\nr.r = "1/f\n')
    err, path = load_bad(tmp_path, text)
    assert err.line == line_no(text, "r.r")
    assert "TOML" in err.reason
    assert str(err).startswith(f"{path}:{err.line}:")


def test_location_pair_twice(tmp_path):
    text = make(metric='[metric]\nt.t = "-f"\nt.r = "0.1"\nr.r = "1/f"\nr.t = "0.1"')
    err, path = load_bad(tmp_path, text)
    assert err.line == line_no(text, "r.t")
    assert "t.r" in err.reason and "r.t" in err.reason


def test_location_in_metric_subtable(tmp_path):
    text = make(metric='[metric.t]\nt = "-f"\n\n[metric.r]\nr = "1/f + 2r"')
    err, path = load_bad(tmp_path, text)
    line = line_no(text, "r =", after="[metric.r]")
    assert (err.table, err.key) == ("metric", "r.r")
    assert err.line == line
    assert err.column == col_of(text, line, "2r") + 1     # the 'r' that lacks an operator


def test_location_literal_string(tmp_path):
    text = make(metric="[metric]\nt.t = '-f'\nr.r = '1/f + $'")
    err, path = load_bad(tmp_path, text)
    line = line_no(text, "r.r")
    assert (err.line, err.column) == (line, col_of(text, line, "$"))


def test_location_same_key_in_two_tables(tmp_path):
    text = make(domain='[domain]\nedge = "r - 2*M"',
                events='[events]\nedge = "r - 2.1*Mass"')
    err, path = load_bad(tmp_path, text)
    line = line_no(text, "edge", after="[events]")
    assert (err.table, err.key, err.line) == ("events", "edge", line)
    assert err.column == col_of(text, line, "Mass")


def test_location_huge_exponent_points_at_exponent(tmp_path):
    text = make(metric=metric_with("1/f + 0*r^100000"))
    err, path = load_bad(tmp_path, text)
    line = line_no(text, "r.r")
    assert (err.line, err.column) == (line, col_of(text, line, "100000"))


def test_location_division_by_zero_points_into_divisor(tmp_path):
    text = make(metric=metric_with("1/f + r/(2 - 2)"))
    err, path = load_bad(tmp_path, text)
    line = line_no(text, "r.r")
    start = col_of(text, line, "(2 - 2)")
    assert err.line == line
    assert start <= err.column < start + len("(2 - 2)")


def test_location_singular_metric_points_at_metric_table(tmp_path):
    text = make(metric=metric_with("0*r"))
    err, path = load_bad(tmp_path, text)
    assert err.key == "metric"
    assert err.line == line_no(text, "[metric]")
    assert str(tmp_path / "bad_spec.toml") in str(err)


def test_location_wrong_signature(tmp_path):
    text = make(head=HEAD.replace('"-+"', '"++"'))
    err, path = load_bad(tmp_path, text)
    line = line_no(text, "signature")
    assert (err.key, err.line) == ("signature", line)
    assert err.column == col_of(text, line, "++")


def test_location_line_element(tmp_path):
    text = make(metric=None, extra='line_element = "-f*dt^2 + dr^2/f + dt^3"')
    err, path = load_bad(tmp_path, text)
    assert (err.table, err.key) == (None, "line_element")
    assert err.line == line_no(text, "line_element")
    assert str(err).startswith(f"{path}:{err.line}:")


# -- valid forms the contract promises ---------------------------------------------------------
def test_absent_pairs_are_zero():
    k = metricc.loads(make(), backend="numpy")
    assert k.metric(np.array([0.0, 3.0]))[0, 1] == 0.0


def test_cross_term_gives_half_coefficient():
    text = ('name = "cross"\ncoordinates = ["t", "r", "phi"]\n'
            'line_element = "-dt^2 + dr^2 + r^2*dphi^2 + 0.25*dt*dphi"\n'
            '[domain]\npositive = "r"\n')
    k = metricc.loads(text, backend="numpy")
    g = k.metric(np.array([0.0, 2.0, 0.3]))
    assert g[0, 2] == pytest.approx(0.125)
    assert g[2, 0] == pytest.approx(0.125)
    assert g[0, 1] == 0.0 and g[1, 2] == 0.0
    assert g[2, 2] == pytest.approx(4.0)


def test_line_element_equals_metric_table():
    table = metricc.loads(make(), backend="numpy")
    line = metricc.loads(make(metric=None, extra='line_element = "-f*dt^2 + dr**2/f"'),
                         backend="numpy")
    x = np.array([[0.0, 3.0], [1.0, 7.5], [-2.0, 2.5]])
    np.testing.assert_allclose(line.metric(x), table.metric(x), rtol=1e-14)
    np.testing.assert_allclose(line.christoffel(x), table.christoffel(x), rtol=1e-12)


def test_caret_and_double_star_same_metric():
    a = metricc.loads(make(define='[define]\nf = "1 - 2*M/r^1 + 0.01*r^-2^1"'), backend="numpy")
    b = metricc.loads(make(define='[define]\nf = "1 - 2*M/r**1 + 0.01*r**-2**1"'),
                      backend="numpy")
    x = np.array([0.0, 5.0])
    np.testing.assert_allclose(a.metric(x), b.metric(x), rtol=1e-15)


def test_defines_use_earlier_helpers():
    text = make(define='[define]\nA = "r^2"\nB = "A + M"\nf = "1 - 2*M/r"',
                metric='[metric]\nt.t = "-f"\nr.r = "B"')
    spec = parse_spec(text)
    assert [k for k, _ in spec.defines] == ["A", "B", "f"]
    k = metricc.loads(text, backend="numpy")
    assert k.metric(np.array([0.0, 3.0]))[1, 1] == pytest.approx(3.0 ** 2 + 1.0)


def test_parameter_defaults_are_floats_in_order():
    spec = parse_spec(make(parameters='[parameters]\nM = 1\nQ = 0.5\nL = -2e-3'))
    assert spec.parameters == (("M", 1.0), ("Q", 0.5), ("L", -2e-3))
    assert all(type(v) is float for _, v in spec.parameters)
    assert spec.parameter_names == ("M", "Q", "L")


def test_signature_is_optional():
    spec = parse_spec(make(head=HEAD.replace('signature = "-+"', '')))
    assert spec.signature is None
    k = metricc.loads(make(head=HEAD.replace('signature = "-+"', '')), backend="numpy")
    assert k.signature == (1, 1)


def test_eight_coordinates_accepted():
    coords = list("tuvwxyzr")
    lines = [f'{c}.{c} = "{-1 if c == "t" else 1}"' for c in coords]
    text = (f'name = "flat8"\ncoordinates = {json.dumps(coords)}\n[metric]\n'
            + "\n".join(lines) + "\n")
    assert parse_spec(text).dim == 8


def test_sha256_ignores_comments_and_formatting():
    a = parse_spec(make())
    b = parse_spec("# leading comment\n" + make().replace(" = ", "   =   ").replace(
        "[metric]", "[metric]   # the metric"))
    assert a.sha256 == b.sha256
    c = parse_spec(make(parameters='[parameters]\nM = 1.5'))
    assert c.sha256 != a.sha256


# -- code injection ----------------------------------------------------------------------------
PAYLOADS = [
    "__import__('os').system('touch {marker}')",
    "open('{marker}','w')",
    "eval(\"open('{marker}','w')\")",
    "exec(\"open('{marker}','w')\")",
    "lambda: open('{marker}','w')",
    "(lambda:0)()",
    "r.__class__",
    "().__class__.__bases__[0].__subclasses__()",
    "f\"{{open('{marker}','w')}}\"",
    "`touch {marker}`",
    "$(touch {marker})",
    "r; open('{marker}','w')",
    "r\nopen('{marker}','w')",
    "1 if open('{marker}','w') else 0",
    "[open('{marker}','w') for _ in (1,)]",
    "getattr(r, 'x')",
    "compile('1', 'f', 'exec')",
    "globals()",
    "__builtins__",
    "sympify('r')",
]
PLACES = ["metric", "define", "domain", "events", "line_element", "default", "coordinate",
          "key", "name"]


def inject(place: str, payload: str) -> str:
    s = json.dumps(payload)          # a valid TOML basic string
    if place == "metric":
        return make(metric=f'[metric]\nt.t = "-f"\nr.r = {s}')
    if place == "define":
        return make(define=f'[define]\nf = "1 - 2*M/r"\ng = {s}')
    if place == "domain":
        return make(domain=f'[domain]\noutside = {s}')
    if place == "events":
        return make(events=f'[events]\nhit = {s}')
    if place == "line_element":
        return make(metric=None, extra=f'line_element = {s}')
    if place == "default":
        return make(parameters=f'[parameters]\nM = {s}')
    if place == "coordinate":
        return make(head=HEAD.replace('["t", "r"]', f'["t", {s}]'))
    if place == "key":
        return make(define=f'[define]\nf = "1 - 2*M/r"\n{s} = "r"')
    if place == "name":
        return make(head=HEAD.replace('"probe"', s))
    raise AssertionError(place)


def assert_no_marker(*folders: Path) -> None:
    for folder in folders:
        for name in ("MARKER", "MARKER2"):
            assert not (folder / name).exists(), f"{folder / name} was created"


@pytest.mark.parametrize("place", PLACES)
@pytest.mark.parametrize("payload", PAYLOADS)
def test_injection_is_rejected_and_never_evaluated(tmp_path, monkeypatch, place, payload):
    monkeypatch.chdir(tmp_path)
    # Relative (cwd) marker for the first half of the payloads, absolute for the rest.
    marker = "MARKER" if PAYLOADS.index(payload) % 2 == 0 else str(tmp_path / "MARKER2")
    text = inject(place, payload.format(marker=marker))
    path = tmp_path / "inject.toml"
    path.write_text(text, encoding="utf-8")
    t0 = time.perf_counter()
    with pytest.raises(SpecError) as info:
        metricc.load(path, backend="numpy")
    assert time.perf_counter() - t0 < TIME_LIMIT
    assert str(info.value).startswith(str(path) + ":")
    assert len(str(info.value).splitlines()[0]) < 2000
    assert_no_marker(tmp_path, Path.cwd(), ROOT)


def test_injection_through_parse_spec_and_loads(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    for payload in PAYLOADS:
        text = inject("metric", payload.format(marker="MARKER"))
        with pytest.raises(SpecError):
            parse_spec(text)
        with pytest.raises(SpecError):
            metricc.loads(text, backend="numpy")
    assert_no_marker(tmp_path, ROOT)


# -- summary injection: output must stay harmless ---------------------------------------------
# One-line printable summaries: these are legitimate and must build.
SUMMARIES_VALID = [
    'end */ int EVILPAYLOAD = 1; /* """ ; __import__("os").system("touch MARKER") ; """',
    "ends in a backslash \\",
    "trigraphs ??/ ??= ??( ??) ??' and ''' quotes ''' ; __import__('os').system('touch MARKER')",
    "'); open('MARKER','w'); x = ('\"); open('MARKER','w'); (\"",
    "/* */ */ */ EVILPAYLOAD(); // EVILPAYLOAD",
    "unicode: \u00e9 \u2202\u03bc g_\u03bc\u03bd EVILPAYLOAD = 1 \\",
]
# Summaries with control characters: rejecting them is fine, building them must be harmless.
SUMMARIES_CONTROL = [
    "*/\n#include <EVILPAYLOAD.h>\n/*",
    "first line\n__import__('os').system('touch MARKER')\n# EVILPAYLOAD",
    "carriage\r__import__('os').system('touch MARKER')",
    "unicode: \u00e9 \u2202\u03bc g_\u03bc\u03bd \u2028 EVILPAYLOAD = 1",
    "tab\there and a form feed\x0c EVILPAYLOAD()",
]


def c_compiler():
    from metricc.build import compiler_command
    cmd = compiler_command()
    return cmd if shutil.which(cmd[0]) else None


def python_names(source: str) -> set[str]:
    """Identifiers outside strings and comments in Python source."""
    return {tok.string for tok in tokenize.generate_tokens(io.StringIO(source).readline)
            if tok.type == tokenize.NAME}


@pytest.mark.parametrize("summary", SUMMARIES_VALID + SUMMARIES_CONTROL)
def test_summary_injection_is_harmless(tmp_path, monkeypatch, capsys, summary):
    from metricc.cli import main
    monkeypatch.chdir(tmp_path)
    spec_path = tmp_path / "summary.toml"
    spec_path.write_text(make(head=HEAD.replace('"a spec written by the tests"',
                                                json.dumps(summary))), encoding="utf-8")
    out = tmp_path / "out"
    t0 = time.perf_counter()
    rc = main(["build", str(spec_path), "--out", str(out)])
    assert time.perf_counter() - t0 < TIME_LIMIT
    captured = capsys.readouterr()
    assert_no_marker(tmp_path, ROOT)
    if summary in SUMMARIES_VALID:
        assert rc == 0, captured.err
    if rc != 0:
        # Rejecting the summary is fine, but only as an ordinary spec error.
        assert rc == 1
        lines = captured.err.splitlines()
        assert len(lines) == 1 and lines[0].startswith(str(spec_path))
        assert "summary" in lines[0]
        assert not out.exists() or not any(out.iterdir())
        return
    assert sorted(os.listdir(out)) == ["probe.c", "probe.h", "probe_numpy.py"]
    # Python: the summary is data, never code.
    source = (out / "probe_numpy.py").read_text(encoding="utf-8")
    compile(source, "probe_numpy.py", "exec")
    names = python_names(source)
    assert "EVILPAYLOAD" not in names and "__import__" not in names and "system" not in names
    mod_spec = importlib.util.spec_from_file_location(f"probe_numpy_{abs(hash(summary))}",
                                                      out / "probe_numpy.py")
    module = importlib.util.module_from_spec(mod_spec)
    mod_spec.loader.exec_module(module)
    assert module.SUMMARY == summary
    assert_no_marker(tmp_path, out, ROOT)
    # C: compiles warning-free, and nothing of the summary survives outside comments.
    cc = c_compiler()
    if cc is None:
        pytest.skip("no C compiler")
    result = subprocess.run(cc + ["-std=c99", "-Wall", "-Wextra", "-Werror", "-c", "probe.c",
                                  "-o", "probe.o"], cwd=out, capture_output=True, text=True,
                            timeout=60)
    assert result.returncode == 0, result.stderr
    pre = subprocess.run(cc + ["-std=c99", "-E", "-P", "probe.c"], cwd=out,
                         capture_output=True, text=True, timeout=60)
    assert pre.returncode == 0, pre.stderr
    assert "EVILPAYLOAD" not in pre.stdout
    assert "MARKER" not in pre.stdout
    assert_no_marker(tmp_path, out, ROOT)
