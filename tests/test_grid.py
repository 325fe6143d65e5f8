"""The grid language: expansion, stable ids, exclusions, generators, baseline, jobs."""

from __future__ import annotations

import copy

import pytest

from fegrid.errors import ConfigError
from fegrid.grid import load_config, plan_jobs

BASE = {
    "run_name": "t",
    "data": {"path": "x.csv", "unit": "firm", "time": "year"},
    "outcomes": ["invest"],
    "focal_regressors": ["value", "capital"],
    "absorb": {"firm": ["firm"], "firm_year": ["firm", "year"], "pooled": []},
    "clustering": {"robust": {"kind": "hc1"}, "firm": {"kind": "clustered", "by": "firm"}},
    "samples": {"all": {}, "late": {"range": {"year": {"min": 1946}}}},
    "control_sets": {"combinations_of": ["capital", "value"]},
}


def _ids(raw, levels=None) -> dict[str, tuple]:
    return {s.spec_id: s.names for s in load_config(raw).expand(levels)}


def test_size_and_self_controls_left_out() -> None:
    specs = load_config(BASE).expand()
    # 2 focal x 3 absorb x 2 clustering x 2 samples x 4 control sets, less the control sets that
    # hold the focal regressor itself (2 of 4 for each focal)
    assert len(specs) == 2 * 3 * 2 * 2 * 2
    assert all(s.focal not in s.controls for s in specs)
    assert len({s.spec_id for s in specs}) == len(specs)
    assert all(len(s.spec_id) == 12 and int(s.spec_id, 16) >= 0 for s in specs)


def test_ids_do_not_depend_on_order_or_names() -> None:
    ids = set(_ids(BASE))
    shuffled = copy.deepcopy(BASE)
    shuffled["absorb"] = {"pooled": [], "firm_year": ["year", "firm"], "firm": ["firm"]}
    shuffled["focal_regressors"] = ["capital", "value"]
    shuffled["samples"] = {"late_years": {"range": {"year": {"min": 1946}}}, "everything": {}}
    assert set(_ids(shuffled)) == ids
    changed = copy.deepcopy(BASE)
    changed["samples"]["late"] = {"range": {"year": {"min": 1947}}}
    assert len(set(_ids(changed)) & ids) == len(ids) // 2


def test_exclusion_rules_and_negation() -> None:
    raw = copy.deepcopy(BASE)
    raw["exclude"] = [{"absorb": "pooled", "clustering": "firm"},
                      {"sample": "late", "absorb": {"not": ["firm_year"]}}]
    names = list(_ids(raw).values())
    assert not any(dict(n)["absorb"] == "pooled" and dict(n)["clustering"] == "firm" for n in names)
    assert all(dict(n)["absorb"] == "firm_year" for n in names if dict(n)["sample"] == "late")


def test_drop_each_generator_and_named_levels() -> None:
    raw = copy.deepcopy(BASE)
    raw["samples"] = {"all": {}, "without": {"drop_each": "firm"}}
    specs = load_config(raw).expand({"firm": ["A", "B", "C"]})
    samples = {s.name("sample") for s in specs}
    assert samples == {"all", "without:A", "without:B", "without:C"}
    s = next(s for s in specs if s.name("sample") == "without:B")
    assert s.sample.canonical() == {"drop": {"firm": ["B"]}}
    # an exclusion rule may name the generator: it covers every sample it produced
    raw["exclude"] = [{"sample": "without", "clustering": "robust"}]
    specs = load_config(raw).expand({"firm": ["A", "B", "C"]})
    assert all(s.name("clustering") == "firm" for s in specs if s.name("sample") != "all")


def test_baseline_must_match_exactly_one() -> None:
    raw = copy.deepcopy(BASE)
    raw["baseline"] = {"focal": "value", "absorb": "firm_year", "clustering": "firm", "sample": "all",
                       "controls": "capital"}
    grid = load_config(raw)
    specs = grid.expand()
    base = [s for s in specs if s.spec_id == grid.baseline_id(specs)]
    assert base[0].name("absorb") == "firm_year"
    del raw["baseline"]["controls"]
    with pytest.raises(ConfigError, match="name a choice for: controls"):
        load_config(raw).baseline_id(load_config(raw).expand())


def test_same_regression_under_two_names_is_an_error() -> None:
    raw = copy.deepcopy(BASE)
    raw["absorb"]["firm_again"] = ["firm"]
    with pytest.raises(ConfigError, match="same regression under different names"):
        load_config(raw).expand()


