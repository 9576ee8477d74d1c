"""The model specification: which column plays which role, and what each taste is.

A spec is read from a TOML file (``tomllib``) or built from a plain ``dict`` of the
same shape. Every key is checked: an unknown key is an error that suggests the
nearest known one, so a typo never silently changes a model. The full key
reference lives in ``docs/spec.md``.

Example
-------
>>> spec = Spec.from_dict({
...     "columns": {"person": "respondent", "task": "task",
...                 "alternative": "option", "chosen": "chosen"},
...     "attributes": {"fare": {"taste": "lognormal", "sign": "negative"},
...                    "crossing_time": {"taste": "normal"}},
... })
>>> spec.attributes["fare"].taste
'lognormal'
"""

from __future__ import annotations

import copy
import tomllib
from collections.abc import Mapping
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path
from typing import Any

from ._args import check_keys as _check_keys
from ._args import choice as _choice
from ._args import flag as _bool
from ._args import label_list as _label_list
from ._args import pattern_check as _format_check
from ._args import text as _str
from ._args import text_list as _str_list
from ._args import whole_number as _positive_int
from ._display import html_table
from ._toml import dumps_toml
from .exceptions import SpecError

__all__ = [
    "TASTES",
    "ColumnRoles",
    "AttributeSpec",
    "ConstantsSpec",
    "CovariatesSpec",
    "DynamicsSpec",
    "WideSpec",
    "DataOptions",
    "ModelOptions",
    "SamplingOptions",
    "Spec",
    "load_spec",
]

#: Taste distributions an attribute may have across people.
TASTES = ("fixed", "normal", "lognormal")
SIGNS = ("positive", "negative")
CODINGS = ("numeric", "dummy", "effects")
FIRST_TASK_POLICIES = ("drop", "flag")
TASK_SCOPES = ("person", "global")
INVALID_TASK_POLICIES = ("error", "drop")
PARAMETERIZATIONS = ("auto", "noncentred", "centred")
BACKENDS = ("auto", "pymc", "nutpie", "numpyro")
METHODS = ("auto", "nuts", "blocked", "advi")


@dataclass(frozen=True)
class ColumnRoles:
    """Which column of the long table plays which role.

    Parameters
    ----------
    person, task, alternative, chosen : str
        Column names of the person id, the choice-task id, the alternative id and
        the 0/1 (or boolean) chosen indicator.
    available : str, optional
        Column of a 0/1 availability indicator. Rows absent from a task are
        unavailable in any case.
    """

    person: str
    task: str
    alternative: str
    chosen: str
    available: str | None = None

    @classmethod
    def from_dict(cls, table: Mapping[str, Any]) -> ColumnRoles:
        _check_keys(table, {"person", "task", "alternative", "chosen", "available"}, "columns")
        missing = [k for k in ("person", "task", "alternative", "chosen") if k not in table]
        if missing:
            raise SpecError(
                f"[columns] must name the {', '.join(missing)} column(s), e.g. person = \"respondent\"."
            )
        values = {k: _str(v, f"columns.{k}") for k, v in table.items()}
        used = [v for v in values.values()]
        if len(set(used)) != len(used):
            raise SpecError(f"[columns] gives one column two roles: {values!r}.")
        return cls(**values)


