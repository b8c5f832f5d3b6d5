"""A grammar fuzzer for specs (issue 12, section 5).

Specs are generated from the spec grammar (tables, keys, names, expressions of the
expression language with deep nesting, long flat sums, helper chains, big and small numbers,
unicode, reserved and bad names, unknown functions) and then, often, mutated as text (lines
deleted, duplicated, swapped or cut, garbage and U+2028 inserted). Each one goes through the
spec and geometry stages (metricc.spec.parse_spec, metricc.geometry.derive; no C compiler).

Asserted for every spec:
- it builds, or it raises SpecError; no other exception escapes;
- the SpecError names the file and is located. The rule: ``path:line:column`` whenever the
  problem is at a place in the file (a key, a value, a table header, a TOML syntax error).
  Only problems with no place of their own carry no line: the file as a whole (too large, not
  UTF-8) and keys that are absent (``name``, ``coordinates``, neither [metric] nor
  line_element). The line is a line of the file (lines split on "\\n", as TOML splits them);
- the first line of the message is short (names are cut), whatever the spec holds;
- bounded time: hypothesis' deadline, FUZZ_DEADLINE_S per spec (generous: the fixed code
  takes well under a second; the old one took 27 s to hours on some of these). Memory is
  bounded by the same work limits (expression sizes, the file size), not measured per spec;
  the long run reports the process's peak resident memory.

The default run tries FAST_EXAMPLES specs with a fixed seed (about 27 s here). The long run
(``-m slow``) tries METRICC_FUZZ_EXAMPLES specs (default 600, about a minute, so the whole
suite stays short; the long runs in the notes used 3000 and 5000) with seed METRICC_FUZZ_SEED
(default 12, so a plain test run is reproducible; ``random`` for a fresh draw), and prints the outcome counts (``-s`` shows them; with
METRICC_FUZZ_REPORT=path they are also written there as JSON).
"""
from __future__ import annotations

import json
import os
import re
import time
from collections import Counter
from datetime import timedelta

import pytest
from hypothesis import HealthCheck, given, seed, settings
from hypothesis import strategies as st

from metricc import SpecError
from metricc import expr as ex
from metricc.geometry import derive
from metricc.spec import parse_spec

PATH = "fuzz.toml"
FAST_EXAMPLES = 150
FUZZ_DEADLINE_S = 10.0
# reasons of the SpecErrors that have no place in the file (see the module docstring)
UNPLACED = ("missing key", "give exactly one of", "spec larger than", "spec is not UTF-8")

COORDS = ["t", "r", "x", "y", "z", "theta", "phi", "u", "v", "chi"]
NAMES = ["M", "a", "Q", "k", "b", "R", "eps", "Sigma", "Delta", "rho2", "f", "h", "A1"]
BAD_NAMES = ["sin", "pi", "int", "NULL", "_X", "__a", "norm", "1a", "a-b", "a b", "a.b", "",
             "\u00e9t\u00e9", "x" * 70, "dr", "p_r", "dt", "line_element", "domain", "done",
             "name", "a\nb", "\u2028", "k" * 3000]
FUNCS = list(ex.FUNCTIONS) + ["foo", "Sin", "sqrtt", "pow", "eval", "__import__", "x" * 300]
NUMBERS = ["1e300", "1e-300", "1e301", "1e-301", "0", "0.0", "1000000000e300",
           "0" * 5000 + "1", "0." + "0" * 400 + "1", "1" * 41, "2.", ".5", "1e", "1.2.3",
           "6.674e-11", "123456789012345678901234567890", "1e99999999999", "00001e-0005"]
OPS = ["+", "-", "*", "/", "^", "**"]
DEFAULTS = ["1", "0", "-1", "1e200", "2000", "0.5", "1e-320", "true", '"x"', "nan"]
KERNELS = ["curvature", "jacobian", "curvatur"]
OTHER_VALUES = ["1", "-2.5", "true", "[1, 2]", "{ a = 1 }", "nan", "inf", "1e308",
                "'''\nr\n'''", '"""\nr + [\n"""']
INSERTED_LINES = ["[metric]", "[[events]]", "[define.x]", "[a.b.c]", '"q\\nk" = "r"',
                  "a.b = 1", "x = [[[1]]]"]

