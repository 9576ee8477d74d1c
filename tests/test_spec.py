"""The spec: every key is checked, defaults are documented, and TOML round-trips."""

from __future__ import annotations

import copy
import tomllib
from pathlib import Path
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from hierchoice import SpecError, load_spec
from hierchoice.spec import (
    ColumnRoles,
    DataOptions,
    DynamicsSpec,
    ModelOptions,
    SamplingOptions,
    Spec,
    dumps_toml,
)

COLUMNS = {"person": "pid", "task": "task", "alternative": "alt", "chosen": "ch"}


def minimal(**extra: Any) -> dict[str, Any]:
    return {"columns": dict(COLUMNS), "attributes": {"x": {}}} | extra


FULL: dict[str, Any] = {
    "columns": COLUMNS | {"available": "av"},
    "attributes": {
        "fare": {"taste": "lognormal", "sign": "negative"},
        "deck": {"coding": "effects", "base": "open", "taste": "normal"},
        "odd name.x": {"column": "c 1"},
    },
    "constants": {"reference": "none", "taste": "normal"},
    "covariates": {"columns": ["age"], "shifts": ["fare"]},
    "dynamics": {"lagged_choice": True, "lag": ["fare"], "lead": ["fare"], "first_task": "flag",
                 "initial_conditions": True, "initial_means": ["fare"], "taste": "normal"},
    "wide": {"alternatives": ["a", "b", "none"], "choice": "pick", "pattern": "{attribute}{alternative}",
             "choice_labels": {"1": "a", "2": "b", "3": "none"}, "available_pattern": "av_{alternative}"},
    "data": {"opt_out": "none", "task_scope": "global", "invalid_tasks": "drop", "alternatives": ["a", "b", "none"]},
    "model": {"correlated": True, "parameterization": "centred", "wtp_space": True, "price": "fare",
              "prior_scale": 2.5},
    "sampling": {"chains": 4, "draws": 10, "tune": 0, "target_accept": 0.9, "seed": 3, "backend": "nutpie",
                 "store_person_draws": False, "cores": 2},
}


# --------------------------------------------------------------------------- defaults


def test_defaults_of_a_minimal_spec() -> None:
    spec = Spec.from_dict(minimal())
    assert spec.columns == ColumnRoles("pid", "task", "alt", "ch", None)
    x = spec.attributes["x"]
    assert (x.taste, x.sign, x.coding, x.base, x.column, x.source) == ("fixed", None, "numeric", None, None, "x")
    assert spec.constants is None and spec.covariates is None and spec.wide is None
    assert spec.dynamics == DynamicsSpec()
    assert not spec.dynamics.active
    assert (spec.dynamics.first_task, spec.dynamics.taste) == ("drop", "fixed")
    assert spec.data == DataOptions(alternatives=None, opt_out=None, task_scope="person", invalid_tasks="error")
    assert spec.model == ModelOptions(correlated=False, parameterization="auto", wtp_space=False,
                                      price=None, prior_scale=1.0)
    assert spec.sampling == SamplingOptions(chains=2, draws=1000, tune=1000, target_accept=0.85,
                                            seed=20261202, backend="auto", store_person_draws=True, cores=None)


def test_auto_parameterization_is_made_concrete_per_method() -> None:
    spec = Spec.from_dict(minimal())
    assert spec.for_method("nuts").model.parameterization == "noncentred"
    assert spec.for_method("advi").model.parameterization == "centred"
    chosen = Spec.from_dict(minimal() | {"model": {"parameterization": "noncentred"}})
    assert chosen.for_method("advi") is chosen  # a user's explicit choice is kept


