"""Hostile and broken specs (issue 12, section 3): each ends as a SpecError naming the file,
line, column and key, quickly, or (where the spec is in fact valid) builds.

Every spec here is a reproducer from the issue's attack run, written small. The spec and
geometry stages are run (metricc.spec.parse_spec, metricc.geometry.derive); no C compiler.
Reference values: Python's math module (libm), marked where used.
"""
from __future__ import annotations

import contextlib
import math
import os
import signal
import threading

import pytest

from metricc import SpecError
from metricc import expr as ex
from metricc.geometry import MAX_TREE_DEPTH, MAX_TREE_SIZE, derive
from metricc.spec import MAX_SPEC_BYTES, load_spec, parse_spec

HEAD = 'name = "t"\ncoordinates = ["t", "r"]\n'
PATH = "hostile.toml"


@contextlib.contextmanager
def hang_guard(seconds: int = 60):
    """Turn a hang into a test failure (not a timing check: the fixed code takes
    milliseconds where the old code took minutes or never returned)."""
    def alarm(signum, frame):
        raise TimeoutError(f"still running after {seconds} s")
    old = signal.signal(signal.SIGALRM, alarm)
    signal.alarm(seconds)
    try:
        yield
    finally:
        signal.alarm(0)
        signal.signal(signal.SIGALRM, old)


def metric_spec(rr: str, before: str = "", after: str = "") -> str:
    return HEAD + before + '[metric]\nt.t = "-1"\nr.r = "' + rr + '"\n' + after


def build(text: str):
    with hang_guard():
        return derive(parse_spec(text, PATH))


def refused(text: str, table, key, fragment: str, token: str | None = None) -> SpecError:
    """The SpecError of ``text``; checks path, table, key, reason and, when ``token`` is
    given, that line:column is where ``token`` first occurs in the text (lines split on \\n
    only, as TOML splits them)."""
    with pytest.raises(SpecError) as info:
        build(text)
    err = info.value
    assert err.path == PATH
    assert (err.table, err.key) == (table, key), str(err)
    assert fragment in err.reason, err.reason
    assert err.line is not None and err.column is not None, str(err)
    first = str(err).splitlines()[0]
    assert first.startswith(f"{PATH}:{err.line}:{err.column}: error: ")
    assert len(first) < 400, first[:200]
    if token is not None:
        at = text.index(token)
        assert (err.line, err.column) == (text.count("\n", 0, at) + 1,
                                          at - (text.rfind("\n", 0, at) + 1) + 1), str(err)
    return err


# -- depth and size ---------------------------------------------------------------------
def test_flat_sum_of_500_terms_builds():
    """A sum of 500 terms is 500 levels deep as a binary tree: no RecursionError."""
    geo = build(metric_spec(" + ".join(["r"] * 499 + ["1"])))
    r = geo.coords[1]
    assert geo.metric[1, 1] == 499 * r + 1


def test_flat_sum_in_constant_value():
    """The CLI's --param values go through expr.constant_value: same depth, no recursion."""
    assert ex.constant_value(" + ".join(["1"] * 3000)) == 3000.0


def test_power_tower_is_refused_as_too_deep():
    text = metric_spec("^".join(["r"] * 99))
    refused(text, "metric", "r.r", "nested too deeply", token="r^r")


def test_helpers_nested_beyond_depth_limit():
    """Each helper wraps the previous one: the depth grows by two levels per helper."""
    n = MAX_TREE_DEPTH
    defs = "[define]\nh0 = \"r\"\n" + "".join(f'h{i} = "sin(h{i - 1}) + 2"\n'
                                             for i in range(1, n + 1))
    with pytest.raises(SpecError) as info:
        build(metric_spec(f"h{n}", before=defs))
    err = info.value
    assert err.table == "define" and "nested too deeply" in err.reason
    # the first helper past the limit is named, at its own line
    k = int(err.key[1:])
    assert 0 < k <= n and err.line == 3 + k + 1 and err.column is not None


def test_doubling_helpers_are_bounded():
    """Each helper uses the previous one twice: the expression doubles per level (14 levels
    took 27 s before the size bound, 16 levels over 100 s)."""
    defs = '[define]\nh0 = "r + 1"\n' + "".join(f'h{i} = "h{i - 1}*h{i - 1} + h{i - 1}"\n'
                                                  for i in range(1, 15))
    text = metric_spec("h14", before=defs)
    err = refused(text, "define", "h10", "too large", token="h9*h9")
    assert str(MAX_TREE_SIZE) in err.reason


# -- numbers that double precision cannot hold -------------------------------------------
def test_expanded_constant_beyond_double_range():
    """(1e300*r)^2 is 1e600*r^2 after sympy distributes the power."""
    refused(metric_spec("(1e300*r)^2"), "metric", "r.r", "outside the range of double")


