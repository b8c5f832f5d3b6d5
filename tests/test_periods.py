"""Periodic coordinates: the spec's [periods] table from parsing to k.periods.

Reference values: the periods are closed forms (2*pi/k for the test spec), evaluated here with
math; the pinned hash was computed by metricc at commit dd4f8a5, before [periods] existed.
"""
from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest

import metricc
from metricc import SpecError
from metricc.cli import main
from metricc.pipeline import generate
from metricc.spec import load_spec, parse_spec

from .conftest import needs_cc

ROOT = Path(__file__).resolve().parent.parent

BASE = '''name = "ring"
coordinates = ["theta", "phi"]
signature = "++"
line_element = "R^2*dtheta^2 + R^2*sin(theta)^2*dphi^2"

[parameters]
R = 1.0
k = 3.0

[define]
h = "2*pi"

[domain]
off_poles = "sin(theta)"
'''
# sha256 of BASE as metricc computed it before [periods] existed (commit dd4f8a5)
BASE_SHA256 = "3a2e2f9230445a559428f1b07406a9763fe500b4843e60951e14c49833577c80"
WITH_PERIODS = BASE + '\n[periods]\nphi = "2*pi/k"\n'


def spec_with(table: str) -> str:
    return BASE + "\n" + table + "\n"


def position(text: str, line_start: str, fragment: str) -> tuple[int, int]:
    """1-based (line, column) of ``fragment`` on the line starting with ``line_start``."""
    for n, line in enumerate(text.split("\n"), 1):
        if line.startswith(line_start):
            return n, line.index(fragment) + 1
    raise AssertionError(line_start)


# -- parsing ---------------------------------------------------------------------------------
def test_periods_are_parsed_in_file_order():
    spec = parse_spec(BASE.replace('coordinates = ["theta", "phi"]',
                                   'coordinates = ["theta", "phi", "psi"]')
                      .replace('dphi^2"', 'dphi^2 + dpsi^2"').replace('"++"', '"+++"')
                      + '\n[periods]\npsi = 4\nphi = "2*pi/k"\n')
    assert [(c, e.text, e.table, e.key) for c, e in spec.periods] == [
        ("psi", "4", "periods", "psi"), ("phi", "2*pi/k", "periods", "phi")]


def test_spec_without_periods_has_none():
    assert parse_spec(BASE).periods == ()


# -- errors: every one a SpecError at file:line:col naming [periods] and the key -------------
BAD = [
    # (table text, line start, fragment the column points at, words in the reason)
    ('[periods]\npsi = "2*pi"', "psi", '2*pi', "not a coordinate"),
    ('[periods]\nphy = "2*pi"', "phy", '2*pi', "did you mean 'phi'"),
    ('[periods]\nphi = "2*pi*theta"', "phi", 'theta', "coordinate 'theta'"),
    ('[periods]\nphi = "2*pi*h"', "phi", 'h"', "unknown name 'h'"),
    ('[periods]\nphi = "2*pi*kk"', "phi", 'kk', "did you mean 'k'"),
    ('[periods]\nphi = "-2*pi"', "phi", '-2', "must be positive"),
    ('[periods]\nphi = "k - 3"', "phi", 'k - 3', "must be positive"),
    ('[periods]\nphi = 0', "phi", '0', "must be positive"),
    ('[periods]\nphi = "1/(k - 3)"', "phi", '1/(k', "cannot evaluate"),
    ('[periods]\nphi = "exp(1000)"', "phi", 'exp', "cannot evaluate"),
    ('[periods]\nphi = "sqrt(-k)"', "phi", 'sqrt', "cannot evaluate"),
    ('[periods]\nphi = "2*"', "phi", '2*', "expected"),
    ('[periods]\nphi = true', "phi", 'true', "got bool"),
    ('[periods]\nphi = [1, 2]', "phi", '[1', "got list"),
]


@pytest.mark.parametrize("table,line_start,fragment,words", BAD)
def test_bad_periods_are_located(table, line_start, fragment, words):
    text = spec_with(table)
    with pytest.raises(SpecError) as info:
        parse_spec(text, "ring.toml")
    err = info.value
    assert words in err.reason, err.reason
    assert (err.table, err.key) == ("periods", line_start)
    line, col = position(text, line_start, fragment)
    assert err.line == line
    # the column points into the value (at the offending name where there is one)
    assert err.column is not None and col - 1 <= err.column <= col + len(fragment)
    assert str(err).startswith(f"ring.toml:{err.line}:{err.column}:")