def test_full_spec_reads_every_key() -> None:
    spec = Spec.from_dict(FULL)
    assert spec.columns.available == "av"
    assert spec.attributes["odd name.x"].source == "c 1"
    assert spec.attributes["deck"].coding == "effects" and spec.attributes["deck"].base == "open"
    assert spec.constants is not None and spec.constants.taste == "normal"
    assert spec.covariates is not None and spec.covariates.shifts == ("fare",)
    assert spec.dynamics.active and spec.dynamics.lag == ("fare",) and spec.dynamics.lead == ("fare",)
    assert spec.wide is not None and spec.wide.choice_labels == {"1": "a", "2": "b", "3": "none"}
    assert spec.data.alternatives == ("a", "b", "none")
    assert spec.model.parameterization == "centred" and spec.model.prior_scale == 2.5
    assert spec.sampling.backend == "nutpie" and spec.sampling.cores == 2 and spec.sampling.tune == 0


def test_numeric_labels_are_read_as_text() -> None:
    spec = Spec.from_dict(minimal(data={"alternatives": [1, 2]},
                                  wide={"alternatives": [1, 2], "choice": "c", "choice_labels": {1: 2}}))
    assert spec.data.alternatives == ("1", "2")
    assert spec.wide is not None and spec.wide.alternatives == ("1", "2")
    assert spec.wide.choice_labels == {"1": "2"}


def test_constants_only_spec_is_allowed() -> None:
    spec = Spec.from_dict({"columns": COLUMNS, "constants": {"reference": "a"}})
    assert spec.attributes == {} and spec.constants is not None


def test_dynamics_only_spec_is_allowed() -> None:
    spec = Spec.from_dict({"columns": COLUMNS, "dynamics": {"lagged_choice": True}})
    assert spec.dynamics.active and spec.attributes == {}


# --------------------------------------------------------------------------- unknown keys


@pytest.mark.parametrize(
    ("table", "where", "typo", "suggestion"),
    [
        (None, "top level", "atributes", "attributes"),
        ("columns", "columns", "persn", "person"),
        ("attributes.x", "attributes.x", "tast", "taste"),
        ("dynamics", "dynamics", "first_tsk", "first_task"),
        ("data", "data", "task_scop", "task_scope"),
        ("model", "model", "corelated", "correlated"),
        ("sampling", "sampling", "draw", "draws"),
    ],
)
def test_unknown_key_names_the_table_and_suggests(table: str | None, where: str, typo: str,
                                                   suggestion: str) -> None:
    d = minimal()
    target = d
    for part in (table.split(".") if table else []):
        target = target.setdefault(part, {})
    target[typo] = 1
    with pytest.raises(SpecError) as err:
        Spec.from_dict(d)
    msg = str(err.value)
    assert repr(typo) in msg and f"[{where}]" in msg and f"Did you mean {suggestion!r}" in msg


@given(st.text(alphabet="abcdefghijklmnopqrstuvwxyz_", min_size=1, max_size=12),
       st.sampled_from(["columns", "dynamics", "data", "model", "sampling", "wide", "constants", "covariates",
                        None]))
@settings(max_examples=150)
def test_any_unknown_key_is_a_spec_error(key: str, table: str | None) -> None:
    d = minimal(wide={"alternatives": ["a", "b"], "choice": "c"}, constants={"reference": "a"},
                covariates={"columns": ["z"]})
    target = d if table is None else d.setdefault(table, {})
    known = set(target)
    allowed = {
        None: {"columns", "attributes", "constants", "covariates", "dynamics", "wide", "data", "model", "sampling"},
        "columns": {"person", "task", "alternative", "chosen", "available"},
        "dynamics": {"lagged_choice", "lag", "lead", "first_task", "initial_conditions", "initial_means", "taste"},
        "data": {"alternatives", "opt_out", "task_scope", "invalid_tasks"},
        "model": {"correlated", "parameterization", "wtp_space", "price", "prior_scale"},
        "sampling": {"chains", "draws", "tune", "target_accept", "seed", "backend", "store_person_draws", "cores"},
        "wide": {"alternatives", "choice", "pattern", "choice_labels", "available_pattern"},
        "constants": {"reference", "taste"},
        "covariates": {"columns", "shifts"},
    }[table]
    if key in allowed or key in known:
        return
    target[key] = "x"
    with pytest.raises(SpecError, match=f"Unknown key {key!r}"):
        Spec.from_dict(d)


# --------------------------------------------------------------------------- bad values


