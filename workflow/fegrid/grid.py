"""The specification grid: load and check the YAML config, expand it, cut it into jobs.

The grid is data. :func:`load_config` turns the YAML file into a :class:`Grid` (checked against the
JSON Schema in ``workflow/schemas/`` and then for meaning: unknown choice names, duplicate names).
:meth:`Grid.expand` gives one :class:`Spec` per specification, with a stable id: the first 12 hex
characters of the SHA-256 of its canonical content (what is estimated, never what it is called or
where it stands in the file), so reordering or renaming choices changes no id.
"""

from __future__ import annotations

import difflib
import itertools
import json
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Any

import jsonschema
import numpy as np
import pandas as pd
import yaml

from . import __version__, keys
from .absorb import Term, parse_absorb, term_label
from .defaults import DEFAULTS, fill_defaults, schema
from .errors import ConfigError, EstimationError
from .estimate import RESULT_COLUMNS, BlockSettings, Inference, SpecRequest
from .estimators import Estimator, parse_estimator
from .ledger import DIMENSIONS
from .renames import modernise
from .samples import Panel, SampleDef, parse_sample
from .wild import WildBootstrap

__all__ = [
    "Grid",
    "Spec",
    "Job",
    "load_config",
    "read_yaml",
    "plan_jobs",
    "spec_table",
]



class _UniqueKeyLoader(yaml.SafeLoader):
    """A safe YAML loader that refuses a key given twice in one mapping."""


def _construct_mapping(loader: _UniqueKeyLoader, node: yaml.MappingNode, deep: bool = False) -> dict:
    seen: dict[object, int] = {}
    for key_node, _ in node.value:
        key = loader.construct_object(key_node, deep=deep)
        if key in seen:
            raise ConfigError(
                f"The name '{key}' is given twice in the same block of the config (lines "
                f"{seen[key] + 1} and {key_node.start_mark.line + 1}); every choice needs its own name."
            )
        seen[key] = key_node.start_mark.line
    return loader.construct_mapping(node, deep=deep)


_UniqueKeyLoader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _construct_mapping)


def read_yaml(path: str | Path) -> dict[str, Any]:
    """Read a YAML config; broken YAML becomes a :class:`ConfigError` naming the line."""
    path = Path(path)
    if not path.is_file():
        raise ConfigError(f"The config file '{path}' does not exist.")
    try:
        raw = yaml.load(path.read_text(), Loader=_UniqueKeyLoader)  # noqa: S506 - a SafeLoader subclass
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f" at line {mark.line + 1}, column {mark.column + 1}" if mark else ""
        problem = getattr(exc, "problem", None) or str(exc)
        raise ConfigError(f"The config file '{path}' is not valid YAML{where}: {problem}.") from None
    if raw is None:
        raise ConfigError(f"The config file '{path}' is empty; start from config/config.yaml, whose every key "
                          "is commented.")
    if not isinstance(raw, dict):
        kind = {list: "a list", str: "a single string"}.get(type(raw), f"a {type(raw).__name__}")
        raise ConfigError(f"The config file '{path}' must hold a mapping of keys (key: value lines), not {kind}.")
    return raw


def _schema_error(raw: Mapping[str, Any]) -> None:
    validator = jsonschema.Draft202012Validator(schema())
    errors = sorted(validator.iter_errors(raw), key=lambda e: (len(e.absolute_path), str(e.absolute_path)))
    if not errors:
        return
    err = jsonschema.exceptions.best_match(errors)
    where = ".".join(str(p) for p in err.absolute_path) or "(top level)"
    if err.validator == "additionalProperties":
        known = sorted(err.schema.get("properties", {}))
        extra = sorted(set(err.instance) - set(known))
        hints = [f"'{e}' -> '{m[0]}'" for e in extra if (m := difflib.get_close_matches(str(e), known, n=1))]
        hint = f" Did you mean {', '.join(hints)}?" if hints else ""
        raise ConfigError(
            f"Unknown key(s) {', '.join(repr(e) for e in extra)} under '{where}' in the config;{hint} the "
            f"keys allowed there are: {', '.join(known)}."
        )
    raise ConfigError(f"The config key '{where}' is invalid: {err.message}.")


