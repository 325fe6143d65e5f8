"""The joint tests' least-squares, 2SLS and Poisson PML draws as reweightings equal the stacked refits they replace.

Data: linearmodels' wage_panel (an open dataset; see conftest.py), on the grid of tests/helpers.py
with weights, singletons and a sample that a draw can empty. The reference is the second, older
algorithm kept in fegrid itself: every draw's panel stacked copy by copy and refitted by the engine
(:func:`fegrid.joint.draw_curves` with ``reweight=False``), which tests/test_joint.py checks against
brute-force refits.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from helpers import training_panel, wage_grid

from fegrid.estimate import fit_block
from fegrid.grid import load_config, spec_table
from fegrid.joint import draw_curves, joint_tests
from fegrid.reweight import draw_levels, prepare_blocks
from fegrid.samples import sample_rows

KEY = ["draw", "spec_id"]


def _grid(tmp_path: Path, wage_panel: pd.DataFrame):
    raw = wage_grid(tmp_path, wage_panel, weights={"unweighted": None, "by_hours": "hours"})
    raw["samples"] = {**raw["samples"],
                      "long_hours": {"range": {"hours": {"min": 2600}}},  # leaves workers with one year: singletons
                      "without_worker_13": {"drop": {"nr": [13]}},  # filters on the unit column itself
                      "worker_13": {"keep": {"nr": [13]}}}  # a draw without worker 13 leaves it empty
    raw["control_sets"] = {"combinations_of": ["expersq", "hours"]}
    # 2SLS: experience instruments the focal regressor (absorbed with year effects: not identified
    # there), hours too unless it is a control (then dropped as an instrument)
    raw["estimators"] = {"ls": {"method": "least_squares"},
                         "iv": {"method": "two_stage_least_squares", "instruments": ["exper", "hours"]}}
    raw["exclude"] = [{"estimator": "iv", "sample": ["not_1987", "balanced", "without_worker_13"]}]
    grid = load_config(raw)
    return grid, grid.expand()


def _ledger(grid, frame, specs) -> pd.DataFrame:
    rows = []
    by_block: dict[str, list] = {}
    for s in specs:
        by_block.setdefault(s.block_key, []).append(s)
    for block in by_block.values():
        from fegrid.samples import apply_sample

        part = apply_sample(frame, block[0].sample, grid.panel)
        rows.extend(r.record() for r in fit_block(part, grid.block_settings(block[0]),
                                                  [s.request() for s in block]).results)
    return spec_table(grid, specs).merge(pd.DataFrame(rows), on="spec_id")


def _equal_draws(grid, frame: pd.DataFrame, specs, draws, seed: int, column: str, *, rtol: float
                 ) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The draws refitted by the shortcuts and on stacked copies (sorted by draw and specification), after
    checking that they agree: the same missing values, estimates and SEs to ``rtol``, df exactly."""
    fast = draw_curves(grid, frame, specs, draws, seed=seed, column=column).sort_values(KEY, ignore_index=True)
    slow = draw_curves(grid, frame, specs, draws, seed=seed, column=column, reweight=False).sort_values(
        KEY, ignore_index=True)
    pd.testing.assert_frame_equal(fast[KEY], slow[KEY])
    for col in ("estimate", "std_error"):
        a, b = fast[col].to_numpy(), slow[col].to_numpy()
        assert np.array_equal(np.isnan(a), np.isnan(b)), col
        ok = ~np.isnan(b)
        np.testing.assert_allclose(a[ok], b[ok], rtol=rtol, atol=1e-12, err_msg=col)
    pd.testing.assert_series_equal(fast["df_inference"], slow["df_inference"])
    return fast, slow


