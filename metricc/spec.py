"""Stage 1: TOML text -> validated, immutable :class:`Spec`.

Everything that can be checked without computer algebra is checked here: TOML syntax, the
table layout, names (identifiers, collisions, reserved words), the order of helper
definitions, and every expression's syntax and names. Problems raise :class:`SpecError` naming
the file, table, key, line and column. This module imports no sympy, so loading an unchanged
spec from the cache stays fast.
"""
from __future__ import annotations

import hashlib
import json
import math
import re
import tomllib
from dataclasses import dataclass
from pathlib import Path

from . import expr as ex
from .errors import SpecError

MIN_DIM, MAX_DIM = 2, 8
MAX_SPEC_BYTES = 1_000_000

TOP_LEVEL_KEYS = ("name", "summary", "coordinates", "signature", "parameters", "define",
                  "metric", "line_element", "domain", "events", "invariants", "kernels")
# Kernel groups generated only on request (they cost build time and code size).
OPTIONAL_KERNELS = ("curvature", "jacobian")

_IDENT = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")
_SPEC_NAME = re.compile(r"^[a-z][a-z0-9_]*$")
MAX_NAME_LENGTH = 64

# Names a spec may not use: they would shadow the expression language, or they are C keywords
# or macros from the C headers the generated code includes. Generated identifiers are mangled
# (spec names never appear as C or Python identifiers), so this list protects readers of the
# generated code and of error messages, not the compiler.
C_KEYWORDS = frozenset("""
auto break case char const continue default do double else enum extern float for goto if
inline int long register restrict return short signed sizeof static struct switch typedef
union unsigned void volatile while _Bool _Complex _Imaginary _Alignas _Alignof _Atomic
_Generic _Noreturn _Static_assert _Thread_local bool true false
""".split())
C_MACROS = frozenset("""
NULL EOF errno assert HUGE_VAL HUGE_VALF HUGE_VALL INFINITY NAN FP_INFINITE FP_NAN FP_NORMAL
FP_SUBNORMAL FP_ZERO FP_FAST_FMA FP_ILOGB0 FP_ILOGBNAN MATH_ERRNO MATH_ERREXCEPT
math_errhandling EDOM ERANGE EILSEQ isfinite isinf isnan isnormal signbit fpclassify
isgreater isgreaterequal isless islessequal islessgreater isunordered M_PI M_E M_LOG2E
M_LOG10E M_LN2 M_LN10 M_PI_2 M_PI_4 M_1_PI M_2_PI M_2_SQRTPI M_SQRT2 M_SQRT1_2 SIZE_MAX
offsetof CHAR_BIT INT_MAX INT_MIN DBL_MAX DBL_MIN DBL_EPSILON I complex imaginary
""".split())
RESERVED_NAMES = frozenset(ex.FUNCTIONS) | frozenset(ex.CONSTANTS) | {"norm"}
# Statuses the integrator reports; an event may not take one of these names.
RESERVED_EVENT_NAMES = frozenset({"done", "domain", "max_steps", "step_underflow", "not_finite"})


@dataclass(frozen=True)
class Expression:
    """One parsed expression of the spec: where it came from and its syntax tree."""
    table: str | None
    key: str
    text: str
    tree: ex.Node


@dataclass(frozen=True)
class Spec:
    """A validated spec. All sequences are tuples in file order; indices follow ``coordinates``.

    metric: ((i, j), Expression) with i <= j for the pairs the spec gives (absent pairs are 0),
        or empty when ``line_element`` is given instead.
    sha256: hash of the canonical content (independent of comments and formatting).
    """
    path: str
    name: str
    summary: str
    coordinates: tuple[str, ...]
    signature: str | None
    parameters: tuple[tuple[str, float], ...]
    defines: tuple[tuple[str, Expression], ...]
    metric: tuple[tuple[tuple[int, int], Expression], ...]
    line_element: Expression | None
    domain: tuple[tuple[str, Expression], ...]
    events: tuple[tuple[str, Expression], ...]
    invariants: tuple[tuple[str, Expression], ...]
    kernels: tuple[str, ...]
    source: str
    canonical: str
    sha256: str

    @property
    def dim(self) -> int:
        return len(self.coordinates)

    @property
    def parameter_names(self) -> tuple[str, ...]:
        return tuple(name for name, _ in self.parameters)

    def error(self, reason: str, table: str | None = None, key: str | None = None,
              offset: int | None = None) -> SpecError:
        """A SpecError located at ``table``/``key`` (and ``offset`` into its expression)."""
        return _located_error(self.source, self.path, reason, table, key, offset)

    def expression_error(self, expression: Expression, reason: str,
                         offset: int | None = None) -> SpecError:
        return self.error(reason, expression.table, expression.key, offset)