@dataclass(frozen=True)
class AttributeSpec:
    """How one attribute enters utility and how its taste varies across people.

    Parameters
    ----------
    name : str
        The attribute's name (the column name unless ``column`` is given).
    taste : {"fixed", "normal", "lognormal"}
        ``fixed``: one coefficient shared by everyone; ``normal``: person
        coefficients drawn from a normal distribution; ``lognormal``: ``sign *
        exp(eta)`` with ``eta`` normal, for tastes whose sign is known.
    sign : {"positive", "negative"}, optional
        Required for lognormal tastes.
    coding : {"numeric", "dummy", "effects"}, default "numeric"
        How a categorical attribute is turned into columns. ``dummy``: one 0/1
        column per non-base level; ``effects``: 1 for the level, -1 for the base.
    base : str, optional
        The base level of a categorical attribute (required for dummy/effects).
    column : str, optional
        The table column holding the attribute, if it differs from ``name``.
    """

    name: str
    taste: str = "fixed"
    sign: str | None = None
    coding: str = "numeric"
    base: str | None = None
    column: str | None = None

    @property
    def source(self) -> str:
        return self.column or self.name

    @classmethod
    def from_dict(cls, name: str, table: Mapping[str, Any]) -> AttributeSpec:
        where = f"attributes.{name}"
        _check_keys(table, {"taste", "sign", "coding", "base", "column"}, where)
        taste = _choice(table.get("taste", "fixed"), TASTES, f"{where}.taste")
        sign = table.get("sign")
        if sign is not None:
            sign = _choice(sign, SIGNS, f"{where}.sign")
        if taste == "lognormal" and sign is None:
            raise SpecError(
                f"{where}: a lognormal taste needs sign = \"positive\" or \"negative\" "
                "(the coefficient is sign * exp(eta))."
            )
        if taste != "lognormal" and sign is not None:
            raise SpecError(f"{where}: sign is only used with taste = \"lognormal\", not {taste!r}.")
        coding = _choice(table.get("coding", "numeric"), CODINGS, f"{where}.coding")
        base = table.get("base")
        if coding != "numeric":
            if base is None:
                raise SpecError(f"{where}: coding = {coding!r} needs base = \"<level>\" (the reference level).")
            base = str(base)
        elif base is not None:
            raise SpecError(f"{where}: base is only used with coding = \"dummy\" or \"effects\".")
        if coding != "numeric" and taste == "lognormal":
            raise SpecError(f"{where}: a categorical attribute cannot have a lognormal taste.")
        column = table.get("column")
        if column is not None:
            column = _str(column, f"{where}.column")
        return cls(name=name, taste=taste, sign=sign, coding=coding, base=base, column=column)

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {"taste": self.taste}
        for key in ("sign", "base", "column"):
            if getattr(self, key) is not None:
                out[key] = getattr(self, key)
        if self.coding != "numeric":
            out["coding"] = self.coding
        return out


@dataclass(frozen=True)
class ConstantsSpec:
    """Alternative-specific constants: one per alternative but the reference."""

    reference: str
    taste: str = "fixed"

    @classmethod
    def from_dict(cls, table: Mapping[str, Any]) -> ConstantsSpec:
        _check_keys(table, {"reference", "taste"}, "constants")
        if "reference" not in table:
            raise SpecError(
                "[constants] needs reference = \"<alternative>\": the alternative whose constant is 0."
            )
        taste = _choice(table.get("taste", "fixed"), ("fixed", "normal"), "constants.taste")
        return cls(reference=str(table["reference"]), taste=taste)


@dataclass(frozen=True)
class CovariatesSpec:
    """Person-level covariates that shift the population means of tastes."""

    columns: tuple[str, ...]
    shifts: tuple[str, ...] | None = None  # None: every attribute

    @classmethod
    def from_dict(cls, table: Mapping[str, Any]) -> CovariatesSpec:
        _check_keys(table, {"columns", "shifts"}, "covariates")
        if "columns" not in table:
            raise SpecError("[covariates] needs columns = [\"<column>\", ...].")
        shifts = table.get("shifts")
        return cls(
            columns=_str_list(table["columns"], "covariates.columns"),
            shifts=None if shifts is None else _str_list(shifts, "covariates.shifts"),
        )


