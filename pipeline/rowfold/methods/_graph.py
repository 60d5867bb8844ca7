"""Small helpers to build deterministic Dask graphs over row blocks.

Two ways to build a graph:

- :func:`task` wraps one call as a ``dask.delayed`` object: fine for a handful of tasks, but
  each costs a hash of its arguments, its own graph layer and a merge of layers (measured at
  10,000 blocks: about 0.25 ms a task, and Dask's cull of one layer per task at compute).
- :class:`PassGraph` builds a whole pass (one task per block, then a reduction tree) as ONE
  graph layer: keys ``(name, i)`` under one deterministic name hashed once from what the
  pass depends on, and tasks built as Dask task objects directly. Its outputs are handed to
  the scheduler without culling, since every task of a pass feeds its outputs. The task
  objects come from ``dask._task_spec``, Dask's own graph format since 2024.12 (from
  memory; pyproject.toml asks for dask 2025.1 or later).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

import dask
from dask._task_spec import DataNode, Task, TaskRef
from dask.base import tokenize
from dask.delayed import Delayed
from dask.highlevelgraph import HighLevelGraph
from dask.utils import funcname

from rowfold.blocks import BlockPlan


def task(func: Callable[..., Any], *args: Any) -> Any:
    """Wrap one call as a delayed task whose key is a hash of the function and arguments.

    The same call always builds the same graph (``pure=True``), so graphs are reproducible
    and repeated sub-graphs are shared. A :class:`BlockPlan` argument becomes one shared
    graph node (:func:`shared_plan`) instead of a copy searched and hashed in every task.
    """
    return dask.delayed(func, pure=True)(
        *(shared_plan(arg) if isinstance(arg, BlockPlan) else arg for arg in args)
    )


# Recently used plans and their graph nodes, by identity (a handful per run).
_PLAN_NODES: dict[int, tuple[BlockPlan, Any]] = {}
_PLAN_NODES_KEPT = 64


def shared_plan(plan: BlockPlan) -> Any:
    """The graph node holding ``plan`` (a literal: Dask does not search a plan for tasks).

    Dask looks for tasks inside every argument of a call, dataclass fields included, and
    that search cost more than the rest of building a task (measured: 0.26 ms against
    0.095 ms per task, so 10,000 blocks build in about 1 s instead of 2.7 s).
    """
    kept = _PLAN_NODES.get(id(plan))
    if kept is None or kept[0] is not plan:
        if len(_PLAN_NODES) >= _PLAN_NODES_KEPT:
            _PLAN_NODES.clear()
        kept = (plan, dask.delayed(plan, pure=True, traverse=False))
        _PLAN_NODES[id(plan)] = kept
    return kept[1]


class Node:
    """A task of a :class:`PassGraph`, to pass as an argument of a later task of it."""

    __slots__ = ("key", "ref")

    def __init__(self, key: tuple[Any, ...]) -> None:
        self.key = key
        self.ref = TaskRef(key)


class PassGraph:
    """The tasks of one pass over the blocks, built as one Dask graph layer.

    Parameters
    ----------
    label : str
        Start of the layer's name (e.g. ``"tsqr"``); the rest is a hash.
    *inputs
        Everything the pass's tasks depend on besides their own position (the functions,
        the block plan, options, factors, per-block stamps): hashed once into the name, so
        two passes share keys exactly when they compute the same values.

    Notes
    -----
    Arguments of :meth:`call` may be :class:`Node` (a task of this pass), a
    :class:`BlockPlan` or a value given to :meth:`share` (one literal node of the layer
    that every task refers to), a ``Delayed`` (an outside
    dependency, e.g. a persisted value) or a plain value, taken literally (never searched
    for tasks).
    """

    def __init__(self, label: str, *inputs: Any) -> None:
        self.token = tokenize(*inputs)
        self.name = f"{label}-{self.token}"
        self.tasks: dict[Any, Any] = {}
        self.prefixes: dict[Callable[..., Any], str] = {}
        self.outside: dict[Any, Delayed] = {}
        self.shared: dict[int, tuple[Any, TaskRef]] = {}
        self.count = 0

    def call(self, func: Callable[..., Any], *args: Any) -> Node:
        """Add one task calling ``func(*args)``; return it as a node of this pass.

        Its key is ``("<function name>-<token>", n)``, so Dask's dashboard and the
        scheduler's task names say which function runs (e.g. ``leaf_factor``).
        """
        prefix = self.prefixes.get(func)
        if prefix is None:
            prefix = self.prefixes[func] = f"{funcname(func)}-{self.token}"
        key = (prefix, self.count)
        self.count += 1
        self.tasks[key] = Task(key, func, *(self._argument(arg) for arg in args))
        return Node(key)

    def _argument(self, arg: Any) -> Any:
        """The graph form of one argument (see the class notes)."""
        if isinstance(arg, Node):
            return arg.ref
        kept = self.shared.get(id(arg))
        if kept is not None and kept[0] is arg:
            return kept[1]
        if isinstance(arg, BlockPlan):
            self.share(arg, "BlockPlan")
            return self.shared[id(arg)][1]
        if isinstance(arg, Delayed):
            self.outside.setdefault(arg.key, arg)
            return TaskRef(arg.key)
        return arg

    def share(self, value: Any, label: str = "literal") -> None:
        """Hold ``value`` (a block source, factors) in one literal node that every task of
        this pass given that very object refers to: stored and sent once, not per task.
        A :class:`BlockPlan` is shared without asking."""
        key = (f"{label}-{self.name}", len(self.tasks))
        self.tasks[key] = DataNode(key, value)
        self.shared[id(value)] = (value, TaskRef(key))

    def tree(
        self, leaves: Sequence[Node], fan_in: int, func: Callable[..., Any], *lead: Any
    ) -> list[list[Node]]:
        """Add a reduction tree over ``leaves`` whose nodes call ``func(*lead, *children)``;
        return its levels as :func:`tree_levels` does (leaves first, the root last)."""
        return tree_levels(leaves, fan_in, lambda kids: self.call(func, *lead, *kids))

    def sum(self, leaves: Sequence[Node], add: Callable[..., Any], fan_in: int = 8) -> Node:
        """Add the tree of ``add`` calls that :func:`sum_tree` builds; return its root."""
        level = list(leaves)
        while len(level) > 1:
            level = [self.call(add, *children) for children in group(level, fan_in)]
        return level[0]

    def reduce(
        self,
        calls: Sequence[tuple[Any, ...]],
        fan_in: int,
        combine: Callable[..., Any],
        *lead: Any,
        single_root: bool = True,
    ) -> Node:
        """Add one leaf per call ``(func, *args)`` and the tree that reduces them with
        ``combine(*lead, *children)``; return the root.

        The tree is that of :meth:`tree` (``single_root``: a lone leaf still gets a node
        above it) or of :meth:`sum`. Beyond :data:`LEAF_TASKS` leaves its lowest levels are
        fused (:func:`fused_levels`): one task runs a whole subtree, its leaves one after
        the other (:func:`fold_calls`), with the same calls in the same order, so the value
        is the same to the last bit; only the task count falls.
        """
        levels = fused_levels(len(calls), fan_in)
        if levels and any(isinstance(arg, Delayed) for call in calls for arg in call):
            levels = 0  # a value still to be computed elsewhere cannot sit inside a call
        if levels == 0:
            leaves = [self.call(*call) for call in calls]
        else:
            size = fan_in**levels
            leaves = [
                self.call(fold_calls, list(calls[i : i + size]), fan_in, levels, combine, lead)
                for i in range(0, len(calls), size)
            ]
        if single_root:
            return self.tree(leaves, fan_in, combine, *lead)[-1][0]
        level = list(leaves)
        while len(level) > 1:
            level = [self.call(combine, *lead, *children) for children in group(level, fan_in)]
        return level[0]

    def outputs(self, nodes: Sequence[Node]) -> list[Delayed]:
        """The nodes as delayed objects sharing this pass's one layer.

        Every task of the pass must feed one of ``nodes`` computed together: the graph is
        handed over whole, without Dask's cull (which would scan every task again).
        """
        dependencies: list[Any] = list(self.outside.values())
        graph = HighLevelGraph.from_collections(self.name, self.tasks, dependencies)
        return [WholePass(node.key, graph, layer=self.name) for node in nodes]

    def output(self, node: Node) -> Delayed:
        """The one output of a pass (see :meth:`outputs`)."""
        (delayed,) = self.outputs([node])
        return delayed


# Leaf tasks a reduction keeps at most before it fuses its lowest levels, and the most
# blocks one fused task may run (a flat tree is never fused). 8192 tasks keep any cluster
# busy, and Dask's start (ordering the graph) grows with the task count: about 0.1 ms a
# task on the threaded scheduler (benchmarks/graph_build.py).
LEAF_TASKS = 8192
FUSED_BLOCKS = 64


def fused_levels(leaves: int, fan_in: int) -> int:
    """How many of a tree's lowest levels to fuse into its leaf tasks: the fewest that
    leave at most :data:`LEAF_TASKS` tasks, but always at least two (so the levels above
    are those of the whole tree), or 0 when none are needed or a fused task would run
    more than :data:`FUSED_BLOCKS` leaves."""
    levels = 0
    while -(-leaves // fan_in**levels) > LEAF_TASKS and fan_in ** (levels + 1) < leaves:
        levels += 1
    return levels if fan_in**levels <= FUSED_BLOCKS else 0


def fold_calls(
    calls: list[tuple[Any, ...]],
    fan_in: int,
    levels: int,
    combine: Callable[..., Any],
    lead: tuple[Any, ...],
) -> Any:
    """Run a subtree of ``levels`` levels in one task: the leaf calls in order, each group
    of ``fan_in`` consecutive values at a level combined as soon as it is complete (the
    groups of :func:`group`, short ones last), so at most ``levels * fan_in`` values are
    held at once, never one per leaf."""
    pending: list[list[Any]] = [[] for _ in range(levels + 1)]

    def push(level: int, value: Any) -> None:
        pending[level].append(value)
        if level < levels and len(pending[level]) == fan_in:
            children, pending[level] = pending[level], []
            push(level + 1, combine(*lead, *children))

    for func, *args in calls:
        push(0, func(*args))
    for level in range(levels):
        if pending[level]:
            children, pending[level] = pending[level], []
            push(level + 1, combine(*lead, *children))
    (value,) = pending[levels]
    return value


def sum_pass(
    label: str,
    calls: Sequence[tuple[Any, ...]],
    add: Callable[..., Any],
    inputs: Sequence[Any],
    shared: Sequence[Any] = (),
) -> Delayed:
    """One pass that adds the values of ``calls`` (one per block) with :func:`sum_tree`'s
    tree of ``add``, as one graph layer; ``inputs`` are what the calls depend on (for the
    key, see :class:`PassGraph`), ``shared`` values the calls take (held once; None and
    delayed values are skipped)."""
    graph = PassGraph(label, add, *inputs)
    for value in shared:
        if value is not None and not isinstance(value, Delayed):
            graph.share(value)
    return graph.output(graph.reduce(calls, 8, add, single_root=False))


def map_pass(label: str, calls: Sequence[tuple[Any, ...]], inputs: Sequence[Any]) -> Delayed:
    """One pass whose value is the list of the values of ``calls`` (one per block), in
    order, as one graph layer; beyond :data:`LEAF_TASKS` calls, consecutive calls share a
    task (:func:`run_calls`), so the task count stays bounded."""
    graph = PassGraph(label, *inputs)
    size = max(1, -(-len(calls) // LEAF_TASKS))
    parts = [graph.call(run_calls, list(calls[i : i + size])) for i in range(0, len(calls), size)]
    return graph.output(graph.call(joined, *parts))


def run_calls(calls: list[tuple[Any, ...]]) -> list[Any]:
    """The values of ``calls`` ``(func, *args)``, in order."""
    return [func(*args) for func, *args in calls]


def joined(*parts: list[Any]) -> list[Any]:
    """The lists ``parts`` one after the other."""
    return [value for part in parts for value in part]


def by_identity(values: Sequence[Any]) -> tuple[list[Any], tuple[int, ...]]:
    """The distinct objects of ``values`` (by identity, in order) and each value's index
    among them: what a list like ``[recipe] * blocks`` depends on, hashed once per object."""
    seen: dict[int, int] = {}
    distinct: list[Any] = []
    pattern = []
    for value in values:
        index = seen.get(id(value))
        if index is None:
            index = seen[id(value)] = len(distinct)
            distinct.append(value)
        pattern.append(index)
    return distinct, tuple(pattern)


def _whole(dsk: Any, keys: Any, **kwargs: Any) -> Any:
    """Dask's graph optimisation for a pass: none (every task is needed)."""
    return dsk