def _json(value: Any) -> str:
    """``value`` as a specification's canonical JSON writes it (sorted keys, default separators)."""
    return json.dumps(value, sort_keys=True)


@dataclass(frozen=True)
class Spec:
    """One specification of the grid."""

    spec_id: str
    names: tuple[tuple[str, str], ...]
    outcome: str
    focal: str
    absorb: tuple[Term, ...]
    inference: Inference
    sample: SampleDef
    controls: tuple[str, ...]
    weights: str | None
    canonical: str
    estimator: Estimator = Estimator()

    @property
    def curve(self) -> str:
        """The specification curve this estimate belongs to (see :class:`fegrid.estimators.Estimator`)."""
        return self.estimator.curve_name

    def name(self, dimension: str) -> str:
        return dict(self.names)[dimension]

    @cached_property
    def block_key(self) -> str:
        """Specifications with equal block keys share a sample, absorbed effects and weights."""
        absorb = [t.canonical() for t in self.absorb]  # already in canonical order
        return json.dumps([self.sample.canonical(), absorb, self.weights], sort_keys=True)

    @cached_property
    def sample_key(self) -> str:
        """Specifications with equal sample keys share a sample and weights (and so a fit job)."""
        return json.dumps([self.sample.canonical(), self.weights], sort_keys=True)

    def request(self) -> SpecRequest:
        return SpecRequest(self.spec_id, self.outcome, self.focal, self.controls, self.inference, self.estimator)


@dataclass(frozen=True)
class Job:
    """A Snakemake job: specifications of one sample and weights, sharing data loading."""

    key: str
    specs: tuple[Spec, ...]


#: The values of ``joint_inference.method``: every draw refitted (the default), or linearized
#: (:func:`fegrid.joint.linearized_draws`).
REFIT, LINEARIZED = "refit", "linearized"