def test_reweighted_draws_equal_stacked_refits(tmp_path: Path, wage_panel: pd.DataFrame) -> None:
    """Estimates, SEs and df of every least-squares and 2SLS draw equal the stacked refits' (estimates and SEs
    to 1e-8 relative, nearly all to 1e-9: the stacked path demeans by alternating projections to 1e-10
    where the effects have three terms, and a nearly unidentified specification (a 2SLS draw with an
    SE of 7e5) amplifies that up to the identification margin of 100; df exactly), including each copy
    counted as its own cluster and its own effects, the two-way and homoskedastic kinds, weights,
    singletons and the draws that empty a sample; and the joint tests' p-values are the same."""
    grid, specs = _grid(tmp_path, wage_panel)
    frame = wage_panel
    codes, levels = pd.factorize(frame["nr"], sort=True)
    blocks, rest = prepare_blocks(grid, frame, specs, codes, len(levels), "nr")
    assert sum(len(b.specs) for b in blocks) > 0.9 * len(specs) and len(blocks) + len(rest) > 0
    draws = range(6)
    fast, slow = _equal_draws(grid, frame, specs, draws, 5, "nr", rtol=1e-8)
    for col in ("estimate", "std_error"):
        a, b = fast[col].to_numpy(), slow[col].to_numpy()
        ok = ~np.isnan(b)
        assert np.quantile(np.abs(a[ok] - b[ok]) / np.maximum(np.abs(b[ok]), 1e-12), 0.99) < 1e-9, col
    # the cases the test is meant to cover did occur: a draw's sample is the copies of the sample's rows,
    # so a filter on the unit column keeps its meaning in every draw (before, it was applied again to the
    # copies' new labels: "without_worker_13" failed in nearly every draw and left the curve), and a draw
    # without worker 13 leaves "worker_13" empty
    name = {s.spec_id: s.sample.name for s in specs}
    emptied = [d for d in draws if draw_levels(codes, len(levels), np.random.default_rng([5, d])).counts[
        list(levels).index(13)] == 0]
    sample = slow["spec_id"].map(name)
    assert 0 < len(emptied) < len(draws)
    assert slow.loc[sample == "worker_13"].groupby("draw")["estimate"].apply(lambda e: e.isna().all()).to_dict() == {
        d: d in emptied for d in draws}
    assert slow.loc[sample == "without_worker_13", "estimate"].notna().mean() > 0.9
    ledger = _ledger(grid, frame, specs)
    assert (ledger["n_singletons"] > 0).any()
    kinds = {s.inference.kind for s in specs}
    assert {"hc1", "clustered", "two_way_clustered", "homoskedastic"} <= kinds
    # 2SLS draws took the reweighting too, identified and not (experience absorbed by year effects)
    iv = ledger["estimator"] == "iv"
    assert {"ok", "not_identified"} <= set(ledger.loc[iv, "status"])
    assert ledger.loc[iv, "controls_dropped"].str.contains("hours (instrument, also a control)", regex=False).any()
    iv_ids = set(ledger.loc[iv & (ledger["status"] == "ok"), "spec_id"])
    assert iv_ids and iv_ids <= {s.spec_id for b in blocks for s in b.specs}
    assert fast.loc[fast["spec_id"].isin(iv_ids), "std_error"].notna().mean() > 0.9
    pd.testing.assert_frame_equal(joint_tests(ledger, fast, 0.95), joint_tests(ledger, slow, 0.95))


@pytest.mark.parametrize(("column", "local"), [("nr", True), ("nr", False), ("occupation_block", True)])
def test_a_coarser_resampling_column_relabels_units_and_clusters_per_copy(column: str, local: bool, tmp_path: Path,
                                                                         wage_panel: pd.DataFrame, monkeypatch) -> None:
    """Resampling groups of workers (here workers grouped by the remainder of their id, a coarser
    column fixed within workers): clusters on workers and on the groups are per copy, the year
    effects shared; group-by-year effects, too many for dummy columns on every row, are held per worker
    (the dummies of its own group's years, partialled out group by group on each draw) or, when those
    parts are too large, demeaned on each draw's rows weighted by their copies; the reweighted draws
    equal the stacked refits (linearmodels' wage_panel)."""
    from fegrid import reweight

    if not local:
        monkeypatch.setattr(reweight, "LOCAL_MAX_PART", 0)
    frame = wage_panel.assign(occupation_block=wage_panel["nr"] % 97)
    raw = wage_grid(tmp_path, frame)
    raw["clustering"] = {**raw["clustering"], "blocks": {"kind": "clustered", "by": "occupation_block"}}
    raw["samples"] = {"all": {}, "after_1981": {"range": {"year": {"min": 1982}}}}
    raw["control_sets"] = {"combinations_of": ["expersq"]}
    raw["absorb"] = {"worker": ["nr"], "worker_year": ["nr", "year"], "pooled": [],
                     # 776 group-by-year levels: each draw demeans its rows, weighted by their copies
                     "worker_group_year": ["nr", "occupation_block x year"]}
    grid = load_config(raw)
    specs = grid.expand()
    codes, levels = pd.factorize(frame[column], sort=True)
    blocks, rest = prepare_blocks(grid, frame, specs, codes, len(levels), column)
    # resampling workers, the group-by-year effects cross the copies; resampling groups, they are nested
    designs = [design for block in blocks for design in block.designs]
    assert not rest
    assert any(design.local is not None for design in designs) == (column == "nr" and local)
    assert any(design.reweighted for design in designs) == (column == "nr" and not local)
    fast = draw_curves(grid, frame, specs, range(3), seed=9, column=column).sort_values(KEY, ignore_index=True)
    slow = draw_curves(grid, frame, specs, range(3), seed=9, column=column, reweight=False).sort_values(
        KEY, ignore_index=True)
    pd.testing.assert_frame_equal(fast, slow, rtol=1e-9, atol=1e-12)


