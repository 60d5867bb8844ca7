"""Graph building: deterministic keys, one shared node per block plan, one layer per pass.

Reference: Dask's own graph (``__dask_graph__``) and its synchronous scheduler; the values
are checked against direct calls of the same functions.
"""

from __future__ import annotations

import dask
import numpy as np

from rowfold.blocks import plan_blocks
from rowfold.methods._graph import PassGraph, sum_tree, task, tree_levels
from rowfold.storage import ArrayInfo, ArrayRef, write_arrays


def rows_sum(plan: object, index: int) -> float:
    """A task body that reads one block and sums it."""
    block, _ = plan.load(index)  # type: ignore[attr-defined]
    return float(block.sum())


def test_a_plan_is_one_graph_node_and_tasks_still_read_it(tmp_path: object) -> None:
    path = f"{tmp_path}/a.h5"
    a = np.arange(60.0).reshape(20, 3)
    write_arrays(path, {"A": a})
    plan = plan_blocks(ArrayInfo(ArrayRef(path, "A"), (20, 3), "<f8", None), None, 4)
    tasks = [task(rows_sum, plan, i) for i in range(plan.blocks)]
    total = sum_tree(tasks, lambda *parts: sum(parts))
    graph = dict(total.__dask_graph__())
    assert sum(1 for key in graph if str(key).startswith("BlockPlan")) == 1
    (value,) = dask.compute(total, scheduler="sync")
    # Exact in any summation order: every partial sum is an integer below 2^53.
    assert value == a.sum()
    assert [task(rows_sum, plan, i).key for i in range(3)] == [t.key for t in tasks[:3]]


def test_tree_levels_reach_one_root_for_any_fan_in() -> None:
    for leaves in (1, 2, 7, 64):
        for fan_in in (2, 3, 8):
            levels = tree_levels(list(range(leaves)), fan_in, lambda kids: tuple(kids))
            assert len(levels[-1]) == 1
            assert len(levels) >= 2


def add_all(*parts: float) -> float:
    """A reduction node: the plain sum of its children."""
    return float(sum(parts))


def pass_of(plan: object, fan_in: int) -> tuple[PassGraph, object]:
    """A pass reading every block with a tree of ``add_all`` over the leaves; its root."""
    graph = PassGraph("sums", rows_sum, add_all, plan, fan_in)
    leaves = [graph.call(rows_sum, plan, i) for i in range(plan.blocks)]  # type: ignore[attr-defined]
    return graph, graph.tree(leaves, fan_in, add_all)[-1][0]


def test_a_pass_is_one_layer_with_one_plan_node_and_the_same_value(tmp_path: object) -> None:
    path = f"{tmp_path}/a.h5"
    a = np.arange(90.0).reshape(30, 3)
    write_arrays(path, {"A": a})
    plan = plan_blocks(ArrayInfo(ArrayRef(path, "A"), (30, 3), "<f8", None), None, 4)
    graph, root = pass_of(plan, 2)
    total = graph.output(root)  # type: ignore[arg-type]
    layers = total.__dask_graph__().layers
    assert list(layers) == [graph.name]
    keys = list(layers[graph.name])
    assert sum(1 for key in keys if str(key[0]).startswith("BlockPlan")) == 1
    # the tree of tree_levels: 8 leaves, then 4, 2 and 1 nodes of fan-in 2
    assert sum(1 for key in keys if str(key[0]).startswith("rows_sum-")) == plan.blocks == 8
    assert sum(1 for key in keys if str(key[0]).startswith("add_all-")) == 4 + 2 + 1
    # Exact in any order: every partial sum is an integer below 2^53.
    for scheduler in ("sync", "threads"):
        (value,) = dask.compute(total, scheduler=scheduler)
        assert value == a.sum()
    again, _ = pass_of(plan, 2)
    assert again.name == graph.name
    assert pass_of(plan, 3)[0].name != graph.name


def test_a_pass_takes_outside_values_and_literals_once() -> None:
    graph = PassGraph("outside", 1)
    outside = dask.delayed(np.float64(0.5))
    weights = np.arange(4.0)
    graph.share(weights, "weights")
    leaves = [graph.call(np.dot, weights, np.full(4, float(i))) for i in range(3)]
    root = graph.call(add_all, graph.sum(leaves, add_all), outside)
    (value,) = dask.compute(graph.output(root), scheduler="sync")
    assert value == 6.0 * (0 + 1 + 2) + 0.5
    keys = list(graph.output(root).__dask_graph__())
    assert sum(1 for key in keys if str(key[0]).startswith("weights-")) == 1