text_chars = st.characters(exclude_categories=("Cs",))


def numbers(wild: bool):
    small = st.one_of(st.integers(0, 100).map(str), st.sampled_from(["0.5", "2.5", "1e-3", "3"]))
    if not wild:
        return small
    return st.one_of(small, st.integers(0, 10 ** 6).map(str),
                     st.floats(min_value=0, allow_nan=False, allow_infinity=False).map(repr),
                     st.sampled_from(NUMBERS))


def expressions(names: list[str], wild: bool):
    """Expressions of the language over ``names``. wild: also unknown and bad names, unknown
    functions, syntax errors, deep nesting and long flat sums."""
    names = names or ["r"]
    if wild:
        leaves = st.one_of(numbers(True), st.sampled_from(names), st.just("pi"),
                           st.sampled_from(NAMES + BAD_NAMES[:6]))
        fn = st.sampled_from(FUNCS)
    else:
        leaves = st.one_of(numbers(False), st.sampled_from(names), st.just("pi"))
        fn = st.sampled_from([f for f, n in ex.FUNCTIONS.items() if n == 1])

    def extend(children):
        return st.one_of(
            st.tuples(children, st.sampled_from(OPS), children).map(" ".join),
            children.map(lambda a: "-" + a),
            children.map(lambda a: f"({a})"),
            st.tuples(fn, children).map(lambda t: f"{t[0]}({t[1]})"),
            st.tuples(children, children).map(lambda t: f"atan2({t[0]}, {t[1]})"),
        )
    tree = st.recursive(leaves, extend, max_leaves=12 if not wild else 25)
    if not wild:
        return tree
    nested = st.tuples(
        st.integers(1, 160),
        st.sampled_from(["({})", "sin({})", "r^{}", "-{}", "exp({})", "2^{}", "({})^1.5",
                         "(1+{})*(1+{})", "{}*{} + 1"]),
        leaves).map(lambda t: _wrap(*t))
    flat = st.tuples(st.integers(2, 3000), leaves, st.sampled_from([" + ", "*", " - "])).map(
        lambda t: t[2].join([t[1]] * t[0]))
    garbage = st.text(text_chars, max_size=20)
    return st.one_of(tree, tree, nested, flat, garbage)


def _wrap(depth: int, pattern: str, leaf: str) -> str:
    out = leaf
    for _ in range(depth):
        if len(out) > 30_000:
            break
        out = pattern.replace("{}", out)
    return out


def key(name: str) -> str:
    """A TOML key: bare when it can be, else a quoted one."""
    if re.fullmatch(r"[A-Za-z0-9_-]+", name):
        return name
    return json.dumps(name, ensure_ascii=False)


def value(draw, names, wild: bool) -> str:
    """A TOML value: mostly an expression string, sometimes another kind."""
    kind = draw(st.integers(0, 19))
    if kind == 0 and wild:
        return draw(st.sampled_from(OTHER_VALUES))
    text = draw(expressions(names, wild))
    if kind == 1 and "'" not in text and "\n" not in text:
        return f"'{text}'"      # a literal string (no escapes)
    return json.dumps(text, ensure_ascii=False)


def name_from(draw, pool: list[str], wild: bool) -> str:
    if not wild:
        return draw(st.sampled_from(pool))
    return draw(st.one_of(st.sampled_from(pool), st.sampled_from(BAD_NAMES),
                          st.from_regex(r"[A-Za-z_][A-Za-z0-9_]{0,8}", fullmatch=True)))


def chance(draw, n: int) -> bool:
    """True about once in n draws (hypothesis favours the first choice: False)."""
    return draw(st.sampled_from([False] * (n - 1) + [True]))


def unique_names(draw, pool: list[str], n: int, wild) -> list[str]:
    """n names (fewer if they repeat: TOML refuses a key given twice in a table)."""
    out = []
    for _ in range(n):
        name = name_from(draw, pool, wild())
        if name not in out:
            out.append(name)
    return out