def load_spec(path: str | Path) -> Spec:
    """Read and validate a spec file. Raises SpecError (also for unreadable files)."""
    path = Path(path)
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise SpecError(f"cannot read spec: {exc.strerror or exc}", path=str(path)) from None
    if len(data) > MAX_SPEC_BYTES:
        raise SpecError(f"spec larger than {MAX_SPEC_BYTES} bytes", path=str(path))
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise SpecError(f"spec is not UTF-8 text (byte {exc.start})", path=str(path)) from None
    return parse_spec(text, str(path))


def parse_spec(text: str, path: str = "<string>") -> Spec:
    """Validate spec text (TOML). ``path`` is used in error messages only."""
    if len(text) > MAX_SPEC_BYTES:
        raise SpecError(f"spec larger than {MAX_SPEC_BYTES} bytes", path=path)
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise _toml_error(exc, text, path) from None
    return _Validator(text, path, data).run()


def _toml_error(exc: tomllib.TOMLDecodeError, text: str, path: str) -> SpecError:
    message = str(exc)
    m = re.search(r"\(at line (\d+), column (\d+)\)", message)
    line = column = None
    if m:
        line, column = int(m.group(1)), int(m.group(2))
        message = message[:m.start()].strip()
    elif "end of document" in message:
        line = text.count("\n") + 1
    context = _context_line(text, line, column)
    return SpecError(f"invalid TOML: {message}", path=path, line=line, column=column,
                     context=context)


