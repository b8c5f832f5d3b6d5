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
from .errors import SpecError, quoted

MIN_DIM, MAX_DIM = 2, 8
MAX_SPEC_BYTES = 1_000_000

TOP_LEVEL_KEYS = ("name", "summary", "coordinates", "signature", "parameters", "define",
                  "metric", "line_element", "domain", "events", "invariants", "kernels",
                  "sampling", "periods")
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
RESERVED_EVENT_NAMES = frozenset({"done", "domain", "max_steps", "step_underflow", "not_finite",
                                  "bad_input", "interrupted"})


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
    # (coordinate, low, high) in file order: where the numerical checks of the build and
    # ``metricc verify`` draw that coordinate (not a limit on integrations)
    sampling: tuple[tuple[str, float, float], ...] = ()
    # (coordinate, period) in file order: the coordinate is periodic with that period, an
    # expression in numbers, pi and the parameters (positive and finite at the defaults)
    periods: tuple[tuple[str, Expression], ...] = ()

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
        # at most one byte more than allowed: a spec path may name /dev/zero or a pipe
        with open(path, "rb") as f:
            data = f.read(MAX_SPEC_BYTES + 1)
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
    except RecursionError:      # tomllib recurses once per level of nested arrays/tables
        line, column = _line_col(text, _deep_nesting(text))
        raise SpecError("invalid TOML: arrays or inline tables nested too deeply", path=path,
                        line=line, column=column,
                        context=_context_line(text, line, column)) from None
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
        column = len(text) - text.rfind("\n")
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
        self.misplaced_keys()
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
                raise self.fail(f"event name {quoted(ev_name)} is reserved (an integrator status)",
                                "events", ev_name)
        state_names = ({"d" + c for c in coordinates} | {"p_" + c for c in coordinates}
                       | {"norm"})
        invariants = self.labelled_table("invariants", known | state_names, coordinates)
        kernels = self.kernel_groups()
        sampling = self.sampling(coordinates)
        periods = self.periods(coordinates, parameters)
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
            # only when given, so specs without it keep their hashes
            **({"sampling": [[c, repr(lo), repr(hi)] for c, lo, hi in sampling]}
               if sampling else {}),
            **({"periods": [[c, e.text] for c, e in periods]} if periods else {}),
        }, sort_keys=True, separators=(",", ":"), ensure_ascii=True)
        return Spec(path=self.path, name=name, summary=summary, coordinates=coordinates,
                    signature=signature, parameters=parameters, defines=defines,
                    metric=metric, line_element=line_element, domain=domain, events=events,
                    invariants=invariants, kernels=kernels, source=self.text,
                    canonical=canonical, sampling=sampling, periods=periods,
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
            raise self.fail(f"{quoted(name)} is a C keyword; choose another name", None, "name")
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
                raise self.fail(f"coordinate {quoted(c)} is listed twice", None, "coordinates")
            seen.add(c)
        for c in coords:
            for other in coords:
                if c == "d" + other or c == "p_" + other:
                    raise self.fail(f"coordinate {quoted(c)} reads as the differential or momentum "
                                    f"of {quoted(other)}; rename it", None, "coordinates")
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
                raise self.fail(f"parameter {quoted(pname)} has the name of a coordinate",
                                "parameters", pname)
            self.check_not_state_name(pname, coords, "parameters")
            if isinstance(value, bool) or not isinstance(value, (int, float)):
                raise self.fail(f"default must be a number, got {type(value).__name__} "
                                f"{quoted(value)}", "parameters", pname)
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
                raise self.fail(f"{quoted(dname)} is already a {taken[dname]}", "define", dname)
            self.check_not_state_name(dname, coords, "define")
        out = []
        for i, (dname, text) in enumerate(table.items()):
            e = self.expression("define", dname, text)
            for used, pos in ex.names(e.tree):
                if used == dname:
                    raise self.fail(f"{quoted(dname)} is defined in terms of itself (cyclic "
                                    "definition)", "define", dname, pos)
                if used in names_in_table[i + 1:]:
                    raise self.fail(f"{quoted(used)} is defined later in [define]; move its "
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
                raise self.fail(f"unknown kernel group {quoted(v)}" + (f" (did you mean {near!r}?)"
                                if near else f"; choose from {', '.join(OPTIONAL_KERNELS)}"),
                                None, "kernels")
        return tuple(sorted(set(value)))

    def sampling(self, coords) -> tuple[tuple[str, float, float], ...]:
        """[sampling]: coordinate = [low, high], where validation and verify draw points."""
        value = self.data.get("sampling", {})
        if not isinstance(value, dict):
            raise self.fail("must be a table: write [sampling] and one line per coordinate, "
                            "e.g. r = [2.5, 50]", None, "sampling")
        out = []
        for cname, span in value.items():
            self.check_coordinate_key(cname, coords, "sampling")
            if not (isinstance(span, list) and len(span) == 2 and all(
                    isinstance(v, (int, float)) and not isinstance(v, bool) for v in span)):
                raise self.fail("must be [low, high], two numbers", "sampling", cname)
            lo, hi = float(span[0]), float(span[1])
            if not (abs(lo) <= 1e300 and abs(hi) <= 1e300 and lo < hi):
                raise self.fail(f"must be [low, high] with low < high, both within 1e300 (got "
                                f"[{lo!r}, {hi!r}])", "sampling", cname)
            out.append((cname, lo, hi))
        return tuple(out)

    def periods(self, coords, parameters) -> tuple[tuple[str, Expression], ...]:
        """[periods]: coordinate = "period", an expression in numbers, pi and parameters."""
        value = self.data.get("periods", {})
        if not isinstance(value, dict):
            raise self.fail("must be a table: write [periods] and one line per periodic "
                            "coordinate, e.g. phi = \"2*pi\"", None, "periods")
        defaults = dict(parameters)
        out = []
        for cname, text in value.items():
            self.check_coordinate_key(cname, coords, "periods")
            e = self.expression("periods", cname, text)
            for used, pos in ex.names(e.tree):
                if used in coords:
                    raise self.fail(f"a period cannot depend on the coordinate {quoted(used)}; "
                                    "use numbers, pi and parameters", "periods", cname, pos)
                if used not in defaults and used not in ex.CONSTANTS:
                    near = ex.closest(used, set(defaults) | set(ex.CONSTANTS))
                    raise self.fail(f"unknown name {quoted(used)} (a period may use numbers, pi "
                                    "and parameters" + (f"; did you mean {near!r}?)" if near
                                                        else ")"), "periods", cname, pos)
            try:
                period = ex.constant_value(e.text, defaults)
            except ex.ExprError as exc:
                raise self.fail(f"cannot evaluate the period at the default parameters: "
                                f"{exc.message}", "periods", cname) from None
            if not period > 0:
                raise self.fail(f"a period must be positive; it is {period!r} at the default "
                                "parameters", "periods", cname)
            out.append((cname, e))
        return tuple(out)

    # -- helpers -------------------------------------------------------------------------
    def check_coordinate_key(self, name: str, coords, table: str) -> None:
        """A key of a per-coordinate table ([sampling], [periods]) must be a coordinate."""
        if name not in coords:
            near = ex.closest(name, coords) if len(name) <= MAX_NAME_LENGTH else None
            raise self.fail("not a coordinate" + (f" (did you mean {near!r}?)" if near else
                            f"; coordinates are {', '.join(coords)}"), table, name)

    def table(self, name: str) -> dict:
        value = self.data.get(name, {})
        if not isinstance(value, dict):
            raise self.fail(f"must be a table: write [{name}] and one key per line", None, name)
        for key, v in value.items():
            if isinstance(v, dict):
                raise self.fail("nested tables are not allowed here", name, key)
        return value

    def check_name(self, name: str, table: str | None, key: str) -> None:
        what = f"name {quoted(name)}"
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

    def check_not_state_name(self, name: str, coords, table: str) -> None:
        """d<coordinate> is a differential in line_element and a velocity in [invariants],
        p_<coordinate> a momentum: a parameter or helper of that name would be shadowed there."""
        for other in coords:
            if name in ("d" + other, "p_" + other):
                raise self.fail(f"{quoted(name)} reads as the differential or momentum of "
                                f"coordinate {quoted(other)}; rename it", table, name)

    def misplaced_keys(self) -> None:
        """A top-level key written after a table header lands inside that table (TOML has no
        way back to the top level): say so instead of reporting it as a parameter."""
        for table, value in self.data.items():
            if not isinstance(value, dict):
                continue
            for key, item in value.items():
                # only a value of the top-level key's own kind: a parameter may be named
                # "domain", a coordinate "signature" (a [metric] row, a table)
                kind = list if key in ("coordinates", "kernels") else str
                if key in TOP_LEVEL_KEYS and key not in self.data and isinstance(item, kind):
                    raise self.fail(f"{quoted(key)} is a top-level key, but it is written after "
                                    f"the [{table}] header, so TOML puts it inside [{table}]; "
                                    "move it above the first table", table, key)

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
            raise self.fail(f"unknown name {quoted(used)}{hint}", e.table, e.key, pos)

    def unknown_coordinate(self, name, coords, key) -> SpecError:
        near = ex.closest(name, coords)
        hint = (f" (did you mean {near!r}?)" if near
                else f"; coordinates are {', '.join(coords)}")
        return self.fail(f"{quoted(name)} is not a coordinate{hint}", "metric", key)


# -- locating keys in the source text, for compiler-style messages --------------------------
# The text has already parsed as TOML when a key is looked up, so a small single-pass scanner
# is enough: it follows table headers, dotted and quoted keys, inline tables, arrays and the
# four kinds of strings, and records where each key's value starts. Lines are counted on "\n"
# only, as TOML does (str.splitlines also breaks on U+2028, U+0085, \x1c, ... which TOML allows
# inside strings and comments). Linear time: no regular expression here can backtrack.
_BARE = re.compile(r"[A-Za-z0-9_-]+")
_ESCAPES = {"b": "\b", "t": "\t", "n": "\n", "f": "\f", "r": "\r", '"': '"', "\\": "\\"}


def _string_chars(text: str, i: int) -> tuple[list[tuple[int, str]], int]:
    """The string starting at text[i] (a quote): ([(source index, character), ...] of its
    value, index just past its closing quote). Handles the four TOML string kinds."""
    quote = text[i]
    triple = text.startswith(quote * 3, i)
    n = len(text)
    j = i + (3 if triple else 1)
    if triple:      # a newline right after the opening quotes is not part of the value
        if text.startswith("\r\n", j):
            j += 2
        elif text.startswith("\n", j):
            j += 1
    chars: list[tuple[int, str]] = []
    while j < n:
        ch = text[j]
        if ch == quote:
            if not triple:
                return chars, j + 1
            if text.startswith(quote * 3, j):
                run = j
                while run < n and text[run] == quote:
                    run += 1
                # up to two quotes before the closing three belong to the value
                for k in range(j, run - 3):
                    chars.append((k, quote))
                return chars, run
        if ch == "\\" and quote == '"':
            nxt = text[j + 1:j + 2]
            if nxt in _ESCAPES:
                chars.append((j, _ESCAPES[nxt]))
                j += 2
                continue
            if nxt in ("u", "U"):
                width = 4 if nxt == "u" else 8
                try:
                    chars.append((j, chr(int(text[j + 2:j + 2 + width], 16))))
                except ValueError:
                    pass
                j += 2 + width
                continue
            # a line-ending backslash (multi-line strings): skip the whitespace after it
            j += 1
            while j < n and text[j] in " \t\r\n":
                j += 1
            continue
        if ch == "\n" and not triple:
            return chars, j
        chars.append((j, ch))
        j += 1
    return chars, n


class _KeyIndex:
    """Where each key of a valid TOML text is: full key path (tuple of names) -> source
    index of its value's first character (of the name, for a table header)."""

    def __init__(self, text: str):
        self.text = text
        self.where: dict[tuple[str, ...], int] = {}
        self.strings: dict[int, list[tuple[int, str]]] = {}
        try:
            self._scan()
        except (IndexError, RecursionError):    # not valid TOML after all: keep what was found
            pass

    def _skip(self, i: int, newlines: bool) -> int:
        """Past spaces and tabs (and newlines and comments when ``newlines``)."""
        text, n = self.text, len(self.text)
        while i < n:
            ch = text[i]
            if ch in " \t" or (newlines and ch in "\r\n"):
                i += 1
            elif ch == "#" and newlines:
                end = text.find("\n", i)
                i = n if end < 0 else end + 1
            else:
                break
        return i

    def _key(self, i: int) -> tuple[list[str], int]:
        """A dotted key at text[i]: (its names, decoded; index past it)."""
        text, parts = self.text, []
        while True:
            i = self._skip(i, False)
            if text[i] in "\"'":
                chars, i = _string_chars(text, i)
                parts.append("".join(c for _, c in chars))
            else:
                m = _BARE.match(text, i)
                if m is None:
                    return parts, i
                parts.append(m.group())
                i = m.end()
            i = self._skip(i, False)
            if text[i:i + 1] != ".":
                return parts, i
            i += 1

    def _record(self, path: tuple[str, ...], i: int) -> None:
        self.where.setdefault(path, i)

    def _value(self, i: int, path: tuple[str, ...] | None) -> int:
        """Skip the value at text[i], recording keys of inline tables; index past it."""
        text, n = self.text, len(self.text)
        ch = text[i]
        if ch in "\"'":
            chars, end = _string_chars(text, i)
            self.strings[i] = chars
            return end
        if ch == "[":
            return self._items(i + 1, "]", True, lambda j: self._value(j, None))
        if ch == "{":
            return self._items(i + 1, "}", False, lambda j: self._entry(j, path))
        while i < n and text[i] not in ",]}#\r\n":     # number, boolean, date
            i += 1
        return i

    def _items(self, i: int, close: str, newlines: bool, item) -> int:
        """Scan ``item, item, ...`` up to the ``close`` character (an array or an inline
        table); item(index) -> index past the item. Index past the closing character."""
        text = self.text
        while True:
            i = self._skip(i, newlines)
            if text[i] == close:
                return i + 1
            if text[i] == ",":
                i += 1
                continue
            start = i
            i = item(i)
            if i <= start:      # not valid TOML: stop here
                return i + 1

    def _entry(self, i: int, path: tuple[str, ...] | None) -> int:
        """One ``key = value`` of an inline table below ``path``; index past it."""
        parts, j = self._key(i)
        j = self._skip(j, False)
        if not parts or self.text[j] != "=":
            return i
        j = self._skip(j + 1, False)
        inner = None if path is None else path + tuple(parts)
        if inner is not None:
            self._record(inner, j)
        return self._value(j, inner)

    def _scan(self) -> None:
        text, n = self.text, len(self.text)
        header: tuple[str, ...] = ()
        i = 0
        while True:
            i = self._skip(i, True)
            if i >= n:
                return
            if text[i] == "[":
                start = self._skip(i + (2 if text.startswith("[[", i) else 1), False)
                parts, i = self._key(start)
                header = tuple(parts)
                self._record(header, start)
            else:
                parts, j = self._key(i)
                j = self._skip(j, False)
                if not parts or text[j:j + 1] != "=":
                    return      # not a key/value line: stop rather than guess
                j = self._skip(j + 1, False)
                path = header + tuple(parts)
                self._record(path, j)
                i = self._value(j, path)
            end = text.find("\n", i)
            i = n if end < 0 else end + 1

    def position(self, path: tuple[str, ...], offset: int | None) -> int | None:
        """Source index of character ``offset`` of the value at ``path`` (its first character
        inside the quotes when offset is None); None if the path was not found."""
        start = self.where.get(path)
        if start is None:
            return None
        chars = self.strings.get(start)
        if chars is None:
            return min(start + (offset or 0), len(self.text))
        if not chars:
            return start + 1
        if offset is None or offset <= 0:
            return chars[0][0]
        if offset < len(chars):
            return chars[offset][0]
        return chars[-1][0] + 1

    def find(self, table: str | None, key: str | None, offset: int | None) -> int | None:
        """Source index for table/key: the exact key, then the key read as a dotted path
        (metric pairs ``r.theta``), then the first key below that path."""
        head = (table,) if table is not None else ()
        paths = [head + (key,)] if key is not None else [head]
        if key is not None and "." in key:
            paths.append(head + tuple(key.split(".")))
        for path in paths:
            at = self.position(path, offset)
            if at is not None:
                return at
        for path in paths:
            below = [i for p, i in self.where.items() if p[:len(path)] == path]
            if below:
                return min(below)
        return None


def _deep_nesting(text: str, limit: int = 50) -> int:
    """Index of the first bracket or brace ``limit`` levels deep (outside strings and
    comments), or 0."""
    depth, i, n = 0, 0, len(text)
    while i < n:
        ch = text[i]
        if ch in "\"'":
            i = _string_chars(text, i)[1]
            continue
        if ch == "#":
            end = text.find("\n", i)
            i = n if end < 0 else end
            continue
        if ch in "[{":
            depth += 1
            if depth >= limit:
                return i
        elif ch in "]}":
            depth -= 1
        i += 1
    return 0


def _line_col(text: str, index: int) -> tuple[int, int]:
    """1-based (line, column) of text[index], lines broken on "\n" only."""
    line_start = text.rfind("\n", 0, index) + 1
    return text.count("\n", 0, index) + 1, index - line_start + 1


def _context_line(text: str, line: int | None, column: int | None) -> str:
    """The source line (cut to a window around the column when long) and a caret line."""
    if line is None:
        return ""
    lines = text.split("\n")
    if not 1 <= line <= len(lines):
        return ""
    src = lines[line - 1].rstrip("\r")
    # a window of the line: a hostile spec may hold a 300,000-character line
    start = 0 if column is None else max(0, column - 1 - CONTEXT_WIDTH // 2)
    shown = src[start:start + CONTEXT_WIDTH]
    shown = ("..." if start else "") + shown + ("..." if start + CONTEXT_WIDTH < len(src) else "")
    shown = "".join(ch if ch.isprintable() or ch == "\t" else " " for ch in shown)
    if column is None:
        return shown
    return shown + "\n" + " " * (column - 1 - start + (3 if start else 0)) + "^"


CONTEXT_WIDTH = 100


def _located_error(text: str, path: str, reason: str, table: str | None, key: str | None,
                   offset: int | None) -> SpecError:
    line = col = None
    if table is not None or key is not None:
        at = _KeyIndex(text).find(table, key, offset)
        if at is not None:
            line, col = _line_col(text, at)
    return SpecError(reason, path=path, table=table, key=key, line=line, column=col,
                     context=_context_line(text, line, col))