@st.composite
def specs(draw) -> str:
    """Spec text from the grammar. Each part is drawn sane (valid names, small expressions
    over known names: many such specs build) or, one time in six, wild (anything above); then
    the text is mutated in about a third of the specs."""
    def wild():
        return chance(draw, 6)
    lines = []
    dim = draw(st.integers(2, 4)) if not wild() else draw(st.integers(0, 9))
    coords = draw(st.lists(st.sampled_from(COORDS), min_size=dim, max_size=dim,
                           unique=not wild()))
    if coords and wild():
        coords[0] = draw(st.sampled_from(BAD_NAMES))
    if not wild():
        lines.append('name = "t"')
    elif draw(st.booleans()):
        lines.append("name = " + json.dumps(draw(st.sampled_from(["kerr", "Bad", "int",
                                                                   "a" * 70]))))
    if chance(draw, 4):
        summary = draw(st.text(text_chars, max_size=30)) if wild() else "a metric"
        lines.append("summary = " + json.dumps(summary, ensure_ascii=False))
    if not wild():
        lines.append("coordinates = " + json.dumps(coords, ensure_ascii=False))
    if chance(draw, 4):
        lines.append(f'signature = "{draw(st.from_regex(r"[-+x]{1,6}", fullmatch=True))}"')
    if chance(draw, 6):
        lines.append("kernels = " + json.dumps(draw(st.lists(st.sampled_from(KERNELS),
                                                              max_size=2))))
    use_line_element = chance(draw, 4)
    known = list(coords)
    tables = []
    if draw(st.booleans()):
        tables.append("[parameters]")
        for p in unique_names(draw, NAMES, draw(st.integers(0, 3)), wild):
            tables.append(f"{key(p)} = {draw(st.sampled_from(DEFAULTS))}")
            known.append(p)
    if draw(st.booleans()):
        tables.append("[define]")
        if chance(draw, 4):    # each helper uses the previous one several times
            levels, uses = draw(st.integers(2, 20)), draw(st.integers(1, 3))
            tables.append(f'h0 = "{coords[-1] if coords else "r"} + 1"')
            for i in range(1, levels + 1):
                tables.append(f'h{i} = "' + "*".join([f"h{i - 1}"] * uses) + f' + h{i - 1}"')
            known += [f"h{i}" for i in range(levels + 1)]
        for h in unique_names(draw, NAMES, draw(st.integers(0, 3)), wild):
            if h not in known[len(coords):]:    # TOML refuses a key given twice
                tables.append(f"{key(h)} = {value(draw, known, wild())}")
                known.append(h)
    if use_line_element:
        terms = [f"({draw(expressions(known, wild()))})*d{c}^2" for c in coords]
        if wild():
            terms.append(f"{draw(expressions(known, True))}*d{draw(st.sampled_from(COORDS))}")
        lines.append(f"line_element = {json.dumps(' + '.join(terms), ensure_ascii=False)}")
    lines += tables
    if not use_line_element or wild():
        lines.append("[metric]")
        for c in coords:    # a diagonal (squares, so often non-singular), then more entries
            entry = draw(expressions(known, wild()))
            sign = draw(st.sampled_from(["", "-", "1 + "]))
            lines.append(f"{key(c)}.{key(c)} = "
                         + json.dumps(f"{sign}({entry})^2", ensure_ascii=False))
        pairs = [(a, b) for i, a in enumerate(coords) for b in coords[i + 1:]]
        for a, b in draw(st.lists(st.sampled_from(pairs), max_size=2, unique=True)
                         if pairs else st.just([])):
            if wild():
                b = draw(st.sampled_from(COORDS + BAD_NAMES[:8]))
            lines.append(f"{key(a)}.{key(b)} = {value(draw, known, wild())}")
    for table in ("domain", "events", "invariants"):
        if chance(draw, 3):
            lines.append(f"[{table}]")
            extra = ["d" + c for c in coords] + ["norm"] if table == "invariants" else []
            for label in unique_names(draw, ["inside", "far", "E"], draw(st.integers(1, 2)),
                                      wild):
                lines.append(f"{key(label)} = {value(draw, known + extra, wild())}")
    if chance(draw, 16):       # a top-level key written after the tables
        lines.append('line_element = "-dt^2 + dr^2"')
    if chance(draw, 3):
        for _ in range(draw(st.integers(1, 2))):
            lines = mutate(draw, lines)
    return "\n".join(lines) + "\n"