@dataclass(frozen=True)
class Grid:
    """A checked grid declaration."""

    run_name: str
    data_path: str
    panel: Panel
    outcomes: tuple[str, ...]
    focals: tuple[str, ...]
    absorb: dict[str, tuple[Term, ...]]
    clustering: dict[str, Inference]
    samples: dict[str, Mapping[str, Any]]
    controls: dict[str, tuple[str, ...]]
    weights: dict[str, str | None]
    estimators: dict[str, Estimator]
    exclude: tuple[dict[str, Any], ...]
    baseline: dict[str, str]
    level: float
    tolerance: float
    max_iterations: int
    keep_singletons: bool
    specs_per_job: int
    draws: int = DEFAULTS["joint_inference.draws"]
    seed: int = DEFAULTS["joint_inference.seed"]
    resample: str = ""
    draws_per_job: int = DEFAULTS["joint_inference.draws_per_job"]
    joint_method: str = DEFAULTS["joint_inference.method"]
    warnings: dict[str, Any] = field(default_factory=dict)
    csv: dict[str, str] = field(default_factory=dict)
    raw: dict[str, Any] = field(repr=False, compare=False, default_factory=dict)

    # ---- columns ----------------------------------------------------------------------------
    def roles(self) -> dict[str, list[str]]:
        """Every column the grid uses, by role (for checking the data)."""
        absorb_cols: list[str] = []
        for terms in self.absorb.values():
            for t in terms:
                absorb_cols.extend(t.needed_columns(self.panel.time))
        sample_cols: list[str] = []
        for raw in self.samples.values():
            sample_cols.extend(parse_sample("", raw).columns())
            if raw.get("drop_each"):
                sample_cols.append(raw["drop_each"])
        return {
            "unit": [self.panel.unit],
            "time": [self.panel.time] if self.panel.time else [],
            "outcome": list(self.outcomes),
            "focal regressor": list(self.focals),
            "control": sorted({c for cs in self.controls.values() for c in cs}),
            "absorbed effect": sorted(set(absorb_cols)),
            "cluster": sorted({c for inf in self.clustering.values() for c in inf.columns()}),
            "sample filter": sorted(set(sample_cols)),
            "weights": sorted({w for w in self.weights.values() if w}),
            "instrument": sorted({c for e in self.estimators.values() for c in e.instruments}),
            "endogenous regressor": sorted({c for e in self.estimators.values() for c in e.endogenous}),
            "resampling": [self.resample] if self.draws and self.resample != self.panel.unit else [],
            "adoption period": [self.panel.adoption] if self.panel.adoption else [],
        }

    def reading(self) -> dict[str, Any]:
        """How the data file is read into the snapshot: CSV options and the time column's frequency."""
        return {"csv": dict(self.csv), "time_frequency": self.panel.frequency}

    def columns(self) -> list[str]:
        return sorted({c for cols in self.roles().values() for c in cols})

    def level_columns(self) -> list[str]:
        """Columns whose levels the expansion needs (``drop_each`` generators)."""
        return sorted({raw["drop_each"] for raw in self.samples.values() if raw.get("drop_each")})

    # ---- expansion --------------------------------------------------------------------------
    def sample_defs(self, levels: Mapping[str, Sequence[Any]]) -> dict[str, tuple[str, SampleDef]]:
        """Expanded samples: expanded name -> (declared name, definition)."""
        out: dict[str, tuple[str, SampleDef]] = {}
        for name, raw in self.samples.items():
            col = raw.get("drop_each")
            if not col:
                out[name] = (name, parse_sample(name, raw))
                continue
            for level in levels[col]:
                level = level.item() if hasattr(level, "item") else level
                sub = f"{name}:{level}"
                body = dict(raw)
                body.pop("drop_each")
                drops = {k: list(v) for k, v in body.get("drop", {}).items()}
                drops.setdefault(col, [])
                if level not in drops[col]:
                    drops[col].append(level)
                body["drop"] = drops
                if sub in out:
                    raise ConfigError(f"The sample name '{sub}' is produced twice; rename one.")
                out[sub] = (name, parse_sample(sub, body))
        return out

    def expand(self, levels: Mapping[str, Sequence[Any]] | None = None) -> list[Spec]:
        """All specifications of the grid, less the excluded ones, sorted by id."""
        levels = levels or {}
        samples = self.sample_defs(levels)
        panel = {"unit": self.panel.unit, "time": self.panel.time}
        specs: dict[str, Spec] = {}
        dims = [list(d) for d in (self.outcomes, self.focals, self.absorb, self.clustering, samples, self.controls,
                                  self.weights, self.estimators)]
        # each choice's canonical form once (a grid's specifications repeat every choice many times)
        absorb_canonical = {a: sorted((t.canonical() for t in terms), key=json.dumps)
                            for a, terms in self.absorb.items()}
        absorb_terms = {a: tuple(sorted(terms, key=lambda t: json.dumps(t.canonical())))
                        for a, terms in self.absorb.items()}
        # ... and its JSON: a specification's canonical JSON is its pieces' JSON, joined as json.dumps(body,
        # sort_keys=True) joins them (the same text; 10,000 specifications are planned in half the time)
        dumped = {
            "absorb": {a: _json(c) for a, c in absorb_canonical.items()},
            "inference": {c: _json(inf.canonical()) for c, inf in self.clustering.items()},
            "sample": {name: _json(samples[name][1].canonical()) for name in dims[4]},
            "controls": {c: _json(sorted(cols)) for c, cols in self.controls.items()},
            "weights": {w: _json(col) for w, col in self.weights.items()},
            "outcome": {o: _json(o) for o in dims[0]},
            "focal": {f: _json(f) for f in dims[1]},
            "panel": _json(panel),
            "estimator": {e: None if est.canonical() is None else _json(
                {**est.canonical(), **({"adoption": self.panel.adoption or ""} if est.staggered_method else {})})
                for e, est in self.estimators.items()},
        }
        for combo in _kept_combinations(dims, [samples[s][0] for s in dims[4]], self.exclude):
            outcome, focal, absorb, clus, sample, controls, weights, est_name = combo
            names = dict(zip(DIMENSIONS, combo))
            # a regression of a variable on itself, or controlling for the focal regressor or the
            # outcome, makes no sense: such combinations are left out of the grid (see self_controlled)
            if focal == outcome or {focal, outcome} & set(self.controls[controls]):
                continue
            estimator = self.estimators[est_name]
            # nor does instrumenting a regressor by itself or by the outcome (see self_instrumented)
            if {focal, outcome} & set(estimator.columns()):
                continue
            # the staggered-adoption methods estimate the effect of data.treatment only
            if estimator.staggered_method and focal != self.panel.treatment:
                continue
            ctrl = tuple(sorted(self.controls[controls]))
            inference = self.clustering[clus]
            # least squares adds no "estimator": ids predate the dimension (the keys in sorted order)
            est_json = dumped["estimator"][est_name]
            canonical = "".join((
                '{"absorb": ', dumped["absorb"][absorb], ', "controls": ', dumped["controls"][controls],
                *((', "estimator": ', est_json) if est_json is not None else ()),
                ', "focal": ', dumped["focal"][focal], ', "inference": ', dumped["inference"][clus],
                ', "outcome": ', dumped["outcome"][outcome], ', "panel": ', dumped["panel"],
                ', "sample": ', dumped["sample"][sample], ', "weights": ', dumped["weights"][weights], "}"))
            spec_id = keys.spec_id(canonical)
            if spec_id in specs:
                other = specs[spec_id]
                raise ConfigError(
                    "Two specifications of the grid are the same regression under different names: "
                    f"{_describe(other.names)} and {_describe(tuple(names.items()))}. Remove one of "
                    "the duplicate choices or exclude the pair."
                )
            specs[spec_id] = Spec(
                spec_id=spec_id,
                names=tuple(names.items()),
                outcome=outcome,
                focal=focal,
                absorb=absorb_terms[absorb],
                inference=inference,
                sample=samples[sample][1],
                controls=ctrl,
                weights=self.weights[weights],
                canonical=canonical,
                estimator=estimator,
            )
        if not specs:
            left_out = self.self_controlled() + self.self_instrumented()
            why = ("; and these combinations are left out because a control set holds the focal regressor "
                   "or the outcome: " + "; ".join(left_out)) if left_out else ""
            raise ConfigError(f"The exclusion rules remove every specification of the grid{why}.")
        return [specs[k] for k in sorted(specs)]

    def self_instrumented(self) -> list[str]:
        """Outcome x focal x estimator combinations left out of the grid because the estimator
        instruments (or declares endogenous) the focal regressor or the outcome."""
        out = []
        for outcome, focal, name in itertools.product(self.outcomes, self.focals, self.estimators):
            held = sorted({focal, outcome} & set(self.estimators[name].columns()))
            if held:
                out.append(f"estimator '{name}' names {' and '.join(repr(h) for h in held)} as instrument or "
                           f"endogenous regressor (outcome {outcome}, focal {focal})")
        return out

    def self_controlled(self) -> list[str]:
        """Outcome x focal x control-set combinations left out of the grid because the control set
        holds the focal regressor or the outcome (or the focal regressor is the outcome)."""
        out = []
        for outcome, focal, name in itertools.product(self.outcomes, self.focals, self.controls):
            held = sorted({focal, outcome} & set(self.controls[name]))
            if focal == outcome:
                out.append(f"focal regressor '{focal}' is also an outcome")
            elif held:
                out.append(f"control set '{name}' holds {' and '.join(repr(h) for h in held)} "
                           f"(outcome {outcome}, focal {focal})")
        return list(dict.fromkeys(out))

    def baseline_id(self, specs: Sequence[Spec]) -> str:
        """The id of the baseline specification (the first one when no baseline is declared)."""
        if not self.baseline:
            return specs[0].spec_id
        wanted = dict(self.baseline)
        matches = [s for s in specs if all(s.name(d) == v for d, v in wanted.items())]
        if len(matches) != 1:
            free = [d for d in DIMENSIONS if d not in wanted and len({s.name(d) for s in matches}) > 1]
            reason = (
                "no specification of the grid (after exclusions) matches it"
                if not matches
                else f"{len(matches)} specifications match it; name a choice for: {', '.join(free)}"
            )
            raise ConfigError(f"The baseline {json.dumps(wanted)} is ambiguous or missing: {reason}.")
        return matches[0].spec_id

    def block_settings(self, spec: Spec) -> BlockSettings:
        return BlockSettings(
            absorb=spec.absorb,
            weights=spec.weights,
            unit=self.panel.unit,
            time=self.panel.time,
            treatment=self.panel.treatment,
            adoption=self.panel.adoption,
            keep_singletons=self.keep_singletons,
            tolerance=self.tolerance,
            max_iterations=self.max_iterations,
            level=self.level,
            warn_min_clusters=int(self.warnings["min_clusters"]),
            warn_max_cluster_share=float(self.warnings["max_cluster_share"]),
            warn_min_treated_clusters=int(self.warnings["min_treated_clusters"]),
            warn_min_first_stage_f=float(self.warnings["min_first_stage_f"]),
        )

    def draw_chunks(self) -> list[range]:
        """The draws of each draw job: ``draws_per_job`` at a time, or every draw in one job when they
        are linearized (one fit of the grid serves them all)."""
        size = self.draws if self.joint_method == LINEARIZED else self.draws_per_job
        return [range(first, min(first + size, self.draws)) for first in range(0, max(self.draws, 0), max(size, 1))]

    def settings_key(self) -> str:
        """What, besides a job's specifications and the data, changes its results."""
        return json.dumps(
            {
                "fegrid": __version__,
                "result_columns": list(RESULT_COLUMNS),  # a new result field invalidates stored results
                "level": self.level,
                "tolerance": self.tolerance,
                "max_iterations": self.max_iterations,
                "keep_singletons": self.keep_singletons,
                "warnings": self.warnings,
                "staggered": [self.panel.treatment, self.panel.adoption],  # diagnostics of the treatment's fits
            },
            sort_keys=True,
        )