def test_jobs_respect_size_and_keep_keys_when_a_sample_is_added() -> None:
    specs = load_config(BASE).expand()
    per_sample = len(specs) // 2
    jobs = plan_jobs(specs, specs_per_job=per_sample, salt="s")
    assert len(jobs) == 2  # one per sample
    assert len(plan_jobs(specs, specs_per_job=1000, salt="s")) == 1  # small groups are packed
    small = plan_jobs(specs, specs_per_job=5, salt="s")
    assert all(len(j.specs) <= 8 for j in small)  # a control set's specs stay together
    assert sorted(s.spec_id for j in small for s in j.specs) == sorted(s.spec_id for s in specs)
    more = copy.deepcopy(BASE)
    more["samples"]["early"] = {"range": {"year": {"max": 1945}}}
    keys = {j.key for j in plan_jobs(load_config(more).expand(), specs_per_job=per_sample, salt="s")}
    assert {j.key for j in jobs} <= keys and len(keys) == 3


def test_schema_defaults_filled_in_change_no_key() -> None:
    """Snakemake's validate fills the schema's defaults into the config: nothing may move."""
    from snakemake.utils import validate

    from fegrid.defaults import SCHEMA_PATH

    raw = copy.deepcopy(BASE)
    filled = copy.deepcopy(BASE)
    validate(filled, str(SCHEMA_PATH), set_default=True)
    assert filled != raw
    a, b = load_config(raw), load_config(filled)
    assert a.settings_key() == b.settings_key()
    assert [j.key for j in plan_jobs(a.expand(), specs_per_job=7, salt="s")] == [
        j.key for j in plan_jobs(b.expand(), specs_per_job=7, salt="s")]


def test_schema_parsed_in_c_equals_the_pure_python_parse() -> None:
    """The schema is parsed by libyaml where PyYAML has it (every process parses it at import); the
    dictionary must be the one PyYAML's own safe loader gives (the reference parser)."""
    import yaml

    from fegrid.defaults import SCHEMA_PATH, schema

    assert schema() == yaml.safe_load(SCHEMA_PATH.read_text())


def test_named_control_sets_get_no_undeclared_empty_set() -> None:
    """Only the sets the user declares: `named` alone adds no `none` set (before: twice the specs)."""
    raw = copy.deepcopy(BASE)
    raw["focal_regressors"] = ["value"]
    raw["control_sets"] = {"named": {"full": ["capital"]}}
    grid = load_config(raw)
    assert list(grid.controls) == ["full"]
    assert {s.name("controls") for s in grid.expand()} == {"full"}
    raw["control_sets"] = {"named": {"bare": [], "full": ["capital"]}}
    assert {s.name("controls") for s in load_config(raw).expand()} == {"bare", "full"}
    raw["control_sets"] = {"combinations_of": ["capital"]}
    assert {s.name("controls") for s in load_config(raw).expand()} == {"none", "capital"}


def test_a_grid_whose_every_set_holds_the_focal_says_why_it_is_empty() -> None:
    raw = copy.deepcopy(BASE)
    raw["focal_regressors"] = ["value"]
    raw["control_sets"] = {"named": {"full": ["capital", "value"]}}
    grid = load_config(raw)
    assert grid.self_controlled() == ["control set 'full' holds 'value' (outcome invest, focal value)"]
    with pytest.raises(ConfigError, match="control set 'full' holds 'value'"):
        grid.expand()


def test_unknown_key_suggests_the_near_one_and_empty_config(tmp_path) -> None:
    raw = copy.deepcopy(BASE)
    raw["focal_regresors"] = raw.pop("focal_regressors")
    with pytest.raises(ConfigError, match="Did you mean 'focal_regresors' -> 'focal_regressors'"):
        load_config(raw)
    empty = tmp_path / "empty.yaml"
    empty.write_text("# nothing yet\n")
    with pytest.raises(ConfigError, match="is empty"):
        load_config(empty)


def test_spellings_removed_in_0_4_are_refused_with_the_new_one_named() -> None:
    """0.2 spellings (covariance kinds, keep_singletons), accepted with a warning in 0.3, are refused in
    0.4 with a one-paragraph error naming the new spelling; interactions are only 'a x b'."""
    from fegrid.errors import ConfigError

    def raw(kinds: tuple[str, str, str, str], singletons: dict) -> dict:
        return {"run_name": "r", "data": {"path": "x.csv", "unit": "u", "time": "t"}, "outcomes": ["y"],
                "focal_regressors": ["x"], "absorb": {"u": ["u"]}, "estimation": singletons,
                "clustering": {"a": {"kind": kinds[0]}, "b": {"kind": kinds[1]},
                               "c": {"kind": kinds[2], "by": "u"}, "d": {"kind": kinds[3], "by": ["u", "t"]}}}

    new = ("homoskedastic", "hc1", "clustered", "two_way_clustered")
    assert load_config(raw(new, {"singletons": "keep"})).keep_singletons
    for i, old in enumerate(("iid", "robust", "cluster", "twoway")):
        kinds = new[:i] + (old,) + new[i + 1:]
        with pytest.raises(ConfigError, match=f"'{old}' was renamed '{new[i]}' in fegrid 0.3.*removed in 0.4"):
            load_config(raw(kinds, {}))
    with pytest.raises(ConfigError, match="write 'singletons: keep'"):
        load_config(raw(new, {"keep_singletons": True}))
    for foreign in ("u*t", "u#t", "u:t"):
        with pytest.raises(ConfigError, match="only as 'a x b' \\(here 'u x t'\\)"):
            load_config({**raw(new, {}), "absorb": {"i": [foreign]}})


