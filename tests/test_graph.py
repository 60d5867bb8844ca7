"""Graph building: deterministic keys and one shared node per block plan.

Reference: Dask's own graph (``__dask_graph__``) and its synchronous scheduler; the values
are checked against direct calls of the same functions.
"""

from __future__ import annotations

import dask
import numpy as np

from rowfold.blocks import plan_blocks
from rowfold.methods._graph import sum_tree, task, tree_levels
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