def mutate(draw, lines: list[str]) -> list[str]:
    lines = list(lines) or [""]
    i = draw(st.integers(0, len(lines) - 1))
    kind = draw(st.integers(0, 7))
    if kind == 0:
        del lines[i]
    elif kind == 1:
        lines.insert(i, lines[i])
    elif kind == 2:
        j = draw(st.integers(0, len(lines) - 1))
        lines[i], lines[j] = lines[j], lines[i]
    elif kind == 3:
        lines[i] = lines[i][:draw(st.integers(0, len(lines[i])))]
    elif kind == 4:
        lines.insert(i, draw(st.text(text_chars, max_size=40)).replace("\n", " "))
    elif kind == 5:
        lines.insert(i, "# c\u2028[" + " " * draw(st.integers(0, 5000)) + "x")
    elif kind == 6:
        lines.insert(i, draw(st.sampled_from(INSERTED_LINES)))
    else:
        lines[i] = lines[i] + draw(st.sampled_from([" # tail", " ]", '"', "\\", "\u2028"]))
    return lines


def outcome(text: str) -> str:
    """Run one spec; return the outcome's kind, or fail the test."""
    try:
        derive(parse_spec(text, PATH))
    except SpecError as err:
        check_located(err, text)
        return "SpecError: " + kind_of(err.reason)
    return "built"


def check_located(err: SpecError, text: str) -> None:
    first = str(err).splitlines()[0]
    assert err.path == PATH and first.startswith(PATH + ":"), first
    assert len(first) < 1000, first[:300]
    if err.line is None:
        assert err.reason.startswith(UNPLACED), f"no line: {first}"
        return
    assert err.column is not None, f"no column: {first}"
    assert 1 <= err.line <= text.count("\n") + 1, first
    assert first.startswith(f"{PATH}:{err.line}:{err.column}: error: "), first


def kind_of(reason: str) -> str:
    """A short kind for counting: the reason without names, numbers and hints."""
    reason = re.sub(r"'[^']*'(\.\.\. \(\d+ characters\))?", "'…'", reason)
    reason = re.sub(r"\d[\d.e+-]*", "N", reason)
    reason = re.sub(r" at [a-zA-Z_]+=.*", " at <point>", reason)
    return re.split(r"[(;:,]", reason)[0].strip()[:70]


COUNTS: Counter = Counter()


def _run(text: str) -> None:
    t0 = time.perf_counter()
    COUNTS[outcome(text)] += 1
    took = time.perf_counter() - t0
    COUNTS["_seconds"] += took
    COUNTS["_slowest"] = max(COUNTS["_slowest"], took)


COMMON = dict(deadline=timedelta(seconds=FUZZ_DEADLINE_S), database=None,
              suppress_health_check=list(HealthCheck), print_blob=True)


@seed(20261202)
@settings(max_examples=FAST_EXAMPLES, **COMMON)
@given(specs())
def test_fuzz_specs_fail_cleanly(text):
    _run(text)


@pytest.mark.slow
def test_fuzz_specs_long_run():
    n = int(os.environ.get("METRICC_FUZZ_EXAMPLES", "600"))
    run_seed = os.environ.get("METRICC_FUZZ_SEED", "12")
    COUNTS.clear()

    @settings(max_examples=n, **COMMON)
    @given(specs())
    def run(text):
        _run(text)
    if run_seed != "random":
        run = seed(int(run_seed))(run)
    run()
    import resource     # Unix only, and only for this report
    report = {"seconds": round(COUNTS.pop("_seconds", 0.0), 1),
              "slowest_spec_seconds": round(COUNTS.pop("_slowest", 0.0), 3),
              "examples": sum(COUNTS.values()),
              # peak resident memory of the whole test process (Linux: kilobytes)
              "peak_rss_mb": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024),
              "outcomes": dict(COUNTS.most_common())}
    print(json.dumps(report, indent=1, ensure_ascii=False))
    if os.environ.get("METRICC_FUZZ_REPORT"):
        with open(os.environ["METRICC_FUZZ_REPORT"], "w", encoding="utf-8") as f:
            json.dump(report, f, indent=1, ensure_ascii=False)