@dataclass(frozen=True)
class DynamicsSpec:
    """Panel transforms for simple dynamics ("naive dynamics").

    ``lagged_choice`` adds the attribute ``lagged_choice`` (1 if the person chose
    this alternative in their previous task); ``lag`` and ``lead`` add
    ``<attribute>_lag`` / ``<attribute>_lead`` (the value for the same
    alternative in the previous / next task). Rows where the lag or lead does not
    exist (the first task, a task next to one removed as invalid, or an
    alternative absent from the neighbouring task) follow ``first_task``:
    ``"drop"`` removes those tasks from estimation (counted in the validation
    summary), ``"flag"`` keeps them with the missing value set to 0 and marks them
    in the panel's ``lag_missing`` mask. ``initial_conditions`` adds the person's
    first observed choice (and the person means of the attributes in
    ``initial_means``) as person covariates (Wooldridge 2005, J. Applied
    Econometrics 20(1)); the first task is then only the initial condition, out
    of the likelihood under either policy.
    """

    lagged_choice: bool = False
    lag: tuple[str, ...] = ()
    lead: tuple[str, ...] = ()
    first_task: str = "drop"
    initial_conditions: bool = False
    initial_means: tuple[str, ...] = ()
    taste: str = "fixed"

    @property
    def active(self) -> bool:
        return self.lagged_choice or bool(self.lag) or bool(self.lead)

    @classmethod
    def from_dict(cls, table: Mapping[str, Any]) -> DynamicsSpec:
        _check_keys(
            table,
            {"lagged_choice", "lag", "lead", "first_task", "initial_conditions", "initial_means", "taste"},
            "dynamics",
        )
        out = cls(
            lagged_choice=_bool(table.get("lagged_choice", False), "dynamics.lagged_choice"),
            lag=_str_list(table.get("lag", []), "dynamics.lag"),
            lead=_str_list(table.get("lead", []), "dynamics.lead"),
            first_task=_choice(table.get("first_task", "drop"), FIRST_TASK_POLICIES, "dynamics.first_task"),
            initial_conditions=_bool(table.get("initial_conditions", False), "dynamics.initial_conditions"),
            initial_means=_str_list(table.get("initial_means", []), "dynamics.initial_means"),
            taste=_choice(table.get("taste", "fixed"), ("fixed", "normal"), "dynamics.taste"),
        )
        if out.initial_means and not out.initial_conditions:
            raise SpecError("dynamics.initial_means needs initial_conditions = true.")
        if out.initial_conditions and not out.lagged_choice:
            raise SpecError(
                "dynamics.initial_conditions is the treatment of the initial-conditions problem of "
                "state dependence; it needs lagged_choice = true."
            )
        return out


@dataclass(frozen=True)
class WideSpec:
    """How to read a wide table (one row per task, one column per attribute per alternative).

    ``pattern`` builds the column name from ``{attribute}`` and ``{alternative}``;
    ``choice`` is the column holding the chosen alternative, whose values are
    mapped to alternatives by ``choice_labels`` (identity if omitted).
    """

    alternatives: tuple[str, ...]
    choice: str
    pattern: str = "{attribute}_{alternative}"
    choice_labels: Mapping[str, str] | None = None
    available_pattern: str | None = None

    @classmethod
    def from_dict(cls, table: Mapping[str, Any]) -> WideSpec:
        _check_keys(
            table, {"alternatives", "choice", "pattern", "choice_labels", "available_pattern"}, "wide"
        )
        for key in ("alternatives", "choice"):
            if key not in table:
                raise SpecError(f"[wide] needs {key}.")
        pattern = _str(table.get("pattern", "{attribute}_{alternative}"), "wide.pattern")
        if "{attribute}" not in pattern or "{alternative}" not in pattern:
            raise SpecError(f"wide.pattern {pattern!r} must contain {{attribute}} and {{alternative}}.")
        _format_check(pattern, "wide.pattern", attribute="a", alternative="b")
        labels = table.get("choice_labels")
        if labels is not None:
            _check_keys(labels, set(labels) if isinstance(labels, Mapping) else set(), "wide.choice_labels")
            labels = {str(k): str(v) for k, v in labels.items()}
        avail = table.get("available_pattern")
        if avail is not None:
            avail = _str(avail, "wide.available_pattern")
            if "{alternative}" not in avail:
                raise SpecError(f"wide.available_pattern {avail!r} must contain {{alternative}}.")
            _format_check(avail, "wide.available_pattern", alternative="b")
        return cls(
            alternatives=_label_list(table["alternatives"], "wide.alternatives"),
            choice=_str(table["choice"], "wide.choice"),
            pattern=pattern,
            choice_labels=labels,
            available_pattern=avail,
        )