def test_poisson_draws_as_reweightings_equal_stacked_refits(tmp_path: Path, wage_panel: pd.DataFrame,
                                                            monkeypatch) -> None:
    """Poisson PML draws fitted on the drawn rows weighted by their copies equal the stacked refits
    (linearmodels' wage_panel; the reference is the stacked path, as above): estimates and SEs to 1e-8
    relative, or of the SE for an estimate near zero (both iterate to the same convergence rule: the
    draws from the design's own fit under the null, the stacked refits from their outcome), df exactly,
    every draw under the imposed null. Union membership as the outcome has workers never in a union
    (effect groups with a zero outcome throughout, dropped: the inference then runs on fewer rows than
    the draw's),
    zeros elsewhere (the certificate of no separation), weights, singletons, every covariance kind; least
    squares in the same designs (weighted by the copies, beside the Poisson fits' stacked inference)."""
    from fegrid import reweight

    frame = wage_panel.assign(wage=np.exp(wage_panel["lwage"]))  # the hourly wage: positive, no zero
    raw = wage_grid(tmp_path, frame, weights={"unweighted": None, "by_hours": "hours"})
    raw["outcomes"] = ["union", "wage"]
    raw["focal_regressors"] = ["married"]
    raw["absorb"] = {"worker": ["nr"], "worker_year": ["nr", "year"], "pooled": []}
    raw["samples"] = {"all": {}, "after_1981": {"range": {"year": {"min": 1982}}},
                      "long_hours": {"range": {"hours": {"min": 2600}}}}
    raw["control_sets"] = {"combinations_of": ["expersq", "hours"]}
    raw["estimators"] = {"pml": {"method": "poisson_pml"}, "ls": {"method": "least_squares"}}
    grid = load_config(raw)
    specs = grid.expand()
    made: list[bool] = []
    fit_poisson = reweight._Design._poisson

    def counted(self, *args, **kwargs):
        got = fit_poisson(self, *args, **kwargs)
        made.append(got is not None)
        return got

    monkeypatch.setattr(reweight._Design, "_poisson", counted)
    draws = range(6)
    fast = draw_curves(grid, frame, specs, draws, seed=5, column="nr").sort_values(KEY, ignore_index=True)
    slow = draw_curves(grid, frame, specs, draws, seed=5, column="nr", reweight=False).sort_values(
        KEY, ignore_index=True)
    pd.testing.assert_frame_equal(fast[[*KEY, "imposed"]], slow[[*KEY, "imposed"]])
    method = fast["spec_id"].map({s.spec_id: s.estimator.method for s in specs})
    assert (fast["imposed"] == (method == "poisson_pml")).all()
    se = slow["std_error"].to_numpy()
    for col in ("estimate", "std_error"):
        a, b = fast[col].to_numpy(), slow[col].to_numpy()
        assert np.array_equal(np.isnan(a), np.isnan(b)), col
        ok = ~np.isnan(b)
        assert ok.mean() > 0.8
        # relative to the value, or to the SE for an estimate near zero (the iterations' own precision)
        assert np.all(np.abs(a[ok] - b[ok]) <= 1e-8 * np.maximum(np.abs(b[ok]), se[ok])), col
    pd.testing.assert_series_equal(fast["df_inference"], slow["df_inference"])
    assert np.mean(made) > 0.9  # the fits were reweightings
    codes, levels = pd.factorize(frame["nr"], sort=True)
    observed = {s.spec_id: 0.05 for s in specs}
    blocks, _ = prepare_blocks(grid, frame, specs, codes, len(levels), "nr", observed)
    starts = [start for b in blocks for d in b.designs for start in d.start.values()]
    assert np.mean([start is not None for start in starts]) > 0.9  # they started from the design's fit
    assert all(len({s.estimator.method for s in d.specs}) == 2 for b in blocks for d in b.designs)

    ledger = _ledger(grid, frame, specs)
    assert (ledger["status"] == "ok").all()
    assert (ledger["n_separated"] > 0).any() and (ledger["n_singletons"] > 0).any()