def bracket(*children: str) -> str:
    """A reduction node that writes down the tree's shape: ``(a,b)``."""
    return "(" + ",".join(children) + ")"


def leaf_name_of(index: int) -> str:
    """A leaf that names its block."""
    return str(index)


def shape_of(leaves: int, fan_in: int, single_root: bool) -> str:
    """The tree a pass's reduce builds over ``leaves`` leaves, as text."""
    graph = PassGraph("shape", leaves, fan_in, single_root)
    calls = [(leaf_name_of, i) for i in range(leaves)]
    root = graph.reduce(calls, fan_in, bracket, single_root=single_root)
    (text,) = dask.compute(graph.output(root), scheduler="sync")
    return str(text)


def test_fused_levels_build_the_very_same_tree(monkeypatch: object) -> None:
    from rowfold.methods import _graph

    for leaves in (9, 16, 37, 100):
        for fan_in in (2, 3, 8):
            for single_root in (True, False):
                whole = tree_levels(
                    [str(i) for i in range(leaves)], fan_in, lambda kids: bracket(*kids)
                )[-1][0]
                if not single_root:
                    summed = sum_tree([str(i) for i in range(leaves)], bracket, fan_in)
                    whole = str(dask.compute(summed, scheduler="sync")[0])
                monkeypatch.setattr(_graph, "LEAF_TASKS", 4)  # type: ignore[attr-defined]
                fused = shape_of(leaves, fan_in, single_root)
                monkeypatch.setattr(_graph, "LEAF_TASKS", 10_000)  # type: ignore[attr-defined]
                assert fused == shape_of(leaves, fan_in, single_root) == whole
    assert _graph.fused_levels(100_000, 2) == 4  # 6,250 leaf tasks of 16 blocks
    assert _graph.fused_levels(100_000, 100_000) == 0  # a flat tree is never fused
    assert _graph.fused_levels(8192, 2) == 0


def test_fused_passes_give_the_same_factors_to_the_last_bit(
    tmp_path: object, monkeypatch: object
) -> None:
    """tsqr's R-only tree and a Gram pass, fused or not: the same calls in the same order,
    so the same bits (a property of the graph, not a numerical tolerance)."""
    from rowfold.cluster import InlineEngine
    from rowfold.methods import _graph, cholesky, tsqr

    path = f"{tmp_path}/a.h5"
    a = np.random.default_rng(17).standard_normal((230, 4))
    write_arrays(path, {"A": a})
    plan = plan_blocks(ArrayInfo(ArrayRef(path, "A"), (230, 4), "<f8", None), None, 10)
    engine = InlineEngine()
    results = []
    for leaf_tasks in (10_000, 3):
        monkeypatch.setattr(_graph, "LEAF_TASKS", leaf_tasks)  # type: ignore[attr-defined]
        fact = tsqr.factor_source(plan, "binary", engine, False)
        gram = cholesky.gram_pass(plan, engine, (), "gram")
        results.append((fact.R, fact.sums.gram, gram["gram"], fact.details["tree_depth"]))
    (r1, s1, g1, d1), (r2, s2, g2, d2) = results
    assert np.array_equal(r1, r2) and np.array_equal(s1, s2) and np.array_equal(g1, g2)
    assert d1 == d2 == 5  # 23 blocks: 12, 6, 3, 2, 1 nodes
    # and R is a QR factor of A: Householder QR is backward stable (Higham, Accuracy and
    # Stability of Numerical Algorithms, 2nd ed., Thm 19.4), so R^T R = A^T A up to a small
    # multiple of u ||A||_F^2; 64 u at m = 230, n = 4 is a common practice margin
    assert np.allclose(r1.T @ r1, a.T @ a, rtol=0, atol=64 * 2.0**-52 * np.sum(a * a))


def test_a_map_pass_keeps_the_order_and_bounds_its_task_count(monkeypatch: object) -> None:
    from rowfold.methods import _graph

    monkeypatch.setattr(_graph, "LEAF_TASKS", 3)  # type: ignore[attr-defined]
    calls = [(leaf_name_of, i) for i in range(10)]
    listed = _graph.map_pass("names", calls, (10,))
    assert dask.compute(listed, scheduler="sync")[0] == [str(i) for i in range(10)]
    assert len(listed.__dask_graph__()) == 3 + 1  # 3 tasks of at most 4 calls, then the join
