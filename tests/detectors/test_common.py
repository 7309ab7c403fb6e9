"""Checks every registered detector must pass: one contract for all."""

from __future__ import annotations

import pkgutil

import numpy as np
import pytest

import detectors
from detectors import FAMILIES, REGISTRY, Interval, SettingError, State, parse_instrument
from detectors.responses import ResponseMatrix

#: Modules of the package that are infrastructure, not detectors.
INFRASTRUCTURE = {
    "calibration", "planting",
    "errors", "instrument", "responses", "screening", "lint", "scales", "verdict", "reliability",
}


def test_every_detector_module_is_registered():
    modules = {
        m.name for m in pkgutil.iter_modules(detectors.__path__)
        if not m.name.startswith("_") and m.name not in INFRASTRUCTURE
    }
    registered = {cls.__module__.rsplit(".", 1)[1] for cls in REGISTRY.values()}
    assert modules == registered
    # Each class is registered under its own name, in its own module (looked up lazily).
    assert all(REGISTRY[name].name == name for name in REGISTRY)


def test_the_package_exports_what_its_type_checking_imports_name():
    import ast
    from pathlib import Path

    tree = ast.parse(Path(detectors.__file__).read_text(encoding="utf-8"))
    typed = {
        alias.name
        for node in ast.walk(tree)
        if isinstance(node, ast.ImportFrom) and node.level == 1
        for alias in node.names
    }
    assert typed == set(detectors.__all__) == set(detectors._ORIGINS)
    assert all(getattr(detectors, name) is not None for name in detectors.__all__)


def common_instrument():
    items = []
    for s, scale in enumerate(["alpha", "beta", "gamma"]):
        for i in range(6):
            items.append({"id": f"{scale[0]}{i + 1}", "text": f"{scale} {i}", "scale": scale,
                          "keyed": 1 if i % 2 == 0 else -1, "block": f"page{s}"})
    items.insert(7, {"id": "chk", "text": "pick 2", "instructed_answer": 2, "block": "page1"})
    return parse_instrument({"survey": "common", "response_format": {"points": 5}, "items": items})


def common_matrix(instrument, n=400, seed=11):
    rng = np.random.default_rng(seed)
    k = len(instrument.items)
    trait = rng.normal(size=(n, 1))
    values = np.clip(np.rint(3 + instrument.keyed * trait + rng.normal(0, 0.8, (n, k))), 1, 5)
    values[:10] = 4  # straight lines
    values[10:20] = rng.integers(1, 6, size=(10, k))
    values[rng.random((n, k)) < 0.05] = np.nan
    values[20] = np.nan  # a respondent who answered nothing
    return ResponseMatrix.from_arrays(
        instrument, values, [f"r{i}" for i in range(n)], durations=rng.uniform(60, 600, n)
    )


@pytest.fixture(scope="module")
def data():
    inst = common_instrument()
    return inst, common_matrix(inst)


DETECTORS = sorted(REGISTRY)


@pytest.mark.parametrize("name", DETECTORS)
def test_declares_its_contract(name):
    cls = REGISTRY[name]
    assert cls.name == name
    assert cls.family in FAMILIES
    assert cls.summary and cls.reference and cls.__doc__
    for section in ("Parameters", "References"):
        assert section in cls.__doc__, f"{name} docstring lacks {section}"
    assert set(cls.parameter_constraints) == set(cls.setting_names())
    cls.check_settings(cls.defaults())
    detector = cls()
    assert detector.get_params() == cls.defaults()


@pytest.mark.parametrize("name", DETECTORS)
def test_result_shape_states_and_flags_follow_scores(name, data):
    inst, m = data
    before = m.answers.copy()
    result = REGISTRY[name]().screen(inst, m)
    assert np.array_equal(m.answers, before), "input was modified"
    n = m.n_respondents
    for array in (result.scores, result.cutoffs, result.flags, result.states, result.reasons):
        assert len(array) == n
    for key, values in result.evidence.items():
        assert len(values) == n, key
    assessed = result.states == State.ASSESSED
    assert set(np.unique(result.states)) <= {0, 1, 2}
    assert np.all(np.isnan(result.scores[~assessed]))
    assert not np.any(np.isnan(result.scores[assessed]))
    assert np.array_equal(result.flags, assessed & (result.scores >= result.cutoffs))
    assert all(r is None for r in result.reasons[assessed])
    assert all(isinstance(r, str) and r for r in result.reasons[~assessed])
    for i in range(0, n, 37):
        assert isinstance(result.sentence_for(i), str) and result.sentence_for(i)
    # the respondent with no answers is never assessed
    assert result.states[20] != State.ASSESSED


@pytest.mark.parametrize("name", DETECTORS)
def test_deterministic_and_permutation_equivariant(name, data):
    inst, m = data
    first = REGISTRY[name]().screen(inst, m)
    again = REGISTRY[name]().screen(inst, m)
    assert np.array_equal(first.scores, again.scores, equal_nan=True)
    order = np.random.default_rng(5).permutation(m.n_respondents)
    permuted = REGISTRY[name]().screen(inst, m.take(order))
    np.testing.assert_allclose(permuted.scores, first.scores[order], rtol=1e-9, atol=1e-9)
    assert np.array_equal(permuted.states, first.states[order])
    assert np.array_equal(permuted.flags, first.flags[order])


@pytest.mark.parametrize("name", DETECTORS)
def test_an_unknown_setting_is_refused(name):
    with pytest.raises(SettingError, match=f"{name} has no setting 'no_such_setting'"):
        REGISTRY[name].from_settings({"no_such_setting": 1})


@pytest.mark.parametrize("name", DETECTORS)
def test_a_number_setting_beyond_64_bits_is_refused(name):
    # A whole number past a signed 64-bit integer (which JSON readers such as orjson hand over
    # up to 2**64 - 1) overflowed numpy's arithmetic when screening, or float() when checked.
    numbers = [
        key for key, constraint in REGISTRY[name].parameter_constraints.items()
        if isinstance(constraint, Interval)
    ]
    for key in numbers:
        for value in (2**63, 2**64 - 1, -(2**63) - 1, 10**400):
            with pytest.raises(SettingError, match=f"'{key}' setting of {name} must be"):
                REGISTRY[name].check_settings({key: value})


@pytest.mark.parametrize("name", DETECTORS)
def test_a_single_respondent_is_handled(name, data):
    inst, m = data
    result = REGISTRY[name]().screen(inst, m.take(np.array([30])))
    assert len(result.scores) == 1


#: Modules whose docstrings carry runnable examples (every detector, plus these).
EXAMPLE_MODULES = sorted(
    {cls.__module__ for cls in REGISTRY.values()}
    | {"detectors.scales", "detectors.reliability", "detectors.responses"}
)


@pytest.mark.parametrize("module_name", EXAMPLE_MODULES)
def test_docstring_examples_run(module_name):
    import doctest
    import importlib

    results = doctest.testmod(importlib.import_module(module_name))
    assert results.attempted > 0 and results.failed == 0