def test_effects_df_from_the_copies_equal_the_stacked_absorbers(tmp_path: Path, wage_panel: pd.DataFrame,
                                                                 monkeypatch) -> None:
    """The absorbed df and nested df that a draw counts from the design's rows and the copies equal those of
    the engine's :class:`fegrid.absorb.Absorber` built on the draw's stacked rows (linearmodels' wage_panel;
    resampling workers or groups of workers; unit, shared and relabelled trends, three terms, terms finer
    than the groups, cluster variables relabelled or shared, weights and singletons). The draws counted
    together (``count_many``) give the same numbers, most of them without a draw's own count."""
    from fegrid.absorb import Absorber
    from fegrid.reweight import _CopiesDf

    alone = [0]
    one_draw = _CopiesDf.count

    def counted(self, draw, by_sets):
        alone[0] += 1
        return one_draw(self, draw, by_sets)

    frame = wage_panel.assign(group=wage_panel["nr"] % 97, region=wage_panel["nr"] % 7)
    raw = wage_grid(tmp_path, frame, weights={"unweighted": None, "by_hours": "hours"})
    raw["clustering"] = {**raw["clustering"], "group": {"kind": "clustered", "by": "group"},
                         "region_year": {"kind": "two_way_clustered", "by": ["region", "year"]},
                         "worker_occupation": {"kind": "two_way_clustered", "by": ["nr", "occupation"]}}
    raw["samples"] = {"all": {}, "long_hours": {"range": {"hours": {"min": 2600}}}}
    raw["control_sets"] = {"combinations_of": ["expersq"]}
    raw["absorb"] = {"worker": ["nr"], "worker_year": ["nr", "year"], "pooled": [], "year": ["year"],
                     "three": ["nr", "year", "occupation"], "occupation_year": ["occupation", "year"],
                     "worker_trend": [{"trend": "nr"}, "year"], "trend_alone": [{"trend": "nr"}],
                     "region_trend": [{"trend": "region"}, "nr"], "group_year": ["group x year", "nr"],
                     "occupation_trend": [{"trend": "occupation"}, "nr", "year"], "group": ["group", "year"]}
    grid = load_config(raw)
    specs = grid.expand()
    checked = 0
    for column in ("nr", "group"):
        codes, levels = pd.factorize(frame[column], sort=True)
        blocks, rest = prepare_blocks(grid, frame, specs, codes, len(levels), column)
        assert not rest
        for design in (d for b in blocks for d in b.designs):
            by_sets = sorted({s.inference.by for s in design.specs})
            draws, wanted = [], []
            for d in range(4):
                draw = draw_levels(codes, len(levels), np.random.default_rng([3, d]))
                if not draw.counts[design.levels].any():
                    continue
                b = design.base_index[draw.rows]
                rows, position = b[b >= 0], draw.position[b >= 0]
                stacked = {g: dim.stacked(rows, position, draw.picks) for g, dim in design.dims.items()}
                absorber = Absorber(len(rows), design.settings.absorb,
                                    weights=design.w[rows] if design.settings.weights else None,
                                    time="year", time_values=design.time[rows], codes_of=stacked.__getitem__)
                expected = {by: absorber.nested_df([stacked[g] for g in by]) if by and design.settings.absorb else 0
                            for by in by_sets}
                assert _CopiesDf(design).count(draw, by_sets) == (absorber.absorbed_df, expected)
                draws.append(draw)
                wanted.append((absorber.absorbed_df, expected))
                checked += 1
            counts = np.stack([draw.counts for draw in draws])
            monkeypatch.setattr(_CopiesDf, "count", counted)
            absorbed, nested = _CopiesDf(design).count_many(draws, counts, by_sets)
            monkeypatch.setattr(_CopiesDf, "count", one_draw)
            for k, (a, expected) in enumerate(wanted):
                assert absorbed[k] == a and {by: nested[by][k] for by in by_sets} == expected
    assert checked > 300
    assert 0 < alone[0] < checked / 2  # three terms, two shared terms, shared trends: each draw its own count