class WholePass(Delayed):
    """A delayed output of a :class:`PassGraph`: Dask does not cull its graph."""

    __slots__ = ()
    __dask_optimize__ = staticmethod(_whole)


def group(items: Sequence[Any], fan_in: int) -> list[list[Any]]:
    """Cut a sequence into consecutive groups of at most ``fan_in`` items."""
    return [list(items[i : i + fan_in]) for i in range(0, len(items), fan_in)]


def tree_levels(
    leaves: Sequence[Any], fan_in: int, combine: Callable[[list[Any]], Any]
) -> list[list[Any]]:
    """Build a reduction tree bottom-up.

    Parameters
    ----------
    leaves : sequence
        The leaf tasks.
    fan_in : int
        Children per node (>= 2); use ``len(leaves)`` for a flat tree.
    combine : callable
        Builds a node task from a list of child tasks.

    Returns
    -------
    list of list
        ``levels[0]`` are the leaves, ``levels[-1]`` holds the single root. With one leaf
        there is still one combine node above it, so every tree has a root node.
    """
    levels: list[list[Any]] = [list(leaves)]
    fan_in = max(2, fan_in)
    while len(levels[-1]) > 1 or len(levels) == 1:
        levels.append([combine(children) for children in group(levels[-1], fan_in)])
    return levels


def sum_tree(leaves: Sequence[Any], add: Callable[..., Any], fan_in: int = 8) -> Any:
    """Return one task that adds all leaves with a tree of ``add`` calls."""
    level = list(leaves)
    while len(level) > 1:
        level = [task(add, *children) for children in group(level, fan_in)]
    return level[0]