def _describe(names: Sequence[tuple[str, str]]) -> str:
    return "(" + ", ".join(f"{d}={n}" for d, n in names) + ")"


def _selects(sel: Any, value: str, parent: str) -> bool:
    """Whether one dimension's selector of an exclude rule picks a choice (``parent``: the declared name
    of an expanded sample, else the choice itself)."""
    if isinstance(sel, str):
        return sel in (value, parent)
    if isinstance(sel, list):
        return value in sel or parent in sel
    return value not in sel["not"] and parent not in sel["not"]


def _kept_combinations(dims: Sequence[Sequence[str]], sample_parents: Sequence[str],
                       exclude: Sequence[Mapping[str, Any]]) -> Iterator[tuple[str, ...]]:
    """The combinations of the dimensions' choices (in ``itertools.product`` order) that no exclude rule
    matches: each rule's matches marked on the whole table of combinations at once, from its selectors'
    verdicts on each dimension's choices (a grid's table can hold hundreds of thousands of combinations,
    nearly all excluded)."""
    shape = tuple(len(d) for d in dims)
    excluded = np.zeros(shape, dtype=bool)
    sample_axis = DIMENSIONS.index("sample")
    for rule in exclude:
        hit = np.ones((1,) * len(shape), dtype=bool)
        for dim, sel in rule.items():
            axis = DIMENSIONS.index(dim)
            parents = sample_parents if axis == sample_axis else dims[axis]
            picked = np.array([_selects(sel, v, p) for v, p in zip(dims[axis], parents)], dtype=bool)
            hit = hit & picked.reshape(tuple(-1 if a == axis else 1 for a in range(len(shape))))
        excluded |= hit
    for index in zip(*np.nonzero(~excluded)):
        yield tuple(d[i] for d, i in zip(dims, index))