def test_cross_products_per_level_and_row_by_row_give_the_same_draws(tmp_path: Path, wage_panel: pd.DataFrame,
                                                                      monkeypatch) -> None:
    """A draw's cross products from the design's sums per resampling level (small designs) equal those summed
    over its rows on each draw (large designs), and both equal the stacked refits (linearmodels' wage_panel)."""
    from fegrid import reweight

    grid, specs = _grid(tmp_path, wage_panel)
    codes, levels = pd.factorize(wage_panel["nr"], sort=True)
    blocks, _ = prepare_blocks(grid, wage_panel, specs, codes, len(levels), "nr")
    assert any(d.cross is not None for b in blocks for d in b.designs)
    per_level = draw_curves(grid, wage_panel, specs, range(3), seed=7, column="nr").sort_values(KEY, ignore_index=True)
    monkeypatch.setattr(reweight, "MAX_CROSS_CELLS", 0)
    blocks, _ = prepare_blocks(grid, wage_panel, specs, codes, len(levels), "nr")
    assert all(d.cross is None for b in blocks for d in b.designs)
    by_rows = draw_curves(grid, wage_panel, specs, range(3), seed=7, column="nr").sort_values(KEY, ignore_index=True)
    pd.testing.assert_frame_equal(per_level, by_rows, rtol=1e-9, atol=1e-12)


def test_singletons_among_the_copies_are_those_the_stacked_rows_hold(tmp_path: Path, wage_panel: pd.DataFrame) -> None:
    """When a Poisson draw drops effect groups with a zero outcome, the rows left may hold a singleton among
    their copies (the draw then takes the stacked refit). Reference: the engine's singleton rule
    (:func:`fegrid.absorb.drop_singletons`) on the copies written out row by row, each copy of a worker a
    level of its own and the years shared (linearmodels' wage_panel, random draws and subsets of rows)."""
    from fegrid.absorb import drop_singletons

    raw = wage_grid(tmp_path, wage_panel)
    raw.update(outcomes=["union"], focal_regressors=["married"], absorb={"worker_year": ["nr", "year"]},
               samples={"all": {}}, control_sets={"combinations_of": []},
               clustering={"worker": raw["clustering"]["worker"]}, estimators={"pml": {"method": "poisson_pml"}})
    grid = load_config(raw)
    specs = grid.expand()
    codes, levels = pd.factorize(wage_panel["nr"], sort=True)
    blocks, rest = prepare_blocks(grid, wage_panel, specs, codes, len(levels), "nr", {specs[0].spec_id: 0.1})
    assert not rest
    design = blocks[0].designs[0]
    worker, year = design.term_codes[("nr",)], design.term_codes[("year",)]
    rng = np.random.default_rng(11)
    found = {True: 0, False: 0}
    for trial in range(300):
        copies = draw_levels(codes, len(levels), np.random.default_rng([3, trial])).counts[design.levels]
        drawn = np.flatnonzero(copies > 0)
        few = rng.choice(np.unique(worker[drawn]), size=int(rng.integers(1, 6)), replace=False)
        keep = drawn[np.isin(worker[drawn], few) & (rng.random(len(drawn)) < rng.uniform(0.05, 0.9))]
        if not len(keep):
            continue
        reps = copies[keep]
        copy_of = np.concatenate([np.arange(r) for r in reps])  # the copy each stacked row belongs to
        stacked = {("nr",): worker[keep].repeat(reps) * 10 + copy_of, ("year",): year[keep].repeat(reps)}
        stacked = {g: np.unique(c, return_inverse=True)[1] for g, c in stacked.items()}
        terms = grid.block_settings(specs[0]).absorb
        expected = not drop_singletons(pd.DataFrame(index=range(int(reps.sum()))), terms,
                                       codes_of=stacked.__getitem__).all()
        assert design._copies_leave_singletons(copies, keep) == expected, trial
        found[expected] += 1
    assert min(found.values()) > 20  # both answers were met