class _Validator:
    def __init__(self, text: str, path: str, data: dict):
        self.text = text
        self.path = path
        self.data = data

    def fail(self, reason: str, table: str | None = None, key: str | None = None,
             offset: int | None = None) -> SpecError:
        return _located_error(self.text, self.path, reason, table, key, offset)

    def run(self) -> Spec:
        data = self.data
        for key in data:
            if key not in TOP_LEVEL_KEYS:
                hint = ex.closest(key, TOP_LEVEL_KEYS)
                raise self.fail("unknown key" + (f" (did you mean {hint!r}?)" if hint else
                                f"; allowed keys: {', '.join(TOP_LEVEL_KEYS)}"), None, key)
        name = self.spec_name()
        summary = self.summary()
        coordinates = self.coordinates()
        signature = self.signature(len(coordinates))
        parameters = self.parameters(coordinates)
        taken = {c: "coordinate" for c in coordinates}
        taken.update({p: "parameter" for p, _ in parameters})
        defines = self.defines(coordinates, taken)
        known = set(taken)
        if ("metric" in data) == ("line_element" in data):
            raise self.fail("give exactly one of [metric] and line_element"
                            + (" (both are present)" if "metric" in data else ""), None,
                            "metric" if "metric" in data else None)
        metric: tuple = ()
        line_element = None
        if "metric" in data:
            metric = self.metric(coordinates, known)
        else:
            line_element = self.line_element(coordinates, known)
        domain = self.labelled_table("domain", known, coordinates)
        events = self.labelled_table("events", known, coordinates)
        for ev_name, e in events:
            if ev_name in RESERVED_EVENT_NAMES:
                raise self.fail(f"event name {ev_name!r} is reserved (an integrator status)",
                                "events", ev_name)
        state_names = ({"d" + c for c in coordinates} | {"p_" + c for c in coordinates}
                       | {"norm"})
        invariants = self.labelled_table("invariants", known | state_names, coordinates)
        kernels = self.kernel_groups()
        canonical = json.dumps({
            "name": name, "summary": summary, "coordinates": list(coordinates),
            "signature": signature,
            "parameters": [[p, repr(v)] for p, v in parameters],
            "define": [[k, e.text] for k, e in defines],
            "metric": [[coordinates[i], coordinates[j], e.text] for (i, j), e in metric],
            "line_element": line_element.text if line_element else None,
            "domain": [[k, e.text] for k, e in domain],
            "events": [[k, e.text] for k, e in events],
            "invariants": [[k, e.text] for k, e in invariants],
            "kernels": list(kernels),
        }, sort_keys=True, separators=(",", ":"), ensure_ascii=True)
        return Spec(path=self.path, name=name, summary=summary, coordinates=coordinates,
                    signature=signature, parameters=parameters, defines=defines,
                    metric=metric, line_element=line_element, domain=domain, events=events,
                    invariants=invariants, kernels=kernels, source=self.text,
                    canonical=canonical,
                    sha256=hashlib.sha256(canonical.encode()).hexdigest())

    # -- top-level keys ------------------------------------------------------------------
    def spec_name(self) -> str:
        if "name" not in self.data:
            raise self.fail("missing key 'name' (the prefix of every generated C symbol)")
        name = self.data["name"]
        if not isinstance(name, str) or not _SPEC_NAME.match(name):
            raise self.fail("must be a string matching [a-z][a-z0-9_]* (it prefixes every "
                            "generated C symbol)", None, "name")
        if len(name) > MAX_NAME_LENGTH:
            raise self.fail(f"longer than {MAX_NAME_LENGTH} characters", None, "name")
        if name in C_KEYWORDS:
            raise self.fail(f"{name!r} is a C keyword; choose another name", None, "name")
        return name

    def summary(self) -> str:
        summary = self.data.get("summary", "")
        if not isinstance(summary, str):
            raise self.fail("must be a string", None, "summary")
        if len(summary) > 200 or any(not ch.isprintable() for ch in summary):
            raise self.fail("must be one line of at most 200 printable characters", None,
                            "summary")
        return summary

    def coordinates(self) -> tuple[str, ...]:
        if "coordinates" not in self.data:
            raise self.fail("missing key 'coordinates' (a list of coordinate names)")
        coords = self.data["coordinates"]
        if not isinstance(coords, list) or not all(isinstance(c, str) for c in coords):
            raise self.fail("must be a list of names, e.g. [\"t\", \"r\"]", None,
                            "coordinates")
        if not MIN_DIM <= len(coords) <= MAX_DIM:
            raise self.fail(f"dimension {len(coords)} is out of range: give {MIN_DIM} to "
                            f"{MAX_DIM} coordinates", None, "coordinates")
        seen = set()
        for c in coords:
            self.check_name(c, None, "coordinates")
            if c in seen:
                raise self.fail(f"coordinate {c!r} is listed twice", None, "coordinates")
            seen.add(c)
        for c in coords:
            for other in coords:
                if c == "d" + other or c == "p_" + other:
                    raise self.fail(f"coordinate {c!r} reads as the differential or momentum "
                                    f"of {other!r}; rename it", None, "coordinates")
        return tuple(coords)

    def signature(self, dim: int) -> str | None:
        if "signature" not in self.data:
            return None
        sig = self.data["signature"]
        if not isinstance(sig, str) or not re.fullmatch(r"[+-]+", sig or "x"):
            raise self.fail("must be a string of '+' and '-', e.g. \"-+++\"", None,
                            "signature")
        if len(sig) != dim:
            raise self.fail(f"has {len(sig)} signs but there are {dim} coordinates", None,
                            "signature")
        return sig

    def parameters(self, coords) -> tuple[tuple[str, float], ...]:
        table = self.table("parameters")
        out = []
        for pname, value in table.items():
            self.check_name(pname, "parameters", pname)
            if pname in coords:
                raise self.fail(f"parameter {pname!r} has the name of a coordinate", "parameters",
                                pname)
            if isinstance(value, bool) or not isinstance(value, (int, float)):
                raise self.fail(f"default must be a number, got {type(value).__name__} "
                                f"{value!r}", "parameters", pname)
            value = float(value)
            if not math.isfinite(value):
                raise self.fail(f"default must be finite, got {value!r}", "parameters", pname)
            out.append((pname, value))
        return tuple(out)

    def defines(self, coords, taken: dict) -> tuple[tuple[str, Expression], ...]:
        table = self.table("define")
        names_in_table = list(table)
        # Names first, so a clash is reported as a clash and not as a forward reference.
        for dname in names_in_table:
            self.check_name(dname, "define", dname)
            if dname in taken:
                raise self.fail(f"{dname!r} is already a {taken[dname]}", "define", dname)
            for other in coords:
                if dname in ("d" + other, "p_" + other):
                    raise self.fail(f"{dname!r} reads as the differential or momentum of "
                                    f"coordinate {other!r}; rename it", "define", dname)
        out = []
        for i, (dname, text) in enumerate(table.items()):
            e = self.expression("define", dname, text)
            for used, pos in ex.names(e.tree):
                if used == dname:
                    raise self.fail(f"{dname!r} is defined in terms of itself (cyclic "
                                    "definition)", "define", dname, pos)
                if used in names_in_table[i + 1:]:
                    raise self.fail(f"{used!r} is defined later in [define]; move its "
                                    "definition above this one (helpers are evaluated in "
                                    "order)", "define", dname, pos)
            self.check_names(e, set(taken), coords)
            taken[dname] = "helper"
            out.append((dname, e))
        return tuple(out)

    def metric(self, coords, known) -> tuple:
        table = self.data["metric"]
        if not isinstance(table, dict):
            raise self.fail("must be a table of coordinate pairs, e.g. r.r = \"...\"", None,
                            "metric")
        entries: dict[tuple[int, int], Expression] = {}
        for first, row in table.items():
            if not isinstance(row, dict):
                raise self.fail("keys must be coordinate pairs written a.b (e.g. t.phi)",
                                "metric", first)
            if first not in coords:
                raise self.unknown_coordinate(first, coords, f"{first}.{next(iter(row), '')}")
            for second, text in row.items():
                key = f"{first}.{second}"
                if isinstance(text, dict):
                    raise self.fail("keys must be exactly two coordinates, a.b", "metric",
                                    key + "." + next(iter(text), ""))
                if second not in coords:
                    raise self.unknown_coordinate(second, coords, key)
                i, j = coords.index(first), coords.index(second)
                pair = (min(i, j), max(i, j))
                if pair in entries:
                    prev = entries[pair].key
                    raise self.fail(f"the pair is given twice ({prev} and {key}); the metric "
                                    "is symmetric, give each unordered pair once", "metric", key)
                e = self.expression("metric", key, text)
                self.check_names(e, known, coords)
                entries[pair] = e
        if not entries:
            raise self.fail("the metric table is empty", None, "metric")
        return tuple(sorted(entries.items()))

    def line_element(self, coords, known) -> Expression:
        text = self.data["line_element"]
        e = self.expression(None, "line_element", text)
        self.check_names(e, known | {"d" + c for c in coords}, coords)
        return e

    def labelled_table(self, table_name: str, known, coords) -> tuple:
        table = self.table(table_name)
        out = []
        for label, text in table.items():
            if not _IDENT.match(label):
                raise self.fail("names must be identifiers ([A-Za-z_][A-Za-z0-9_]*)",
                                table_name, label)
            e = self.expression(table_name, label, text)
            self.check_names(e, known, coords)
            out.append((label, e))
        return tuple(out)

    def kernel_groups(self) -> tuple[str, ...]:
        value = self.data.get("kernels", [])
        if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
            raise self.fail("must be a list of names, e.g. [\"curvature\", \"jacobian\"]",
                            None, "kernels")
        for v in value:
            if v not in OPTIONAL_KERNELS:
                near = ex.closest(v, OPTIONAL_KERNELS)
                raise self.fail(f"unknown kernel group {v!r}" + (f" (did you mean {near!r}?)"
                                if near else f"; choose from {', '.join(OPTIONAL_KERNELS)}"),
                                None, "kernels")
        return tuple(sorted(set(value)))

    # -- helpers -------------------------------------------------------------------------
    def table(self, name: str) -> dict:
        value = self.data.get(name, {})
        if not isinstance(value, dict):
            raise self.fail(f"must be a table: write [{name}] and one key per line", None, name)
        for key, v in value.items():
            if isinstance(v, dict):
                raise self.fail("nested tables are not allowed here", name, key)
        return value

    def check_name(self, name: str, table: str | None, key: str) -> None:
        what = f"name {name!r}"
        if not isinstance(name, str) or not _IDENT.match(name):
            raise self.fail(f"{what} is not an identifier ([A-Za-z_][A-Za-z0-9_]*)", table, key)
        if len(name) > MAX_NAME_LENGTH:
            raise self.fail(f"{what} is longer than {MAX_NAME_LENGTH} characters", table, key)
        if name in RESERVED_NAMES:
            raise self.fail(f"{what} is reserved by the expression language; rename it", table,
                            key)
        if name in C_KEYWORDS:
            raise self.fail(f"{what} is a C keyword; rename it", table, key)
        if name in C_MACROS:
            raise self.fail(f"{what} is a macro in the C standard headers; rename it", table,
                            key)
        if name.startswith("__") or re.match(r"^_[A-Z]", name):
            raise self.fail(f"{what} is reserved in C (leading underscore); rename it", table,
                            key)

    def expression(self, table: str | None, key: str, text) -> Expression:
        if isinstance(text, bool) or not isinstance(text, (str, int, float)):
            raise self.fail(f"expected an expression in a string, got {type(text).__name__}",
                            table, key)
        if not isinstance(text, str):
            if not math.isfinite(text):
                raise self.fail("number must be finite", table, key)
            text = repr(text)
        try:
            tree = ex.parse(text)
        except ex.ExprError as exc:
            raise self.fail(exc.message, table, key, exc.offset) from None
        return Expression(table, key, text, tree)

    def check_names(self, e: Expression, known, coords) -> None:
        for used, pos in ex.names(e.tree):
            if used in known or used in ex.CONSTANTS:
                continue
            if used in ex.FUNCTIONS:
                raise self.fail(f"{used!r} is a function: write {used}(...)", e.table, e.key, pos)
            hint = ""
            if used.startswith("d") and used[1:] in coords:
                hint = (" (d<coordinate> is a differential in line_element and a velocity in "
                        "[invariants]; it is not allowed here)")
            else:
                near = ex.closest(used, set(known) | set(ex.CONSTANTS))
                if near:
                    hint = f" (did you mean {near!r}?)"
            raise self.fail(f"unknown name {used!r}{hint}", e.table, e.key, pos)

    def unknown_coordinate(self, name, coords, key) -> SpecError:
        near = ex.closest(name, coords)
        hint = f" (did you mean {near!r}?)" if near else f"; coordinates are {', '.join(coords)}"
        return self.fail(f"{name!r} is not a coordinate{hint}", "metric", key)