@dataclass(frozen=True)
class DataOptions:
    """How the table is read: alternative order, opt-out, task-id scope, invalid tasks."""

    alternatives: tuple[str, ...] | None = None
    opt_out: str | None = None
    task_scope: str = "person"
    invalid_tasks: str = "error"

    @classmethod
    def from_dict(cls, table: Mapping[str, Any]) -> DataOptions:
        _check_keys(table, {"alternatives", "opt_out", "task_scope", "invalid_tasks"}, "data")
        alts = table.get("alternatives")
        opt_out = table.get("opt_out")
        return cls(
            alternatives=None if alts is None else _label_list(alts, "data.alternatives"),
            opt_out=None if opt_out is None else str(opt_out),
            task_scope=_choice(table.get("task_scope", "person"), TASK_SCOPES, "data.task_scope"),
            invalid_tasks=_choice(table.get("invalid_tasks", "error"), INVALID_TASK_POLICIES, "data.invalid_tasks"),
        )


@dataclass(frozen=True)
class ModelOptions:
    """Model-level options: correlation, parameterisation, willingness-to-pay space."""

    correlated: bool = False
    parameterization: str = "auto"
    wtp_space: bool = False
    price: str | None = None
    prior_scale: float = 1.0

    @classmethod
    def from_dict(cls, table: Mapping[str, Any]) -> ModelOptions:
        _check_keys(table, {"correlated", "parameterization", "wtp_space", "price", "prior_scale"}, "model")
        price = table.get("price")
        scale = table.get("prior_scale", 1.0)
        if isinstance(scale, bool) or not isinstance(scale, (int, float)) or not 0 < scale < float("inf"):
            raise SpecError(f"model.prior_scale must be a finite positive number, got {scale!r}.")
        out = cls(
            correlated=_bool(table.get("correlated", False), "model.correlated"),
            parameterization=_choice(
                table.get("parameterization", "auto"), PARAMETERIZATIONS, "model.parameterization"
            ),
            wtp_space=_bool(table.get("wtp_space", False), "model.wtp_space"),
            price=None if price is None else _str(price, "model.price"),
            prior_scale=float(scale),
        )
        if out.wtp_space and out.price is None:
            raise SpecError("model.wtp_space = true needs price = \"<attribute>\" (the price attribute).")
        return out


@dataclass(frozen=True)
class SamplingOptions:
    """Sampler settings; command-line options override them."""

    chains: int = 2
    draws: int = 1000
    tune: int = 1000
    target_accept: float = 0.85
    seed: int = 20261202
    backend: str = "auto"
    store_person_draws: bool = True
    cores: int | None = None
    mass_matrix: str = "diagonal"
    method: str = "auto"

    @classmethod
    def from_dict(cls, table: Mapping[str, Any]) -> SamplingOptions:
        _check_keys(
            table,
            {"chains", "draws", "tune", "target_accept", "seed", "backend", "store_person_draws", "cores",
             "mass_matrix", "method"},
            "sampling",
        )
        ta = table.get("target_accept", 0.85)
        if isinstance(ta, bool) or not isinstance(ta, (int, float)) or not 0.5 <= ta < 1:
            raise SpecError(f"sampling.target_accept must be in [0.5, 1), got {ta!r}.")
        cores = table.get("cores")
        return cls(
            chains=_positive_int(table.get("chains", 2), "sampling.chains"),
            draws=_positive_int(table.get("draws", 1000), "sampling.draws"),
            tune=_positive_int(table.get("tune", 1000), "sampling.tune", minimum=0),
            target_accept=float(ta),
            seed=_positive_int(table.get("seed", 20261202), "sampling.seed", minimum=0),
            backend=_choice(table.get("backend", "auto"), BACKENDS, "sampling.backend"),
            store_person_draws=_bool(table.get("store_person_draws", True), "sampling.store_person_draws"),
            cores=None if cores is None else _positive_int(cores, "sampling.cores"),
            mass_matrix=_choice(table.get("mass_matrix", "diagonal"), ("diagonal", "low_rank"),
                                "sampling.mass_matrix"),
            method=_choice(table.get("method", "auto"), METHODS, "sampling.method"),
        )


