"""Householder TSQR: local QR per row block, then a reduction tree of stacked R factors.

Pass 1 reads every block once and carries the right-hand sides through the same
reflectors, so ``Q^H B`` comes from the same pass. When Q is wanted, the tree keeps each
node's small Q factor (one n x n slice per child) on the workers; a later pass forms the
block of Q as ``Q_local @ S_i``, where ``S_i`` is the product of the node slices on the
path from the root to leaf i (the tree's factors applied back down).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from rowfold.blocks import BlockPlan, BlockSource, load_for_products
from rowfold.kernels import householder_q, householder_r, metrics, positive_diagonal, stacked_r
from rowfold.kernels import sparse as sparse_kernels
from rowfold.kernels.fold import folded_r
from rowfold.methods._graph import PassGraph, task
from rowfold.methods.base import Checkpoints, Context, Engine, Factorization, LeafCheckpoint
from rowfold.spec import MethodSpec


def leaf_factor(
    source: BlockSource, index: int, keep_q: bool = False
) -> tuple[Any, Any, Any, metrics.Sums]:
    """Read one block; return its (R, Q^H B, None, first-pass sums).

    Without Q the block is folded piece by piece in cache (:func:`folded_r`, no copy of the
    whole block); a CSR block is densified for the fold but its Gram comes from the CSR
    block (about nnz * nnz-per-row flops instead of rows * n^2). With Q the leaf uses
    whole-block geqrf, the same kernel that :func:`q_block` re-runs later, so the block's Q
    pairs with this very R.
    """
    if not keep_q and isinstance(source, BlockPlan) and source.sparse:
        sparse_block, rhs = source.load_sparse(index)
        R, C, _ = folded_r(sparse_block.toarray(), rhs, with_gram=False)
        return R, C, None, sparse_kernels.sparse_gram_sums(sparse_block)
    if not keep_q:
        block, rhs = load_for_products(source, index)
        R, C, gram = folded_r(block, rhs)
        assert gram is not None
        return R, C, None, {"a_fro2": float(np.real(np.trace(gram))), "gram": gram}
    block, rhs = source.load(index)
    sums = metrics.gram_sums(block)
    R, C = householder_r(block, rhs, overwrite=True)
    return R, C, None, sums


def checkpointed_leaf(
    source: BlockSource, index: int, checkpoint: LeafCheckpoint, keep_q: bool
) -> tuple[Any, Any, Any, metrics.Sums]:
    """:func:`leaf_factor`, saving its result to the block's checkpoint for a later resume."""
    result = leaf_factor(source, index, keep_q)
    R, C, _, sums = result
    checkpoint.save({"R": R, "C": C, "a_fro2": sums["a_fro2"], "gram": sums["gram"]})
    return result


def resumed_leaf(checkpoint: LeafCheckpoint) -> tuple[Any, Any, Any, metrics.Sums]:
    """A leaf result saved by :func:`checkpointed_leaf` (its block is not read again).

    The runner kept only checkpoints that held when the run started; one that no longer
    does fails the run with its name (see :meth:`LeafCheckpoint.load`).
    """
    saved = checkpoint.load()
    sums = {"a_fro2": float(saved["a_fro2"]), "gram": saved["gram"]}
    return saved["R"], saved.get("C"), None, sums


def node_factor(keep_q: bool, *children: tuple[Any, ...]) -> tuple[Any, Any, Any, metrics.Sums]:
    """Reduce children's (R, C, Q, sums) to this node's (R, C, Q or None, sums)."""
    R, C, Q = stacked_r([(child[0], child[1]) for child in children], keep_q)
    return R, C, Q, metrics.add_sums(*(child[3] for child in children))


def child_transform(node: tuple[Any, Any, Any], position: int, parent: np.ndarray) -> np.ndarray:
    """Return the child's slice of the node's Q times the parent's transform."""
    q = node[2]
    n = q.shape[1]
    return np.asarray(q[position * n : (position + 1) * n] @ parent)


def q_block(block: np.ndarray, transform: np.ndarray) -> np.ndarray:
    """Form a block of the thin Q from the block of A and its tree transform."""
    return householder_q(block) @ transform


def fan_in_of(tree: str | int, leaves: int) -> int:
    """Children per node for a tree name (flat, binary) or a fan-in k."""
    if tree == "flat":
        return max(2, leaves)
    if tree == "binary":
        return 2
    return int(tree)