def test_coordinate_in_period_points_at_the_coordinate():
    text = spec_with('[periods]\nphi = "2*pi*theta"')
    with pytest.raises(SpecError) as info:
        parse_spec(text)
    assert (info.value.line, info.value.column) == position(text, "phi", "theta")


def test_periods_must_be_a_table():
    text = BASE.replace('signature = "++"', 'signature = "++"\nperiods = 3')
    with pytest.raises(SpecError) as info:
        parse_spec(text, "ring.toml")
    assert info.value.key == "periods" and "must be a table" in info.value.reason
    assert info.value.line == position(text, "periods", "3")[0]


# -- the hash ---------------------------------------------------------------------------------
def test_hash_unchanged_without_periods():
    assert parse_spec(BASE).sha256 == BASE_SHA256
    assert "periods" not in json.loads(parse_spec(BASE).canonical)


def test_hash_follows_the_periods():
    a = parse_spec(WITH_PERIODS).sha256
    b = parse_spec(WITH_PERIODS.replace("2*pi/k", "pi")).sha256
    assert len({a, b, BASE_SHA256}) == 3
    # formatting alone does not change it
    assert parse_spec(WITH_PERIODS.replace('phi = "2*pi/k"', 'phi="2*pi/k"  # one turn')
                      ).sha256 == a


# -- shipped specs ----------------------------------------------------------------------------
@pytest.mark.parametrize("name,periodic", [
    ("kerr", "phi"), ("schwarzschild", "phi"), ("reissner_nordstrom", "phi"),
    ("minkowski", "phi"), ("sphere", "phi"), ("ellipsoid", "lon"), ("kerr_schild", None)])
def test_shipped_specs_declare_their_periodic_coordinates(name, periodic):
    spec = load_spec(ROOT / "specs" / f"{name}.toml")
    expected = [(periodic, "2*pi")] if periodic else []
    assert [(c, e.text) for c, e in spec.periods] == expected


# -- generated files, manifest, show, runtime --------------------------------------------------
@pytest.fixture(scope="module")
def generated():
    return generate(parse_spec(WITH_PERIODS), targets=("c", "numpy"))


def test_header_defines_the_periods(generated):
    header = generated.sources.files["ring.h"]
    line = next(l for l in header.splitlines() if "PERIOD_phi" in l)
    # 2*pi/3: closed form at the default k = 3
    assert line.startswith(f"#define RING_PERIOD_phi {2 * math.pi / 3!r}")
    assert "2*pi/k" in line
    assert "RING_PERIOD_theta" not in header


def test_numpy_module_and_kernel_table(generated):
    module = generated.sources.files["ring_numpy.py"]
    assert f"PERIODS = {{'phi': {2 * math.pi / 3!r}}}" in module
    assert generated.kernels.periodic == ("phi",)
    assert generated.kernels.kernel("periods").output_shape == (1,)


def test_no_periods_kernel_without_periods():
    ks = generate(parse_spec(BASE), targets=("numpy",)).kernels
    assert ks.periodic == () and "periods" not in {k.name for k in ks.kernels}


@pytest.mark.parametrize("backend", ["numpy", pytest.param("c", marks=needs_cc)])
def test_runtime_periods(tmp_path, backend):
    path = tmp_path / "ring.toml"
    path.write_text(WITH_PERIODS)
    k = metricc.load(path, backend=backend)
    assert k.periods == {"phi": 2 * math.pi / 3}
    assert k._manifest["periodic"] == ["phi"]
    assert k._manifest["periods"] == {"phi": 2 * math.pi / 3}
    assert k.period_values() == {"phi": pytest.approx(2 * math.pi / 3, rel=1e-15)}
    kk = np.array([[1.0, 2.0, 0.5]])
    values = k.period_values({"k": kk})
    assert values["phi"].shape == (1, 3)
    np.testing.assert_allclose(values["phi"], 2 * np.pi / kk, rtol=1e-15)


def test_runtime_without_periods(tmp_path):
    path = tmp_path / "ring.toml"
    path.write_text(BASE)
    k = metricc.load(path, backend="numpy")
    assert k.periods == {} and k.period_values() == {}


def test_show_prints_the_periods(tmp_path, capsys):
    path = tmp_path / "ring.toml"
    path.write_text(WITH_PERIODS)
    assert main(["show", str(path)]) == 0
    out = capsys.readouterr().out
    assert f"periodic: phi ~ phi + 2*pi/k (= {2 * math.pi / 3!r})" in out
    path.write_text(BASE)
    assert main(["show", str(path)]) == 0
    assert "periodic" not in capsys.readouterr().out