_TOP_KEYS = {
    "columns", "attributes", "constants", "covariates", "dynamics", "wide", "data", "model", "sampling",
}


@dataclass(frozen=True)
class Spec:
    """A whole model specification. Build it with :meth:`from_toml` or :meth:`from_dict`."""

    columns: ColumnRoles
    attributes: Mapping[str, AttributeSpec]
    constants: ConstantsSpec | None = None
    covariates: CovariatesSpec | None = None
    dynamics: DynamicsSpec = field(default_factory=DynamicsSpec)
    wide: WideSpec | None = None
    data: DataOptions = field(default_factory=DataOptions)
    model: ModelOptions = field(default_factory=ModelOptions)
    sampling: SamplingOptions = field(default_factory=SamplingOptions)

    def __post_init__(self) -> None:
        """Check the spec when it is made, however it is made: ``Spec(**table)`` with the TOML file's tables (dicts)
        reads each table as :meth:`from_dict` does, so a bad value is a :class:`SpecError` here, not later."""
        for name, kind in _SECTIONS.items():
            value = getattr(self, name)
            if isinstance(value, kind) or (value is None and name in _OPTIONAL_SECTIONS):
                continue
            if not isinstance(value, Mapping):
                raise SpecError(f"Spec({name}=...) must be a {kind.__name__} or a table like the spec file's "
                                f"[{name}] (a dict); got {type(value).__name__}: {value!r}.")
            object.__setattr__(self, name, kind.from_dict(value))
        attrs = self.attributes
        _check_keys(attrs, set(attrs) if isinstance(attrs, Mapping) else set(), "attributes")
        if not all(isinstance(a, AttributeSpec) for a in attrs.values()):
            object.__setattr__(self, "attributes", {str(n): a if isinstance(a, AttributeSpec) else
                                                    AttributeSpec.from_dict(str(n), a) for n, a in attrs.items()})
        if not self.attributes and not self.dynamics.active and self.constants is None:
            raise SpecError(
                "The spec has no [attributes.<name>] tables: at least one attribute (or constants) is needed."
            )
        self._check_consistency()

    @classmethod
    def from_dict(cls, table: Mapping[str, Any]) -> Spec:
        """Build and check a spec from a nested mapping shaped like the TOML file."""
        _check_keys(table, _TOP_KEYS, "top level")
        if "columns" not in table:
            raise SpecError("The spec needs a [columns] table naming person, task, alternative and chosen.")
        attrs_table = table.get("attributes", {})
        _check_keys(attrs_table, set(attrs_table) if isinstance(attrs_table, Mapping) else set(), "attributes")
        attributes = {str(n): AttributeSpec.from_dict(str(n), t) for n, t in attrs_table.items()}
        dynamics = DynamicsSpec.from_dict(table.get("dynamics", {}))
        if not attributes and not dynamics.active and "constants" not in table:
            raise SpecError(
                "The spec has no [attributes.<name>] tables: at least one attribute (or constants) is needed."
            )
        spec = cls(
            columns=ColumnRoles.from_dict(table["columns"]),
            attributes=attributes,
            constants=ConstantsSpec.from_dict(table["constants"]) if "constants" in table else None,
            covariates=CovariatesSpec.from_dict(table["covariates"]) if "covariates" in table else None,
            dynamics=dynamics,
            wide=WideSpec.from_dict(table["wide"]) if "wide" in table else None,
            data=DataOptions.from_dict(table.get("data", {})),
            model=ModelOptions.from_dict(table.get("model", {})),
            sampling=SamplingOptions.from_dict(table.get("sampling", {})),
        )  # checked for consistency by __post_init__
        return spec

    @classmethod
    def from_toml(cls, path: str | Path) -> Spec:
        """Read a spec from a TOML file."""
        path = Path(path)
        try:
            with path.open("rb") as fh:
                table = tomllib.load(fh)
        except FileNotFoundError:
            raise SpecError(f"Spec file {str(path)!r} does not exist.") from None
        except tomllib.TOMLDecodeError as err:
            raise SpecError(f"Spec file {str(path)!r} is not valid TOML: {err}.") from None
        except (OSError, UnicodeDecodeError) as err:
            raise SpecError(f"Spec file {str(path)!r} cannot be read: {err}.") from None
        return cls.from_dict(table)

    def _check_consistency(self) -> None:
        roles = {self.columns.person, self.columns.task, self.columns.alternative, self.columns.chosen}
        for attr in self.attributes.values():
            if attr.source in roles | {self.columns.available}:
                raise SpecError(f"attributes.{attr.name} uses column {attr.source!r}, which is an id/role column.")
        names = set(self.attribute_names_declared)
        made = [f"{n}_lag" for n in self.dynamics.lag] + [f"{n}_lead" for n in self.dynamics.lead]
        made += ["lagged_choice"] if self.dynamics.lagged_choice else []
        for name in made:
            if name in names:
                raise SpecError(
                    f"[attributes] declares {name!r}, the name of a term that [dynamics] creates; rename the "
                    "attribute (the taste of dynamic terms is set by dynamics.taste)."
                )
        if self.wide is not None and self.wide.available_pattern is not None and self.columns.available is None:
            raise SpecError(
                "wide.available_pattern is set but [columns] has no available = \"<column>\" to read it into."
            )
        for kind, items in (("lag", self.dynamics.lag), ("lead", self.dynamics.lead),
                            ("initial_means", self.dynamics.initial_means)):
            for item in items:
                if item not in names:
                    raise SpecError(f"dynamics.{kind} names {item!r}, which is not in [attributes].")
                if self.attributes[item].coding != "numeric":
                    raise SpecError(f"dynamics.{kind} names {item!r}, a categorical attribute: only numeric ones.")
        if self.model.price is not None:
            if self.model.price not in names:
                raise SpecError(f"model.price = {self.model.price!r} is not in [attributes].")
            if self.attributes[self.model.price].coding != "numeric":
                raise SpecError(f"model.price = {self.model.price!r} must be a numeric attribute.")
        if self.covariates is not None:
            clash = set(self.covariates.columns) & roles
            if clash:
                raise SpecError(f"covariates.columns includes the role column(s) {sorted(clash)}.")
        if self.data.opt_out is not None and self.constants is None:
            # common practice: an opt-out without a constant forces its utility to 0 while
            # every other alternative's is x·beta, which confounds the scale of x with "buy".
            raise SpecError(
                "data.opt_out is set but there is no [constants] table: an opt-out alternative needs "
                "alternative-specific constants (usually reference = the opt-out)."
            )

    @property
    def attribute_names_declared(self) -> tuple[str, ...]:
        return tuple(self.attributes)

    def with_sampling(self, **overrides: Any) -> Spec:
        """A copy with some sampling options replaced (``None`` values are ignored)."""
        values = {k: v for k, v in overrides.items() if v is not None}
        if not values:
            return self
        merged = asdict(self.sampling) | values
        return replace(self, sampling=SamplingOptions.from_dict(merged))

    def for_method(self, method: str) -> Spec:
        """A copy with ``model.parameterization = "auto"`` made concrete for the fitting ``method``.

        NUTS gets ``"noncentred"``. ADVI gets ``"centred"``: mean-field ADVI on the
        non-centred model shrank the taste SDs and, with them, the taste means (B1:
        means 0.8-2.2 NUTS posterior SDs off), while on the centred model the means
        landed within 1.7 SDs in all nine runs measured (docs/performance.md).
        """
        if self.model.parameterization != "auto":
            return self
        chosen = "centred" if method == "advi" else "noncentred"
        return replace(self, model=replace(self.model, parameterization=chosen))

    def to_dict(self) -> dict[str, Any]:
        """The spec as a nested dict that :meth:`from_dict` reads back to an equal spec."""
        out: dict[str, Any] = {
            "columns": {k: v for k, v in asdict(self.columns).items() if v is not None},
            "attributes": {n: a.to_dict() for n, a in self.attributes.items()},
        }
        for name in ("constants", "covariates", "wide"):
            value = getattr(self, name)
            if value is not None:
                out[name] = _drop_none(asdict(value))
        for name in ("dynamics", "data", "model", "sampling"):
            out[name] = _drop_none(asdict(getattr(self, name)))
        return out

    def to_toml(self) -> str:
        """The spec as TOML text."""
        return dumps_toml(self.to_dict())

    # ---- displays: a few lines, not every field (``to_toml()`` shows them all)

    def _display_rows(self) -> list[tuple[str, str]]:
        rows = []
        for name, a in self.attributes.items():
            what = [a.taste + (f" ({a.sign})" if a.sign else "")]
            what += [f"{a.coding}, base {a.base}"] if a.coding != "numeric" else []
            what += [f"column {a.column}"] if a.column else []
            rows.append((name, ", ".join(what)))
        if self.constants is not None:
            rows.append(("constants", f"{self.constants.taste}, reference {self.constants.reference}"))
        if self.covariates is not None:
            rows.append(("covariates", ", ".join(self.covariates.columns)))
        if self.dynamics.active:
            parts = ["lagged choice"] if self.dynamics.lagged_choice else []
            parts += [f"lag of {', '.join(self.dynamics.lag)}"] if self.dynamics.lag else []
            parts += [f"lead of {', '.join(self.dynamics.lead)}"] if self.dynamics.lead else []
            rows.append(("dynamics", "; ".join(parts)))
        m, s = self.model, self.sampling
        model = ["correlated tastes" if m.correlated else "independent tastes"]
        model += [f"WTP space (price {m.price})"] if m.wtp_space else []
        rows.append(("model", ", ".join(model)))
        rows.append(("sampling", f"{s.chains} chains x {s.draws} draws ({s.tune} tune), backend {s.backend}, "
                                 f"seed {s.seed}"))
        return rows

    def _display_title(self) -> str:
        c = self.columns
        return (f"Spec: {len(self.attributes)} attributes; columns person={c.person}, task={c.task}, "
                f"alternative={c.alternative}, chosen={c.chosen}")

    def __repr__(self) -> str:
        width = max([len(k) for k, _ in self._display_rows()] + [10])
        return "\n".join([self._display_title()] + [f"  {k:<{width}}  {v}" for k, v in self._display_rows()])

    def _repr_html_(self) -> str:
        return html_table(self._display_title(), self._display_rows(), notes=["spec.to_toml() shows every key."])


#: The typed parts of a :class:`Spec` and the spec-file table each is read from.
_SECTIONS: dict[str, type] = {
    "columns": ColumnRoles, "constants": ConstantsSpec, "covariates": CovariatesSpec, "dynamics": DynamicsSpec,
    "wide": WideSpec, "data": DataOptions, "model": ModelOptions, "sampling": SamplingOptions,
}
_OPTIONAL_SECTIONS = ("constants", "covariates", "wide")


def _drop_none(table: dict[str, Any]) -> dict[str, Any]:
    return {k: (list(v) if isinstance(v, tuple) else copy.deepcopy(v)) for k, v in table.items() if v is not None}


def load_spec(spec: Spec | Mapping[str, Any] | str | Path) -> Spec:
    """Accept a :class:`Spec`, a mapping, or a path to a TOML file."""
    if isinstance(spec, Spec):
        return spec
    if isinstance(spec, Mapping):
        return Spec.from_dict(spec)
    if isinstance(spec, (str, Path)):
        return Spec.from_toml(spec)
    raise SpecError(f"A spec must be a Spec, a dict or a path to a TOML file, not {type(spec).__name__}.")