BAD_SPECS: list[tuple[str, dict[str, Any], str]] = [
    ("no columns", {"attributes": {"x": {}}}, "[columns]"),
    ("columns missing chosen", {"columns": {k: v for k, v in COLUMNS.items() if k != "chosen"},
                                "attributes": {"x": {}}}, "chosen"),
    ("column not text", {"columns": COLUMNS | {"person": 3}, "attributes": {"x": {}}}, "columns.person"),
    ("column two roles", {"columns": COLUMNS | {"task": "pid"}, "attributes": {"x": {}}}, "two roles"),
    ("columns not a table", {"columns": ["pid"], "attributes": {"x": {}}}, "[columns]"),
    ("no attributes", {"columns": COLUMNS}, "[attributes"),
    ("attributes not a table", {"columns": COLUMNS, "attributes": 5}, "[attributes]"),
    ("attribute not a table", {"columns": COLUMNS, "attributes": {"x": 3}}, "[attributes.x]"),
    ("bad taste", minimal(attributes={"x": {"taste": "gamma"}}), "attributes.x.taste"),
    ("lognormal without sign", minimal(attributes={"x": {"taste": "lognormal"}}), "sign"),
    ("sign without lognormal", minimal(attributes={"x": {"sign": "negative"}}), "only used with"),
    ("bad sign", minimal(attributes={"x": {"taste": "lognormal", "sign": "neg"}}), "attributes.x.sign"),
    ("bad coding", minimal(attributes={"x": {"coding": "onehot"}}), "attributes.x.coding"),
    ("dummy without base", minimal(attributes={"x": {"coding": "dummy"}}), "base"),
    ("base without coding", minimal(attributes={"x": {"base": "a"}}), "base is only used"),
    ("lognormal categorical", minimal(attributes={"x": {"coding": "dummy", "base": "a", "taste": "lognormal",
                                                        "sign": "positive"}}), "categorical"),
    ("attribute is a role column", minimal(attributes={"pid": {}}), "'pid'"),
    ("attribute is the availability column", {"columns": COLUMNS | {"available": "av"},
                                              "attributes": {"av": {}}}, "'av'"),
    ("constants without reference", minimal(constants={}), "reference"),
    ("constants lognormal", minimal(constants={"reference": "a", "taste": "lognormal"}), "constants.taste"),
    ("covariates without columns", minimal(covariates={}), "columns"),
    ("covariates role column", minimal(covariates={"columns": ["pid"]}), "role column"),
    ("covariate twice", minimal(covariates={"columns": ["z", "z"]}), "twice"),
    ("lag not a list", minimal(dynamics={"lag": 3}), "dynamics.lag"),
    ("lag unknown attribute", minimal(dynamics={"lag": ["y"]}), "'y'"),
    ("lead categorical", minimal(attributes={"x": {}, "d": {"coding": "dummy", "base": "a"}},
                                 dynamics={"lead": ["d"]}), "categorical"),
    ("lagged_choice not bool", minimal(dynamics={"lagged_choice": 1}), "dynamics.lagged_choice"),
    ("bad first_task", minimal(dynamics={"lagged_choice": True, "first_task": "keep"}), "dynamics.first_task"),
    ("initial_means without initial_conditions", minimal(dynamics={"lagged_choice": True, "initial_means": ["x"]}),
     "initial_conditions"),
    ("initial_conditions without lagged_choice", minimal(dynamics={"initial_conditions": True}), "lagged_choice"),
    ("dynamic term name clash", minimal(attributes={"x": {}, "x_lag": {}}, dynamics={"lag": ["x"]}), "'x_lag'"),
    ("lagged_choice name clash", minimal(attributes={"x": {}, "lagged_choice": {}},
                                         dynamics={"lagged_choice": True}), "'lagged_choice'"),
    ("wide without choice", minimal(wide={"alternatives": ["a"]}), "choice"),
    ("wide alternatives not a list", minimal(wide={"alternatives": 3, "choice": "c"}), "wide.alternatives"),
    ("wide alternatives a string", minimal(wide={"alternatives": "ab", "choice": "c"}), "wide.alternatives"),
    ("wide pattern lacks a field", minimal(wide={"alternatives": ["a"], "choice": "c", "pattern": "{attribute}"}),
     "wide.pattern"),
    ("wide pattern unknown field", minimal(wide={"alternatives": ["a"], "choice": "c",
                                                 "pattern": "{attribute}{alternative}{x}"}), "wide.pattern"),
    ("wide pattern stray brace", minimal(wide={"alternatives": ["a"], "choice": "c",
                                               "pattern": "{attribute}_{alternative}{"}), "wide.pattern"),
    ("wide labels not a table", minimal(wide={"alternatives": ["a"], "choice": "c", "choice_labels": 3}),
     "wide.choice_labels"),
    ("available_pattern without {alternative}", {"columns": COLUMNS | {"available": "av"}, "attributes": {"x": {}},
                                                 "wide": {"alternatives": ["a"], "choice": "c",
                                                          "available_pattern": "av"}}, "wide.available_pattern"),
    ("available_pattern without columns.available", minimal(wide={"alternatives": ["a"], "choice": "c",
                                                                  "available_pattern": "av_{alternative}"}),
     "columns"),
    ("data alternatives not a list", minimal(data={"alternatives": 3}), "data.alternatives"),
    ("bad task_scope", minimal(data={"task_scope": "panel"}), "data.task_scope"),
    ("bad invalid_tasks", minimal(data={"invalid_tasks": "skip"}), "data.invalid_tasks"),
    ("opt-out without constants", minimal(data={"opt_out": "none"}), "constants"),
    ("wtp_space without price", minimal(model={"wtp_space": True}), "price"),
    ("price unknown", minimal(model={"price": "fare"}), "'fare'"),
    ("price categorical", minimal(attributes={"d": {"coding": "dummy", "base": "a"}}, model={"price": "d"}),
     "numeric"),
    ("bad parameterization", minimal(model={"parameterization": "centered"}), "Did you mean 'centred'"),
    ("prior_scale zero", minimal(model={"prior_scale": 0}), "model.prior_scale"),
    ("prior_scale infinite", minimal(model={"prior_scale": float("inf")}), "model.prior_scale"),
    ("prior_scale bool", minimal(model={"prior_scale": True}), "model.prior_scale"),
    ("chains zero", minimal(sampling={"chains": 0}), "sampling.chains"),
    ("draws text", minimal(sampling={"draws": "1000"}), "sampling.draws"),
    ("tune negative", minimal(sampling={"tune": -1}), "sampling.tune"),
    ("target_accept too high", minimal(sampling={"target_accept": 1.0}), "sampling.target_accept"),
    ("target_accept too low", minimal(sampling={"target_accept": 0.2}), "sampling.target_accept"),
    ("bad backend", minimal(sampling={"backend": "stan"}), "sampling.backend"),
    ("cores zero", minimal(sampling={"cores": 0}), "sampling.cores"),
    ("seed bool", minimal(sampling={"seed": True}), "sampling.seed"),
]