def test_draws_refitted_together_equal_each_draw_refitted_alone(tmp_path: Path, wage_panel: pd.DataFrame,
                                                                monkeypatch) -> None:
    """A design refits a batch of draws together (batched products, the same formulas) for its least-squares
    specifications, and its 2SLS ones draw by draw beside them, and gives each draw's own refit (in the
    design's order of specifications) to 1e-10, df exactly, None where the draw alone gives None: every
    covariance kind, period effects partialled from the cross products and occupation-by-year effects as
    local dummies, clusters relabelled per copy (the worker's) and shared (crews of workers, one of
    them absent from the draws without its worker), weights,
    singletons, not-identified regressions, and the draws whose decisions differ from the batch's.
    linearmodels' wage_panel, with one column made worker-specific except for worker 13, so that a
    control is absorbed by worker effects in the draws without worker 13 and kept in the others."""
    from fegrid import reweight

    frame = wage_panel.copy()
    frame["mostly_fixed"] = (frame["nr"] % 7).astype(float) + np.where(frame["nr"] == 13, frame["exper"], 0.0)
    frame["crew"] = np.where(frame["nr"] == 13, 99, frame["nr"] // 500)  # worker 13 alone in a crew
    raw = wage_grid(tmp_path, frame, weights={"unweighted": None, "by_hours": "hours"})
    raw["clustering"]["crew"] = {"kind": "clustered", "by": "crew"}
    raw["absorb"]["worker_occupation_year"] = ["nr", "occupation x year"]  # 72 crossing groups: local dummies
    raw["samples"] = {"all": {}, "long_hours": {"range": {"hours": {"min": 2600}}}}
    raw["control_sets"] = {"combinations_of": ["expersq", "mostly_fixed"]}
    # 2SLS beside least squares in the same designs: refitted draw by draw, the least squares together
    raw["estimators"] = {"ols": {"method": "least_squares"},
                         "iv": {"method": "two_stage_least_squares", "instruments": ["exper"]}}
    grid = load_config(raw)
    specs = grid.expand()
    codes, levels = pd.factorize(frame["nr"], sort=True)
    blocks, _ = prepare_blocks(grid, frame, specs, codes, len(levels), "nr")
    designs = [d for b in blocks for d in b.designs if d.batched_specs]
    assert len(designs) > 5 and any(d.local is not None for d in designs)
    assert any(len(d.batched_specs) < len(d.specs) for d in designs)  # mixed designs among them
    original, alone = reweight._Design._refit_weighted, []

    def counted(self, draw, specs=None):  # the draws that refit_many hands to the one-draw path (all specs)
        if specs is None:
            alone.append(self)
        return original(self, draw, specs)

    draws = [draw_levels(codes, len(levels), np.random.default_rng([3, d])) for d in range(40)]
    kinds, results = set(), 0
    for design in designs:
        monkeypatch.setattr(reweight._Design, "_refit_weighted", counted)
        together = design.refit_many(draws)
        monkeypatch.setattr(reweight._Design, "_refit_weighted", original)
        one_by_one = [design.refit(d) for d in draws]
        for a, b in zip(together, one_by_one):
            assert (a is None) == (b is None)
            if a is None:
                continue
            results += len(a)
            assert [r[0] for r in a] == [r[0] for r in b]
            got, want = np.array([r[1:] for r in a]), np.array([r[1:] for r in b])
            assert np.array_equal(np.isnan(got), np.isnan(want))
            ok = ~np.isnan(want)
            np.testing.assert_allclose(got[ok], want[ok], rtol=1e-10, atol=1e-13)
            np.testing.assert_array_equal(got[:, 2], want[:, 2])
        kinds |= {s.inference.kind for s in design.specs}
    assert {"hc1", "clustered", "two_way_clustered", "homoskedastic"} <= kinds and results > 1000
    assert any(d.settings.weights for d in designs) and any(not d.check_singletons or not d.cc_keep.all()
                                                            for d in designs)
    # draws refitted alone inside refit_many: those with and without worker 13 decide differently on mostly_fixed
    assert 0 < len(alone) < len(draws) * len(designs) / 2


def test_a_poisson_draw_starts_from_effects_updated_in_closed_form(wage_panel: pd.DataFrame) -> None:
    """Poisson PML of hours worked on union membership with worker and occupation-by-year effects
    (linearmodels' wage_panel), on a bootstrap draw of workers (their copies as frequency weights), started
    from the fit on the data as the draws are: one round of closed-form effect updates leaves the last
    term's score equations at zero, and the iterations from there reach the same estimate (1e-9) in fewer
    steps (the draw moves the occupation-by-year effects, each estimated from few workers)."""
    from fegrid.absorb import parse_absorb
    from fegrid.poisson import irls
    from fegrid.reweight import _effects_updated

    codes, levels = pd.factorize(wage_panel["nr"], sort=True)
    cell = pd.factorize(wage_panel["occupation"].astype(str) + "/" + wage_panel["year"].astype(str), sort=True)[0]
    copies = draw_levels(codes, len(levels), np.random.default_rng([11, 0])).counts[codes].astype(float)
    kept = copies > 0
    y, x = wage_panel["hours"].to_numpy(dtype=float), wage_panel[["union"]].to_numpy(dtype=float)
    terms = parse_absorb(["nr", "occupation x year"])
    groups = {("nr",): codes, ("occupation", "year"): cell}

    def fit(rows, weights, start=None):
        return irls(int(rows.sum()), y[rows], x[rows], terms, weights=weights, time=None, tolerance=1e-10,
                    max_iterations=10_000, codes_of=lambda g: pd.factorize(groups[g][rows])[0], start=start)

    on_data = fit(np.ones(len(y), dtype=bool), None)
    start = np.log(on_data.mu)[kept]
    w = copies[kept]
    on_kept = pd.factorize(cell[kept])[0]
    updated = _effects_updated(start, y[kept], w, [pd.factorize(codes[kept])[0], on_kept], 1)
    mu = np.exp(updated)
    assert np.allclose(np.bincount(on_kept, w * (y[kept] - mu)), 0.0, atol=1e-8 * (w * y[kept]).sum())
    plain, quick = fit(kept, w, start), fit(kept, w, updated)
    assert plain.converged and quick.converged and quick.iterations < plain.iterations
    np.testing.assert_allclose(quick.coefficients, plain.coefficients, rtol=1e-9)


def _event_grid(tmp_path: Path, adoption: bool):
    """Two-way event studies, group-time effects and interaction-weighted estimates on linearmodels' jobtraining
    panel (an open dataset, see
    tests/helpers.training_panel: training grants adopted by firms in 1988 or 1989, 65 firms never treated;
    5 firms miss 1989)."""
    frame = training_panel()
    frame["employment"] = np.exp(frame["lemploy"])
    if adoption:  # two never-treated firms made treated throughout (adopting in 1987): the interaction-weighted
        # estimate drops their rows, which a draw's design cannot do; its samples holding them stay stacked
        always = frame.loc[frame["grant_year"].isna(), "fcode"].drop_duplicates().iloc[-2:]
        frame.loc[frame["fcode"].isin(always), ["grant_year", "trained"]] = [1987.0, 1]
    treated_1988 = frame.loc[frame["grant_year"] == 1988, "fcode"].drop_duplicates().iloc[:3].tolist()
    others = frame.loc[frame["grant_year"] != 1988, "fcode"].drop_duplicates().iloc[:9].tolist()
    raw = {
        "run_name": "events",
        "data": {"path": str(tmp_path / "jobs.csv"), "unit": "fcode", "time": "year", "treatment": "trained",
                 **({"adoption": "grant_year"} if adoption else {})},
        "outcomes": ["lhrsemp"],
        "focal_regressors": ["trained"],
        "absorb": {"firm_year": ["fcode", "year"]},
        "clustering": {"firm": {"kind": "clustered", "by": "fcode"}, "robust": {"kind": "hc1"},
                       "iid": {"kind": "homoskedastic"}, "union": {"kind": "clustered", "by": "union"},
                       "firm_year": {"kind": "two_way_clustered", "by": ["fcode", "year"]}},
        # 'few': three 1988 adopters among twelve firms, so that some draws hold none of them (the indicator of
        # the period after adoption is then zero: not identified)
        "samples": {"all": {}, "balanced": {"balanced": True}, "few": {"keep": {"fcode": treated_1988 + others}}},
        "weights": {"unweighted": None, "by_employment": "employment"},
        "control_sets": {"named": {"none": [], "size": ["lemploy"]}},
        "estimators": {"events": {"method": "event_study", "window": [-1, 1]},
                       "wider": {"method": "event_study", "window": [-2, 1]},
                       "group_time": {"method": "group_time", "window": [-1, 1]},
                       "group_time_later": {"method": "group_time", "window": [-1, 1],
                                            "controls_from": "not_yet_treated"},
                       "imputed": {"method": "imputation", "window": [-1, 1]},
                       "cohort_weighted": {"method": "interaction_weighted", "window": [-1, 1]},
                       "last_as_controls": {"method": "interaction_weighted", "window": [-1, 1],
                                            "controls_from": "last_adopters"}},
        "joint_inference": {"draws": 0},
    }
    grid = load_config(raw)
    return grid, grid.expand(), frame


@pytest.mark.parametrize("adoption", [True, False])
def test_staggered_draws_from_the_copies_equal_stacked_refits(tmp_path: Path, adoption: bool) -> None:
    """A two-way event study's draw refitted as least squares on its reparametrized indicators (the focal
    coefficient is the post-adoption average), an interaction-weighted estimate as least squares on its cells
    with the draw's cohort shares (and their variance), group-time effects computed from the units' copies,
    and imputation estimates from the copies' arrays, equal the stacked refits: estimates and SEs to 1e-9, df
    exactly, with controls, never-treated and not-yet-treated controls, the firm's (relabelled per copy) and a
    shared cluster, the heteroskedasticity-robust and homoskedastic kinds, weights for the least-squares
    forms, an unbalanced sample (group-time effects leave out five firms), adoption read from a year column or
    from the treatment, units treated throughout; draws without an adopting cohort's firms (not identified)
    take the stacked refit and say so the same way; what the shortcuts do not cover stays stacked: two-way
    clustered event studies, weighted group-time and imputation estimates, interaction-weighted estimates
    with homoskedastic or two-way covariance, with the last adopters as controls, or in a sample holding
    units treated throughout."""
    grid, specs, frame = _event_grid(tmp_path, adoption)
    codes, levels = pd.factorize(frame["fcode"], sort=True)
    blocks, rest = prepare_blocks(grid, frame, specs, codes, len(levels), "fcode")
    reweighted = {s.spec_id for b in blocks for s in b.specs}
    always = set(frame.loc[frame["grant_year"] == 1987, "fcode"])

    def stays_stacked(s) -> bool:
        method, kind = s.estimator.method, s.inference.kind
        if method == "interaction_weighted":
            rows = frame.iloc[sample_rows(frame, s.sample, grid.panel)]
            return (kind in ("homoskedastic", "two_way_clustered") or s.estimator.staggered.control != "never_treated"
                    or bool(always & set(rows["fcode"])))
        return ((method == "event_study" and kind == "two_way_clustered")
                or (method in ("group_time", "imputation") and bool(s.weights)))

    stacked = {s.spec_id for s in specs if stays_stacked(s)}
    assert reweighted == {s.spec_id for s in specs} - stacked and {s.spec_id for s in rest} == stacked
    assert {s.estimator.method for s in specs if s.spec_id in reweighted} == {
        "event_study", "group_time", "interaction_weighted", "imputation"}
    assert bool(always) == adoption and (not adoption or any(s.estimator.method == "interaction_weighted" and
                                                             s.estimator.staggered.control == "never_treated" and
                                                             s.inference.kind == "clustered" for s in rest))
    draws = range(12)
    _, slow = _equal_draws(grid, frame, specs, draws, 3, "fcode", rtol=1e-9)
    # the reweighted path answered for the samples with every cohort in nearly every draw, and the draws of
    # 'few' without a 1988 adopter were not identified (by the stacked refit, which those draws took)
    drawn = [draw_levels(codes, len(levels), np.random.default_rng([3, d])) for d in draws]
    answered = [r is not None for b in blocks if b.specs[0].sample.name == "all" for r in b.refit_many(drawn)]
    assert answered and np.mean(answered) > 0.9
    few = slow["spec_id"].isin([s.spec_id for s in specs if s.sample.name == "few"])
    assert 0 < slow.loc[few, "estimate"].isna().mean() < 1