def test_event_constant_that_overflows():
    text = metric_spec("1 + r^2", after='[events]\nfar = "(1e300*r)^2 - 1"\n')
    refused(text, "events", "far", "outside the range of double", token="(1e300")


def test_function_constant_beyond_double_range():
    text = metric_spec("1 + r^2 + exp(1000)")
    refused(text, "metric", "r.r", "outside the range of double", token="exp(1000)")


@pytest.mark.parametrize("default, rr", [
    ("0", "1 + 1/a"),           # ZeroDivisionError before
    ("1e200", "1 + a^2"),       # OverflowError before
    ("2000", "1 + 2^a"),        # OverflowError before
    ("-1", "2 + a^1.5"),        # TypeError before (a complex number)
])
def test_parameter_defaults_that_break_double_precision(default, rr):
    """The entry is infinite or NaN at every point with these defaults: a located error."""
    text = HEAD + f"[parameters]\na = {default}\n" + metric_spec(rr)[len(HEAD):]
    refused(text, "metric", "r.r", "NaN", token=rr)


def test_huge_integer_argument_of_a_function():
    """cos(123456789012345678901234567890) is a finite constant (NumPy could not take the
    cosine of a Python int beyond 64 bits: TypeError). Reference: math.cos of the nearest
    double (libm)."""
    geo = build(metric_spec("2 + cos(123456789012345678901234567890)"))
    value = float(geo.metric[1, 1])
    assert value == pytest.approx(2 + math.cos(123456789012345678901234567890.0), abs=1e-15)


def test_thousands_of_leading_zeros():
    """int() refuses strings of more than 4300 digits; leading zeros are not digits."""
    geo = build(metric_spec("0" * 5000 + "1 + r^2"))
    assert geo.metric[1, 1] == 1 + geo.coords[1] ** 2
    refused(metric_spec("0." + "0" * 5000 + "1 + r^2"), "metric", "r.r", "beyond 1e")


# -- names -------------------------------------------------------------------------------
@pytest.mark.parametrize("pname", ["dr", "p_r"])
def test_parameter_named_like_a_velocity_or_momentum(pname):
    text = HEAD + f'[parameters]\n{pname} = 2\n' + metric_spec("1 + " + pname)[len(HEAD):]
    refused(text, "parameters", pname, "differential or momentum", token="2\n")


def test_did_you_mean_on_a_huge_name_is_bounded():
    """A 20,000-character unknown name against 100 helpers of 64 characters: the edit
    distance alone was 55 s; the message quoted the whole name."""
    defs = "[define]\n" + "".join(f'h{i:063d} = "r + {i}"\n' for i in range(100))
    text = metric_spec("x" * 20000, before=defs)
    err = refused(text, "metric", "r.r", "unknown name", token="x" * 10)
    assert "20000 characters" in err.reason


def test_unknown_huge_key():
    """A 300,000-character unknown key: 12 s and a 300 KB message before."""
    text = HEAD + "k" * 300000 + ' = 1\n' + metric_spec("1")[len(HEAD):]
    with pytest.raises(SpecError) as info:
        build(text)
    err = info.value
    assert "unknown key" in err.reason
    assert err.line == 3
    assert len(str(err)) < 1000


def test_closest_skips_candidates_of_other_lengths(monkeypatch):
    """No edit distance is computed for a candidate that cannot be within the allowed
    distance (the work was len(word) * len(candidate) for each)."""
    calls = []
    distance = ex._edit_distance
    monkeypatch.setattr(ex, "_edit_distance", lambda a, b: calls.append(b) or distance(a, b))
    assert ex.closest("x" * 200, ["x" * 64, "y"]) is None
    assert calls == []
    assert ex.closest("Sigmaa", ["Sigma", "Delta", "a"]) == "Sigma"
    assert sorted(calls) == ["delta", "sigma"]     # compared in lower case


# -- locations ---------------------------------------------------------------------------
def test_u2028_does_not_shift_lines():
    """TOML breaks lines on \\n only; str.splitlines also on U+2028 (allowed in comments)."""
    text = HEAD + "# a\u2028b\n" + metric_spec("1 + qq")[len(HEAD):]
    refused(text, "metric", "r.r", "unknown name", token="qq")


def test_bracket_and_spaces_after_u2028_is_linear():
    """'[' and many spaces after a U+2028 in a comment: the old location regex backtracked
    (cubic: 2,000 spaces took 13 s); 20,000 spaces here."""
    text = HEAD + "# a\u2028[" + " " * 20000 + "x\n" + metric_spec("1 + qq")[len(HEAD):]
    refused(text, "metric", "r.r", "unknown name", token="qq")


def test_key_after_a_multiline_string_holding_brackets():
    text = (HEAD + "[define]\nh = '''\nr + [\n[metric]\n  '''\n"
            '[metric]\nt.t = "-1"\nr.r = "1 + qq"\n')
    refused(text, "define", "h", "unexpected character", token="[\n[metric]")