@pytest.mark.parametrize(("case", "table", "needle"), BAD_SPECS, ids=[c for c, _, _ in BAD_SPECS])
def test_bad_spec_is_a_spec_error_that_says_where(case: str, table: dict[str, Any], needle: str) -> None:
    with pytest.raises(SpecError) as err:
        Spec.from_dict(copy.deepcopy(table))
    assert needle in str(err.value), f"{case}: {err.value}"


def test_spec_error_is_a_value_error() -> None:
    with pytest.raises(ValueError):
        Spec.from_dict({})


# --------------------------------------------------------------------------- TOML


def test_from_toml_reads_a_file(tmp_path: Path) -> None:
    path = tmp_path / "spec.toml"
    path.write_text(
        '[columns]\nperson = "pid"\ntask = "task"\nalternative = "alt"\nchosen = "ch"\n\n'
        '[attributes.fare]\ntaste = "lognormal"\nsign = "negative"\n\n[sampling]\ndraws = 50\n'
    )
    spec = Spec.from_toml(path)
    assert spec.attributes["fare"].sign == "negative" and spec.sampling.draws == 50
    assert load_spec(path) == spec and load_spec(str(path)) == spec


def test_from_toml_errors(tmp_path: Path) -> None:
    with pytest.raises(SpecError, match="does not exist"):
        Spec.from_toml(tmp_path / "nope.toml")
    bad = tmp_path / "bad.toml"
    bad.write_text("[columns\nperson = 1\n")
    with pytest.raises(SpecError, match="not valid TOML"):
        Spec.from_toml(bad)
    with pytest.raises(SpecError, match="cannot be read"):
        Spec.from_toml(tmp_path)  # a folder
    binary = tmp_path / "binary.toml"
    binary.write_bytes(b"\xff\xfe\x00")
    with pytest.raises(SpecError):
        Spec.from_toml(binary)