def test_the_estimator_dimension_keeps_least_squares_ids_and_gives_the_others_their_own() -> None:
    """Least-squares ids are those of a grid without the dimension (the demo's baseline keeps its id);
    2SLS ids depend on the instruments, not on the choice's name or curve; an estimator that
    instruments the focal regressor or the outcome is left out; the baseline and exclusions name it."""
    plain = _ids(BASE)
    raw = copy.deepcopy(BASE)
    raw["estimators"] = {"ols": {"method": "least_squares"},
                         "iv": {"method": "two_stage_least_squares", "instruments": ["capital"]},
                         "pml": {"method": "poisson_pml", "curve": "counts"}}
    specs = load_config(raw).expand()
    by = {name: {s.spec_id for s in specs if s.name("estimator") == name} for name in raw["estimators"]}
    assert by["ols"] == set(plain)
    assert not by["iv"] & by["ols"] and not by["pml"] & by["ols"]
    assert all(s.focal == "value" for s in specs if s.name("estimator") == "iv")  # capital is its instrument
    assert {s.curve for s in specs} == {"least_squares", "two_stage_least_squares", "counts"}
    renamed = copy.deepcopy(raw)
    renamed["estimators"] = {"a": raw["estimators"]["ols"], "b": raw["estimators"]["iv"],
                             "c": {"method": "poisson_pml", "curve": "other"}}
    assert {s.spec_id for s in load_config(renamed).expand()} == set().union(*by.values())
    other = copy.deepcopy(raw)
    other["estimators"]["iv"]["instruments"] = ["value"]
    assert not {s.spec_id for s in load_config(other).expand() if s.name("estimator") == "iv"} & by["iv"]
    raw["exclude"] = [{"estimator": "pml", "absorb": "pooled"}]
    assert len(load_config(raw).expand()) == len(specs) - len([s for s in specs if s.name("estimator") == "pml"
                                                                and s.name("absorb") == "pooled"])
    raw["baseline"] = {"focal": "value", "absorb": "firm", "clustering": "firm", "sample": "all",
                       "controls": "capital"}
    grid = load_config(raw)
    with pytest.raises(ConfigError, match="name a choice for: estimator"):
        grid.baseline_id(grid.expand())
    raw["baseline"]["estimator"] = "iv"
    grid = load_config(raw)
    assert grid.baseline_id(grid.expand()) in by["iv"]
    bad = copy.deepcopy(BASE)
    bad["estimators"] = {"iv": {"method": "two_stage_least_squares"}}
    with pytest.raises(ConfigError, match="estimators.iv: two-stage least squares needs at least one"):
        load_config(bad)
    bad["estimators"] = {"p": {"method": "poisson_pml", "instruments": ["capital"]}}
    with pytest.raises(ConfigError, match="estimators.p:.*belong to method two_stage_least_squares"):
        load_config(bad)


def test_exclusion_on_the_table_of_combinations_equals_a_rule_by_rule_loop() -> None:
    """The demo config's exclude rules (29 of them, with lists, negations and a drop_each sample), applied to
    the whole table of combinations at once, keep exactly the combinations that a plain loop over every
    combination and every rule keeps (the semantics of config/README.md: a rule removes a combination
    when each of its keys selects the combination's choice or, for an expanded sample, its declared name)."""
    import itertools

    import yaml

    from fegrid.grid import _kept_combinations
    from fegrid.ledger import DIMENSIONS
    from fegrid.locations import DEMO_CONFIG

    grid = load_config(yaml.safe_load(DEMO_CONFIG.read_text()))
    samples = grid.sample_defs({"valley": [f"V{i:02d}" for i in range(30)]})
    dims = [list(d) for d in (grid.outcomes, grid.focals, grid.absorb, grid.clustering, samples, grid.controls,
                              grid.weights, grid.estimators)]

    def picks(sel, value: str, parent: str) -> bool:
        if isinstance(sel, str):
            return value == sel or parent == sel
        if isinstance(sel, list):
            return value in sel or parent in sel
        return not (value in sel["not"] or parent in sel["not"])

    loop = []
    for combo in itertools.product(*dims):
        names = dict(zip(DIMENSIONS, combo))
        declared = dict(names, sample=samples[names["sample"]][0])
        if not any(all(picks(sel, names[d], declared[d]) for d, sel in rule.items()) for rule in grid.exclude):
            loop.append(combo)
    table = list(_kept_combinations(dims, [samples[s][0] for s in dims[4]], grid.exclude))
    assert len(grid.exclude) > 20 and 600 < len(loop) < 10_000
    assert table == loop