def _choices(raw: Mapping[str, Any], key: str, default: Any = None) -> Any:
    value = raw.get(key)
    if value is None:
        return default
    if isinstance(value, Mapping) and not value:
        raise ConfigError(f"The config key '{key}' declares no choices; give at least one or remove it.")
    return value


def load_config(source: str | Path | Mapping[str, Any]) -> Grid:
    """Check a config (a path or an already-read mapping) and return its :class:`Grid`."""
    raw = modernise(read_yaml(source) if isinstance(source, (str, Path)) else dict(source))
    _schema_error(raw)
    # every default comes from the schema, filled in once here (as Snakemake's validate does)
    raw = fill_defaults(raw)
    data = raw["data"]
    panel = Panel(unit=data["unit"], time=data.get("time"), frequency=data.get("time_frequency"),
                  treatment=data.get("treatment"), adoption=data.get("adoption"))
    if panel.frequency is not None and panel.time is None:
        raise ConfigError("data.time_frequency is set but data.time names no time column.")
    if (panel.treatment or panel.adoption) and panel.time is None:
        raise ConfigError("data.treatment (a staggered adoption) needs data.time: adoption is dated in periods.")
    if panel.adoption and not panel.treatment:
        raise ConfigError("data.adoption is set without data.treatment: name the 0/1 treatment column too "
                          "(the focal regressor of the staggered-adoption estimators).")
    absorb_raw = _choices(raw, "absorb", {panel.unit: [panel.unit]})  # a default that depends on data.unit
    absorb = {name: parse_absorb(terms, where=f"absorb.{name}") for name, terms in absorb_raw.items()}
    clustering: dict[str, Inference] = {}
    for name, body in _choices(raw, "clustering").items():
        by = body.get("by", [])
        by = [by] if isinstance(by, str) else list(by)
        dims = tuple(tuple(term_label(t).split(" x ")) for t in parse_absorb(by, where=f"clustering.{name}.by"))
        try:
            boot = body.get("wild_bootstrap")
            clustering[name] = Inference(body["kind"], dims, WildBootstrap(**boot) if boot is not None else None)
        except EstimationError as exc:
            raise ConfigError(f"clustering.{name}: {exc}") from None
    samples = dict(_choices(raw, "samples"))
    for name, body in samples.items():
        if body.get("drop_each") and ":" in name:
            raise ConfigError(f"samples.{name}: a sample with drop_each cannot have ':' in its name.")
    cs_raw = raw["control_sets"]
    controls: dict[str, tuple[str, ...]] = {n: tuple(c) for n, c in (cs_raw.get("named") or {}).items()}
    combos = cs_raw.get("combinations_of") or []
    if len(set(combos)) != len(combos):
        raise ConfigError("control_sets.combinations_of lists a column twice.")
    # the empty set comes from combinations_of (its first combination) or from the user's own name,
    # never by default beside named sets
    for r in range(len(combos) + 1 if combos else 0):
        for subset in itertools.combinations(combos, r):
            name = "+".join(subset) if subset else "none"
            if name in controls and tuple(sorted(controls[name])) != tuple(sorted(subset)):
                raise ConfigError(
                    f"control_sets: the generated control set '{name}' has the same name as a named "
                    "set with other columns; rename the named set."
                )
            controls[name] = tuple(subset)
    if not controls:
        raise ConfigError("control_sets declares no control set; use named: {none: []} for none.")
    weights = dict(_choices(raw, "weights"))
    estimators = {name: parse_estimator(name, body) for name, body in _choices(raw, "estimators").items()}
    for name, est in estimators.items():
        if est.staggered_method and not panel.treatment:
            raise ConfigError(f"estimators.{name}: method {est.method} estimates the effect of a staggered "
                              "adoption; declare the 0/1 treatment column in data.treatment.")
        if est.staggered_method and panel.treatment not in raw["focal_regressors"]:
            raise ConfigError(f"estimators.{name}: method {est.method} applies to the treatment "
                              f"'{panel.treatment}' (data.treatment), which is not among focal_regressors.")
    grid_names = {
        "outcome": list(raw["outcomes"]),
        "focal": list(raw["focal_regressors"]),
        "absorb": list(absorb),
        "clustering": list(clustering),
        "sample": list(samples),
        "controls": list(controls),
        "weights": list(weights),
        "estimator": list(estimators),
    }
    for dim in ("outcome", "focal"):
        if len(set(grid_names[dim])) != len(grid_names[dim]):
            raise ConfigError(f"The list of {dim}s names a column twice.")
    exclude = tuple(raw.get("exclude") or ())
    for i, rule in enumerate(exclude):
        for dim, sel in rule.items():
            named = [sel] if isinstance(sel, str) else (sel if isinstance(sel, list) else sel["not"])
            unknown = [n for n in named if n not in grid_names[dim]]
            if unknown:
                raise ConfigError(
                    f"exclude[{i}] names {dim} choice(s) {unknown} that the grid does not declare; "
                    f"the {dim} choices are: {', '.join(map(str, grid_names[dim]))}."
                )
    baseline = dict(raw.get("baseline") or {})
    for dim, name in baseline.items():
        if name not in grid_names[dim] and not (dim == "sample" and ":" in name and name.split(":")[0] in samples):
            raise ConfigError(
                f"baseline.{dim} is '{name}', which the grid does not declare; the {dim} choices "
                f"are: {', '.join(map(str, grid_names[dim]))}."
            )
    est, joint, warnings = raw["estimation"], raw["joint_inference"], raw["inference_warnings"]
    return Grid(
        run_name=raw["run_name"],
        data_path=data["path"],
        panel=panel,
        outcomes=tuple(raw["outcomes"]),
        focals=tuple(raw["focal_regressors"]),
        absorb=absorb,
        clustering=clustering,
        samples=samples,
        controls=controls,
        weights=weights,
        estimators=estimators,
        exclude=exclude,
        baseline=baseline,
        level=float(raw["confidence_level"]),
        tolerance=float(est["tolerance"]),
        max_iterations=int(est["max_iterations"]),
        keep_singletons=est["singletons"] == "keep",
        specs_per_job=int(raw["jobs"]["specs_per_job"]),
        draws=int(joint["draws"]),
        seed=int(joint["seed"]),
        resample=str(joint.get("resample", panel.unit)),  # the unit: a default that depends on data.unit
        draws_per_job=int(joint["draws_per_job"]),
        joint_method=str(joint["method"]),
        warnings=dict(warnings),
        csv=dict(data["csv"]),
        raw=raw,
    )