# -- locating keys in the source text, for compiler-style messages --------------------------
_HEADER = re.compile(r"^\s*\[\s*([^\[\]]+?)\s*\]\s*(#.*)?$")
_KEY_PART = r'(?:[A-Za-z0-9_-]+|"[^"]*"|\'[^\']*\')'
_ASSIGN = re.compile(rf"^\s*({_KEY_PART}(?:\s*\.\s*{_KEY_PART})*)\s*=\s*")


def _split_key(raw: str) -> list[str]:
    parts = re.findall(_KEY_PART, raw)
    return [p[1:-1] if p[:1] in "\"'" else p for p in parts]


def _locate(text: str, table: str | None, key: str | None) -> tuple[int | None, int | None]:
    """(line, column of the value's first character inside its quotes) of table.key."""
    if key is None and table is None:
        return None, None
    target = ([table] if table else []) + (key.split(".") if key else [])
    header: list[str] = []
    prefix_hit = None
    for lineno, line in enumerate(text.splitlines(), 1):
        m = _HEADER.match(line)
        if m and not line.lstrip().startswith("[["):
            header = _split_key(m.group(1))
            if header == target:
                return lineno, None
            continue
        m = _ASSIGN.match(line)
        if not m:
            continue
        full = header + _split_key(m.group(1))
        if full == target:
            col = m.end() + 1
            if line[m.end():m.end() + 1] in ("\"", "'") and line[m.end():m.end() + 3] not in (
                    '"""', "'''"):
                col += 1
            return lineno, col
        if prefix_hit is None and full[:len(target)] == target:
            prefix_hit = (lineno, None)
    return prefix_hit or (None, None)


def _context_line(text: str, line: int | None, column: int | None) -> str:
    if line is None:
        return ""
    lines = text.splitlines()
    if not 1 <= line <= len(lines):
        return ""
    src = lines[line - 1]
    if column is None:
        return src
    return src + "\n" + " " * (column - 1) + "^"


def _located_error(text: str, path: str, reason: str, table: str | None, key: str | None,
                   offset: int | None) -> SpecError:
    line, col = _locate(text, table, key)
    if col is not None and offset is not None:
        col += offset
    return SpecError(reason, path=path, table=table, key=key, line=line, column=col,
                     context=_context_line(text, line, col))