def tree_depth(leaves: int, fan_in: int) -> int:
    """Levels above the leaves of the tree :func:`rowfold.methods._graph.tree_levels` builds
    (at least one)."""
    depth, width = 1, -(-leaves // fan_in)
    while width > 1:
        depth, width = depth + 1, -(-width // fan_in)
    return depth


def factor(plan: BlockPlan, spec: MethodSpec, ctx: Context) -> Factorization:
    """Run Householder TSQR over the plan's row blocks."""
    leaves: _Leaves | None = None
    notes: list[str] = []
    if ctx.checkpoints is not None:
        leaves, notes = _checkpoint_leaves(plan, ctx.checkpoints, ctx.want_q)
    fact = factor_source(plan, spec.tree, ctx.engine, ctx.want_q, leaves=leaves)
    if leaves is not None:
        fact.details["resumed_blocks"] = sum(1 for leaf in leaves.calls if leaf.resumed)
    if notes:
        fact.details["warnings"] = notes
    return fact


class _Leaf:
    """A leaf's call (function and arguments) and whether it comes from a checkpoint."""

    def __init__(self, call: tuple[Any, ...], resumed: bool) -> None:
        self.call = call
        self.resumed = resumed


class _Leaves:
    """Leaf calls that replace the default ones, and what they depend on (for the key)."""

    def __init__(self, calls: list[_Leaf], inputs: tuple[Any, ...]) -> None:
        self.calls = calls
        self.inputs = inputs


def _checkpoint_leaves(
    plan: BlockPlan, checkpoints: Checkpoints, keep_q: bool
) -> tuple[_Leaves, list[str]]:
    """Leaf calls that save checkpoints, or load the ones a killed run left (the runner has
    removed those whose rows or job changed, or whose content does not match its digest),
    and the notes on those removed."""
    found, notes = checkpoints.leaves(plan.blocks)
    calls = []
    for i, checkpoint in enumerate(found):
        if checkpoint.saved:
            calls.append(_Leaf((resumed_leaf, checkpoint), True))
        else:
            calls.append(_Leaf((checkpointed_leaf, plan, i, checkpoint, keep_q), False))
    resumed = tuple(leaf.resumed for leaf in calls)
    return _Leaves(calls, (tuple(found), resumed)), notes


def factor_source(
    source: BlockSource,
    tree: str | int,
    engine: Engine,
    want_q: bool,
    label: str = "tsqr",
    leaves: _Leaves | None = None,
) -> Factorization:
    """Run Householder TSQR over any block source (the input, or a derived panel).

    ``leaves`` may supply the leaf calls (e.g. with checkpoints); by default each leaf
    reads and factors one block of the source. The leaves and the tree are one graph
    layer (:class:`PassGraph`).
    """
    fan_in = fan_in_of(tree, source.blocks if leaves is None else len(leaves.calls))
    extra = () if leaves is None else leaves.inputs
    graph = PassGraph("tsqr", leaf_factor, node_factor, source, want_q, fan_in, *extra)
    graph.share(source, "source")
    if leaves is None:
        calls = [(leaf_factor, source, i, want_q) for i in range(source.blocks)]
    else:
        calls = [leaf.call for leaf in leaves.calls]
    if want_q:  # every node's Q factor is kept: no level is fused
        nodes = [graph.call(*call) for call in calls]
        levels = [
            nodes,
            *_persist_levels(engine, graph, graph.tree(nodes, fan_in, node_factor, True)[1:]),
        ]
        top = levels[-1][0]
    else:
        top = graph.output(graph.reduce(calls, fan_in, node_factor, False))
    (root,) = engine.compute([top], f"{label}: factor row blocks")
    R, signs = positive_diagonal(root[0])
    qhb = None if root[1] is None else np.conj(signs)[:, None] * root[1]
    recipes = _leaf_transforms(levels, fan_in, np.diag(signs)) if want_q else []
    depth = tree_depth(len(calls), fan_in)
    return Factorization(
        R=R,
        qhb=qhb,
        q_kernel=q_block,
        q_recipes=recipes,
        passes=1,
        sums=metrics.FirstPassSums.of(root[3]),
        details={"tree": tree, "tree_depth": depth},
    )


def _persist_levels(engine: Engine, graph: PassGraph, levels: list[list[Any]]) -> list[list[Any]]:
    """Persist every internal node so its Q factor stays on the workers."""
    flat = graph.outputs([node for level in levels for node in level])
    kept = iter(engine.persist(flat))
    return [[next(kept) for _ in level] for level in levels]


def _leaf_transforms(levels: list[list[Any]], fan_in: int, root_transform: np.ndarray) -> list[Any]:
    """Walk the tree top-down and return the transform task of every leaf."""
    transforms: list[Any] = [root_transform]
    for depth in range(len(levels) - 1, 0, -1):
        below: list[Any] = []
        for index, node in enumerate(levels[depth]):
            children = len(levels[depth - 1][index * fan_in : (index + 1) * fan_in])
            below.extend(
                task(child_transform, node, position, transforms[index])
                for position in range(children)
            )
        transforms = below
    return transforms