def plan_jobs(specs: Sequence[Spec], *, specs_per_job: int, salt: str) -> list[Job]:
    """Cut the grid into jobs.

    Blocks (same sample, absorbed effects, weights) of one sample and weights share a job while
    they hold at most ``specs_per_job`` specifications together; otherwise each block is a job,
    and a block larger than that is split between control sets. Consecutive small groups are then
    packed together up to the same size, so that many small samples do not make many small jobs.
    A job's key hashes ``salt`` (data and settings) with its specifications' canonical content, so
    an unchanged job keeps its key.
    """
    by_sample: dict[str, list[Spec]] = {}
    sample_keys: dict[tuple[int, str | None], str] = {}  # specifications share their sample's object
    for s in specs:
        key = sample_keys.get((id(s.sample), s.weights))
        if key is None:
            key = sample_keys[(id(s.sample), s.weights)] = s.sample_key
        by_sample.setdefault(key, []).append(s)
    groups: list[list[Spec]] = []
    for key in sorted(by_sample):
        members = by_sample[key]
        if len(members) <= specs_per_job:
            groups.append(members)
            continue
        blocks: dict[str, list[Spec]] = {}
        for s in members:
            blocks.setdefault(s.block_key, []).append(s)
        for bkey in sorted(blocks):
            block = blocks[bkey]
            if len(block) <= specs_per_job:
                groups.append(block)
                continue
            by_controls: dict[tuple[str, ...], list[Spec]] = {}
            for s in block:
                by_controls.setdefault(s.controls, []).append(s)
            current: list[Spec] = []
            for ckey in sorted(by_controls):
                part = by_controls[ckey]
                if current and len(current) + len(part) > specs_per_job:
                    groups.append(current)
                    current = []
                current = current + part
            if current:
                groups.append(current)
    # small groups (a generated leave-one-out sample, say) share a job up to the same size
    packed: list[list[Spec]] = []
    for members in groups:
        if packed and len(packed[-1]) + len(members) <= specs_per_job:
            packed[-1] = packed[-1] + members
        else:
            packed.append(members)
    jobs = []
    for members in packed:
        members = sorted(members, key=lambda s: s.spec_id)
        jobs.append(Job(keys.job_key(salt, [s.canonical for s in members]), tuple(members)))
    return sorted(jobs, key=lambda j: j.key)


def spec_table(grid: Grid, specs: Sequence[Spec]) -> pd.DataFrame:
    """One row per specification: id, the choice name per dimension, and the baseline flag."""
    base = grid.baseline_id(specs)
    rows = [{"spec_id": s.spec_id, **dict(s.names), "curve": s.curve, "is_baseline": s.spec_id == base}
            for s in specs]
    return pd.DataFrame(rows, columns=["spec_id", *DIMENSIONS, "curve", "is_baseline"])
