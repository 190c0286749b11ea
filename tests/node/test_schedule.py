"""The time budget (brief: the primary always runs; the rest only if it fits)."""

from __future__ import annotations

import pytest

from node.schedule import CostModel, plan_methods
from quant.registry import METHODS

ALL = ["mtr_asym", "apt_star", "arex", "mtr_asym_t1", "lda"]


def _plan(budget_s: float, elapsed_s: float = 0.0, have_t1: bool = True, **kw):
    cost = CostModel.from_registry(METHODS)
    return plan_methods(ALL, registry=METHODS, cost=cost, n_voxels=200_000, n_slices=20,
                        n_outputs=3, budget_s=budget_s, elapsed_s=elapsed_s, have_t1=have_t1,
                        **kw)


def test_everything_fits_a_generous_budget_and_fits_are_deferred():
    plan = _plan(10.0)
    assert plan.run == ["mtr_asym", "apt_star", "arex", "mtr_asym_t1"]
    assert plan.deferred == ["lda"] and plan.skipped == {}


def test_a_small_budget_keeps_the_primary_and_skips_the_rest_with_a_reason():
    plan = _plan(0.3)
    assert plan.run == ["mtr_asym"]
    assert set(plan.skipped) == {"apt_star", "arex", "mtr_asym_t1"}
    assert "does not fit" in plan.skipped["apt_star"]


def test_methods_needing_t1_are_skipped_without_a_t1_map():
    plan = _plan(10.0, have_t1=False)
    assert "T1" in plan.skipped["arex"] and "T1" in plan.skipped["mtr_asym_t1"]


def test_model_based_switch_off():
    plan = _plan(10.0, deferred_enabled=False)
    assert plan.deferred == [] and "switched off" in plan.skipped["lda"]


def test_cost_model_learns_from_measurements():
    cost = CostModel.from_registry(METHODS)
    before = cost.compute_s_per_voxel["apt_star"]
    cost.learn("apt_star", seconds=2.0, n_voxels=1000)
    assert cost.compute_s_per_voxel["apt_star"] > before


def test_a_primary_that_cannot_run_is_an_error():
    cost = CostModel.from_registry(METHODS)
    with pytest.raises(ValueError, match="primary method 'arex' cannot run"):
        plan_methods(["arex"], registry=METHODS, cost=cost, n_voxels=10, n_slices=1,
                     n_outputs=3, budget_s=1.0, elapsed_s=0.0, have_t1=False)


def test_the_per_series_reports_are_not_charged_to_each_method():
    # the structured report and the summary page are built once per series, after every
    # method (node.service); a method's prediction covers what that method makes: PM, derived
    # MR and SC (common practice: the plan charges each method its own work)
    per_method = ("parametric_map", "derived_mr", "secondary_capture")
    alone = _plan(10.0, outputs=per_method)
    with_reports = _plan(10.0, outputs=(*per_method, "structured_report", "summary"))
    assert with_reports.predicted_parts_s == alone.predicted_parts_s
    # 20 slices: 1 PM + 20 MR + 20 SC objects at the model's send cost per object
    cost = CostModel.from_registry(METHODS)
    assert alone.predicted_parts_s["mtr_asym"]["send"] == pytest.approx(
        41 * cost.send_s_per_object, rel=1e-4)