def test_load_spec_accepts_spec_dict_and_rejects_others() -> None:
    spec = Spec.from_dict(minimal())
    assert load_spec(spec) is spec
    assert load_spec(minimal()) == spec
    with pytest.raises(SpecError, match="not list"):
        load_spec([1, 2])  # type: ignore[arg-type]


def test_full_spec_round_trips_through_dict_and_toml() -> None:
    spec = Spec.from_dict(FULL)
    assert Spec.from_dict(spec.to_dict()) == spec
    text = spec.to_toml()
    assert Spec.from_dict(tomllib.loads(text)) == spec
    assert '[attributes."odd name.x"]' in text


_names = st.text(alphabet=st.characters(codec="utf-8", exclude_categories=("Cs",)), min_size=1, max_size=8)


@given(
    attributes=st.dictionaries(_names, st.sampled_from([{}, {"taste": "normal"},
                                                        {"taste": "lognormal", "sign": "positive"},
                                                        {"coding": "dummy", "base": "b 1"}]),
                               min_size=1, max_size=4),
    columns=st.lists(_names, min_size=4, max_size=4, unique=True),
    labels=st.dictionaries(_names, _names, max_size=3),
    draws=st.integers(1, 10**6),
    scale=st.floats(1e-3, 1e3),
)
@settings(max_examples=150)
def test_toml_round_trip_for_any_names(attributes: dict[str, Any], columns: list[str], labels: dict[str, str],
                                       draws: int, scale: float) -> None:
    roles = dict(zip(("person", "task", "alternative", "chosen"), columns))
    attributes = {n: t for n, t in attributes.items() if n not in columns}
    if not attributes:
        return
    table = {
        "columns": roles, "attributes": attributes,
        "wide": {"alternatives": ["1", "2"], "choice": "pick", "choice_labels": labels},
        "model": {"prior_scale": scale}, "sampling": {"draws": draws},
    }
    spec = Spec.from_dict(table)
    text = spec.to_toml()
    assert Spec.from_dict(tomllib.loads(text)) == spec


def test_dumps_toml_escapes_and_quotes() -> None:
    text = dumps_toml({"t": {"a\tb": 'q"\\\n\x01', "café": 1, "ok-key_1": [True, 1.5]}})
    back = tomllib.loads(text)
    assert back == {"t": {"a\tb": 'q"\\\n\x01', "café": 1, "ok-key_1": [True, 1.5]}}
    with pytest.raises(SpecError, match="Cannot write"):
        dumps_toml({"t": {"x": object()}})


# --------------------------------------------------------------------------- with_sampling


def test_with_sampling_overrides_and_checks() -> None:
    spec = Spec.from_dict(minimal())
    assert spec.with_sampling() is spec
    assert spec.with_sampling(draws=None) is spec
    fast = spec.with_sampling(draws=20, chains=1, seed=5)
    assert (fast.sampling.draws, fast.sampling.chains, fast.sampling.seed) == (20, 1, 5)
    assert fast.sampling.tune == spec.sampling.tune and fast.attributes == spec.attributes
    with pytest.raises(SpecError, match="sampling.chains"):
        spec.with_sampling(chains=0)
    with pytest.raises(SpecError, match="Unknown key 'drawz'"):
        spec.with_sampling(drawz=3)