@pytest.mark.parametrize("body, token", [
    ('metric = { t.t = "-1", r.r = "1 + qq" }\n', "qq"),
    ('[metric]\nt.t = "-1"\nr.r = """\n1 + qq"""\n', "qq"),
    ("[metric]\nt.t = \"-1\"\nr.r = '''1 +\n   qq'''\n", "qq"),
    ('[metric]\nt.t = "-1"\nr.r = "\\u0031 + \\t qq"\n', "qq"),
    ('[metric]\nt = { t = "-1" }\nr = { r = "1 + qq" }\n', "qq"),
])
def test_located_in_every_toml_form(body, token):
    """Inline tables, dotted headers, quoted keys, multi-line strings and escapes: the
    column is that of the offending name in the file."""
    refused(HEAD + body, "metric", "r.r", "unknown name", token=token)


@pytest.mark.parametrize("key, shown", [("a\nb", "'a\\nb'"), ("a b", "'a b'"),
                                        ("a\u2028b", "'a\\u2028b'")])
def test_quoted_keys_keep_one_line_and_a_location(key, shown):
    quoted_key = '"' + key.replace("\n", "\\n") + '"'
    text = metric_spec("1", after=f'[events]\n{quoted_key} = "r"\n')
    err = refused(text, "events", key, "identifier", token='r"\n')
    first = str(err).splitlines()[0]
    assert f"[events] {shown}: " in first


def test_quoted_key_with_a_dot_is_located():
    text = metric_spec("1", after='[define]\n"a.b" = "r"\n')
    refused(text, "define", "a.b", "not an identifier", token='r"\n')


def test_line_element_after_a_table():
    text = HEAD + '[parameters]\nm = 1\nline_element = "-dt^2 + dr^2"\n'
    refused(text, "parameters", "line_element", "move it above the first table",
            token="-dt^2")


# -- events ------------------------------------------------------------------------------
def test_event_nan_everywhere_is_refused():
    text = metric_spec("1", after='[events]\nbad = "sqrt(-1 - r^2)"\n')
    refused(text, "events", "bad", "NaN", token="sqrt(-1")
    # sqrt(r) - 1 is NaN for r < 0 only: a valid event where r > 0
    geo = build(metric_spec("1", after='[events]\nedge = "sqrt(r) - 1"\n'))
    assert [name for name, _ in geo.events] == ["edge"]


# -- reading -----------------------------------------------------------------------------
@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="needs a named pipe")
def test_endless_input_is_read_only_up_to_the_limit(tmp_path):
    """/dev/zero or a pipe that never ends: at most MAX_SPEC_BYTES + 1 bytes are read (a
    pipe here, so the old unbounded read blocks instead of filling memory)."""
    fifo = tmp_path / "spec.toml"
    os.mkfifo(fifo)
    done = threading.Event()

    def writer():
        try:
            with open(fifo, "wb") as f:
                f.write(b"#" * (MAX_SPEC_BYTES + 10))
                f.flush()
                done.wait(120)
        except OSError:
            pass
    thread = threading.Thread(target=writer, daemon=True)
    thread.start()
    try:
        with hang_guard(30), pytest.raises(SpecError) as info:
            load_spec(fifo)
    finally:
        done.set()
    assert "larger than" in info.value.reason


def test_deeply_nested_toml_arrays():
    """tomllib recurses once per level of nesting: 2,000 levels raised RecursionError."""
    text = HEAD + "x = " + "[" * 2000 + "]" * 2000 + "\n"
    with pytest.raises(SpecError) as info:
        build(text)
    err = info.value
    assert "nested too deeply" in err.reason
    assert err.line == 3 and err.column is not None


def test_toml_error_at_end_of_document_has_a_column():
    """tomllib gives no position for errors 'at end of document' (found by the fuzzer)."""
    text = HEAD + 'summary = """\nnever closed'
    with pytest.raises(SpecError) as info:
        build(text)
    err = info.value
    assert "invalid TOML" in err.reason
    assert (err.line, err.column) == (4, len("never closed") + 1)


def test_powers_of_powers_are_bounded():
    """Found by the fuzzer: ((phi^1.5)^1.5)... 33 deep hung in sympy's Pow (each level about
    3.4 times slower than the one before). Refused at the first power past the limit."""
    x = "phi"
    for _ in range(33):
        x = f"({x})^1.5"
    text = ('name = "t"\ncoordinates = ["r", "u", "phi"]\n[metric]\n'
            f'r.r = "({x})^2"\nu.u = "1"\nphi.phi = "1"\n')
    err = refused(text, "metric", "r.r", "powers of powers nested more than")
    assert err.line == 4
    assert x.index("^1.5)^1.5)") < err.column < len(x) + 10
